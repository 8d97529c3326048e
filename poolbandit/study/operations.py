"""The daily operations of a live study: init, enroll, assign, record, status, export, verify.

Each operation takes the path of the study database first. Write operations
validate all their input, then write it in one ``BEGIN IMMEDIATE``
transaction (:func:`poolbandit.study.store.write_transaction`); checks that
depend on the database (is this participant enrolled? was this decision
assigned?) run inside that transaction, so they see exactly what they write
against. Bad input raises :class:`~poolbandit.errors.LogError` (tables) or
:class:`~poolbandit.errors.InputError` (arguments) and leaves the database
byte for byte as it was.

A study day in practice::

    poolbandit study init design.toml --db study.sqlite --policy pooled
    poolbandit study enroll --db study.sqlite wave1.csv --control-ratio 0.5
    poolbandit study assign --db study.sqlite --context today.csv --out arms.csv
    poolbandit study record --db study.sqlite outcomes.csv
    poolbandit study export --db study.sqlite --out log.csv

Context features reach ``assign`` through ``context``: a CSV file with a
``participant`` column and one column per design feature, one row per
participant due a decision, required exactly when the design has features.
The context is stored with each decision and exported in the log.
"""

from __future__ import annotations

import json
import math
import sqlite3
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError, format_value
from ..policies._catalogue import KINDS
from ..spec import DesignSpec, PolicySpec, load_design, parse_design
from . import replay
from ._csv import Problems, as_numbers, duplicates, nonempty, read_table
from .store import connect, create, read_transaction, utc_now, write_transaction

__all__ = [
    "StudyInfo",
    "EnrolResult",
    "RecordResult",
    "StudyStatus",
    "VerifyReport",
    "init_study",
    "enroll",
    "assign",
    "record",
    "status",
    "export",
    "verify",
    "open_study",
    "ASSIGNMENT_COLUMNS",
]

#: Columns of the table :func:`assign` returns (and ``study assign`` prints).
ASSIGNMENT_COLUMNS = ["participant", "decision", "step", "arm", "propensity", "condition"]


# --------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class StudyInfo:
    """What ``init`` stored: design hash, policy, seed."""

    path: str
    design_sha256: str
    policy: str
    kind: str
    seed: int


@dataclass(frozen=True)
class EnrolResult:
    """Participants added by one ``enroll``, with the step they start at."""

    enrolled: int
    enrol_step: int
    n_control: int
    n_adaptive: int


@dataclass(frozen=True)
class RecordResult:
    """Outcome rows of one ``record``: new, corrections, and rows already stored unchanged."""

    new: int
    corrected: int
    unchanged: int


@dataclass(frozen=True)
class StudyStatus:
    """A study's state.

    Attributes
    ----------
    last_step : int or None
        The last assigned step (None before the first ``assign``).
    next_step : int
    enrolled : dict
        Participants per condition.
    due : list of str
        Participants due a decision at ``next_step``.
    finished : int
        Participants who have had all ``horizon`` decisions.
    missing : DataFrame
        participant, decision, step of decisions without any recorded outcome.
    arm_counts : DataFrame
        Decisions per condition (rows) and arm (columns).
    snapshot : dict or None
        The posterior summary stored at the last step (pooled policies).
    """

    policy: str
    kind: str
    last_step: int | None
    next_step: int
    enrolled: dict[str, int]
    due: list[str]
    finished: int
    decisions: int
    outcomes: int
    missing: pd.DataFrame
    arm_counts: pd.DataFrame
    snapshot: dict | None = None


@dataclass(frozen=True)
class VerifyReport:
    """What ``verify`` re-derived and every mismatch it found (empty when all agree)."""

    steps: int
    decisions: int
    randomisations: int
    mismatches: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.mismatches


# --------------------------------------------------------------------------
# Opening a study
# --------------------------------------------------------------------------
@dataclass
class _Study:
    conn: sqlite3.Connection
    path: str
    design: DesignSpec
    spec: PolicySpec
    seed: int

    def close(self) -> None:
        self.conn.close()

    def __enter__(self) -> _Study:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def open_study(db: str | Path) -> _Study:
    """Open a study database with its design parsed (a context manager)."""
    conn = connect(db)
    try:
        row = conn.execute("SELECT text, policy, seed FROM design WHERE id = 1").fetchone()
        if row is None:
            raise InputError(f"{db}: the study database has no design (was init interrupted?)")
        design = parse_design(row[0], source=f"{db} (stored design)")
        spec = design.policy(row[1])
        return _Study(conn, str(db), design, spec, int(row[2]))
    except BaseException:
        conn.close()
        raise


def _next_step(conn: sqlite3.Connection) -> int:
    last = conn.execute("SELECT max(step) FROM steps").fetchone()[0]
    return 0 if last is None else int(last) + 1


def _new_batch(conn: sqlite3.Connection, command: str, now: str, *, source: str | None = None,
               sha256: str | None = None, rows: int = 0) -> int:
    cur = conn.execute("INSERT INTO batches (command, created, source, source_sha256, rows) VALUES (?, ?, ?, ?, ?)",
                       (command, now, source, sha256, rows))
    return int(cur.lastrowid)


# --------------------------------------------------------------------------
# init
# --------------------------------------------------------------------------
def _live_policies(design: DesignSpec) -> list[str]:
    return [n for n, s in design.policies.items() if not KINDS[s.kind].simulation_only]


def init_study(design: str | Path, db: str | Path, *, policy: str | None = None) -> StudyInfo:
    """Create a study database from a design file.

    Parameters
    ----------
    design : path
        The design (TOML); its text is stored as submitted with its sha256.
    db : path
        The database to create; refused if a file exists there.
    policy : str, optional
        Name of the design policy that runs the adaptive condition. Default:
        the design's only live policy that is not ``random``.

    Raises
    ------
    DesignError, InputError
        The design is invalid, the policy is unknown, simulation only or not
        implemented, or ``db`` exists.
    """
    spec_design = load_design(design)
    if policy is None:
        live = [n for n in _live_policies(spec_design) if spec_design.policies[n].kind != "random"]
        if len(live) != 1:
            names = ", ".join(_live_policies(spec_design)) or "(none)"
            raise InputError(f"{design}: choose the adaptive policy with --policy (live policies: {names})")
        policy = live[0]
    spec = spec_design.policy(policy)
    if KINDS[spec.kind].simulation_only:
        raise InputError(f"{design}: policies.{policy}: kind {format_value(spec.kind)} reads the simulated truth "
                         f"and cannot run a live study; live policies: {', '.join(_live_policies(spec_design))}")
    from ..policies.registry import make_policy
    try:
        make_policy(spec, spec_design)
    except ValueError as err:
        raise InputError(f"{design}: policies.{policy}: {err}") from None
    seed = spec_design.study.seed
    if seed is None:
        seed = int(np.random.SeedSequence().entropy)
    now = utc_now()

    def fill(conn: sqlite3.Connection) -> None:
        _new_batch(conn, "init", now, source=str(design), sha256=spec_design.sha256, rows=0)
        conn.execute("INSERT INTO design (id, text, sha256, source, policy, seed, created) VALUES (1, ?, ?, ?, ?, ?, ?)",
                     (spec_design.source_text, spec_design.sha256, str(design), policy, str(seed), now))

    create(db, fill)
    return StudyInfo(str(db), spec_design.sha256, policy, spec.kind, seed)


# --------------------------------------------------------------------------
# enroll
# --------------------------------------------------------------------------
def enroll(db: str | Path, participants: str | Path, *, control_ratio: float | None = None) -> EnrolResult:
    """Enrol the participants listed in a CSV file.

    The file has a ``participant`` column and one column per design
    covariate (numbers). Participants start at the next step to be assigned.
    With ``control_ratio`` R, exactly ``round(R n)`` of the file's ``n``
    participants, chosen by a seeded random permutation, go to the control
    condition (uniform random assignment) and the rest to the adaptive
    policy; the randomisation and its ratio are logged. Without it everyone
    is adaptive.

    Raises
    ------
    LogError
        A bad file: empty, wrong header, empty or duplicate id, an id already
        enrolled, a non-numeric covariate (each problem by row and column).
    InputError
        ``control_ratio`` outside [0, 1].
    """
    if control_ratio is not None and not (isinstance(control_ratio, (int, float)) and 0 <= control_ratio <= 1):
        raise InputError(f"--control-ratio: expected a share of participants in [0, 1], got {control_ratio!r}")
    with open_study(db) as study:
        design = study.design
        table = read_table(participants, required=["participant"] + list(design.covariates),
                           what="participants file")
        problems = Problems(table.source)
        ids = nonempty(table, "participant", problems)
        duplicates(table, ["participant"], problems, what="participant id")
        cov = np.column_stack([as_numbers(table, c, problems) for c in design.covariates]) \
            if design.covariates else np.zeros((len(table), 0))
        conn = study.conn
        with write_transaction(conn):
            existing = dict(conn.execute("SELECT participant, enrol_step FROM participants").fetchall())
            known = np.array([i in existing for i in ids], dtype=bool)
            problems.rows(table.frame, known, "participant", "already enrolled")
            problems.raise_if_any()
            now = utc_now()
            step = _next_step(conn)
            batch = _new_batch(conn, "enroll", now, source=table.source, sha256=table.sha256, rows=len(table))
            n = len(table)
            control = np.zeros(n, dtype=bool)
            rand_id = None
            if control_ratio is not None:
                j = conn.execute("SELECT count(*) FROM randomisations").fetchone()[0]
                control = replay.randomise(study.seed, j, n, float(control_ratio))
                cur = conn.execute(
                    "INSERT INTO randomisations (batch, control_ratio, method, seed, spawn_key, n_control, n_adaptive)"
                    " VALUES (?, ?, ?, ?, ?, ?, ?)",
                    (batch, float(control_ratio), "permutation", str(study.seed),
                     replay.key_text((replay.ENROL_STREAM, int(j))), int(control.sum()), int(n - control.sum())))
                rand_id = cur.lastrowid
            conn.executemany(
                "INSERT INTO participants (participant, batch, enrol_step, covariates, condition, randomisation,"
                " source_row) VALUES (?, ?, ?, ?, ?, ?, ?)",
                [(ids[i], batch, step, replay.json_floats(cov[i]), "control" if control[i] else "adaptive",
                  rand_id, i + 1) for i in range(n)])
        return EnrolResult(n, step, int(control.sum()), int(n - control.sum()))


# --------------------------------------------------------------------------
# assign
# --------------------------------------------------------------------------
def _stored_assignments(conn: sqlite3.Connection, step: int) -> pd.DataFrame:
    rows = conn.execute(
        "SELECT p.participant, d.decision, d.step, d.arm, d.propensity, d.condition, d.context "
        "FROM decisions d JOIN participants p ON p.id = d.participant WHERE d.step = ? ORDER BY d.participant",
        (step,)).fetchall()
    df = pd.DataFrame([r[:6] for r in rows], columns=ASSIGNMENT_COLUMNS)
    df.attrs["context"] = [r[6] for r in rows]
    return df


def _read_context(path: str | Path, design: DesignSpec):
    table = read_table(path, required=["participant"] + list(design.features), what="context file")
    problems = Problems(table.source)
    ids = nonempty(table, "participant", problems)
    duplicates(table, ["participant"], problems, what="participant")
    ctx = np.column_stack([as_numbers(table, c, problems) for c in design.features])
    problems.raise_if_any()
    return table, ids, ctx


def _match_context(table, ids: np.ndarray, ctx: np.ndarray, due_ids: np.ndarray, due_dec: np.ndarray,
                   enrolled: set[str], step: int) -> np.ndarray:
    """Align a context file with the participants due at ``step``; every mismatch is a problem."""
    problems = Problems(table.source)
    index = pd.Index(ids)
    where = index.get_indexer(pd.Index(due_ids))
    is_due = pd.Index(due_ids).get_indexer(index) >= 0
    unknown = np.array([i not in enrolled for i in ids], dtype=bool)
    problems.rows(table.frame, unknown, "participant", "unknown participant (not enrolled)")
    problems.rows(table.frame, ~unknown & ~is_due, "participant", f"not due a decision at step {step}")
    for j in np.flatnonzero(where < 0)[:20]:
        problems.add(f"column participant: participant {format_value(due_ids[j])} is due decision "
                     f"{int(due_dec[j])} at step {step} but has no row in the context file")
    missing = int((where < 0).sum())
    if missing > 20:
        problems.add(f"column participant: {missing - 20} more due participants without a row")
    problems.raise_if_any()
    return ctx[where]


def assign(db: str | Path, *, step: int | None = None, context: str | Path | None = None) -> pd.DataFrame:
    """Assign an arm to every participant due a decision at ``step`` (default: the next step).

    Steps are consecutive assignment rounds (0, 1, 2, ...). Asking again for a
    step already assigned returns the stored assignments and draws nothing.
    A participant is due at every step from enrolment until ``horizon``
    decisions have been made (missed sessions still count as decisions).

    Parameters
    ----------
    db : path
    step : int, optional
        The step to assign or to read back. Default: the next unassigned step.
    context : path, optional
        CSV with ``participant`` and one column per design feature, one row per
        due participant. Required when the design has features (decision-time
        context must be known before assigning).

    Returns
    -------
    DataFrame
        Columns :data:`ASSIGNMENT_COLUMNS`, in enrolment order.

    Raises
    ------
    InputError
        ``step`` skips ahead, nobody is due, or ``context`` is missing or not
        allowed.
    LogError
        The context file is bad or does not match the due participants, or
        a repeated request gives context that differs from the stored one.
    """
    with open_study(db) as study:
        design, conn = study.design, study.conn
        parsed = _read_context(context, design) if context is not None and design.features else None
        if context is not None and not design.features:
            raise InputError("--context: the design has no context features; assign without --context")
        with write_transaction(conn):
            nxt = _next_step(conn)
            s = nxt if step is None else int(step)
            if s < 0:
                raise InputError(f"--step: expected a step >= 0, got {s}")
            if s < nxt:
                stored = _stored_assignments(conn, s)
                if parsed is not None:
                    _check_same_context(parsed, stored, design, s)
                stored.attrs.pop("context", None)
                stored.attrs["new"] = False
                return stored
            if s > nxt:
                raise InputError(f"--step: steps are assigned in order; the next step is {nxt}, got {s}")
            if design.features and parsed is None:
                raise InputError(f"--context: the design has context features ({', '.join(design.features)}); "
                                 f"give their decision-time values for step {s} in a CSV with columns "
                                 f"participant, {', '.join(design.features)}")
            history = replay.load_history(conn, design, study.spec, study.seed)
            limit = int(conn.execute("SELECT coalesce(max(id), 0) FROM batches").fetchone()[0]) + 1
            who = replay.due(history, s, limit)
            if len(who.participant) == 0:
                n = history.n_participants
                raise InputError(f"no participant is due a decision at step {s} ({n} enrolled; enrol "
                                 f"participants first, or every enrolled participant has finished)")
            due_ids = history.ids[who.participant]
            if parsed is not None:
                ctx = _match_context(*parsed, due_ids, who.decision, set(history.ids.tolist()), s)
            else:
                ctx = np.zeros((len(due_ids), 0))
            got = replay.derive(history, who, ctx, limit)
            now = utc_now()
            batch = _new_batch(conn, "assign", now, source=None if context is None else str(context),
                               sha256=None if parsed is None else parsed[0].sha256, rows=len(due_ids))
            if batch != limit:  # pragma: no cover - the write lock makes this impossible
                raise RuntimeError(f"batch id {batch} differs from the derived limit {limit}")
            snap = None
            if got.snapshot is not None:
                snap = conn.execute("INSERT INTO snapshots (step, policy, summary) VALUES (?, ?, ?)",
                                    (s, study.spec.name, got.snapshot)).lastrowid
            key_a, _ = replay.step_keys(s)
            conn.execute("INSERT INTO steps (step, batch, seed, spawn_key, snapshot, n, created) "
                         "VALUES (?, ?, ?, ?, ?, ?, ?)",
                         (s, batch, str(study.seed), replay.key_text(key_a[:2]), snap, len(due_ids), now))
            arms = np.asarray(design.arms, dtype=object)[got.arm]
            cond = np.where(got.control, "control", "adaptive").astype(object)
            pid = history.p_id[who.participant]
            seed = str(study.seed)
            conn.executemany(
                "INSERT INTO decisions (participant, decision, step, arm, propensity, probabilities, context, policy,"
                " condition, seed, spawn_key, snapshot, created) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                [(int(pid[i]), int(who.decision[i]), s, arms[i], float(got.propensity[i]),
                  replay.json_floats(got.probabilities[i]), replay.context_bytes(ctx[i]), got.policy[i], cond[i], seed,
                  got.spawn_key[i], snap if not got.control[i] else None, now) for i in range(len(pid))])
        out = pd.DataFrame({"participant": due_ids, "decision": who.decision.astype(np.int64),
                            "step": np.full(len(pid), s, dtype=np.int64), "arm": arms,
                            "propensity": got.propensity, "condition": cond})
        out.attrs["new"] = True
        return out


def _check_same_context(parsed, stored: pd.DataFrame, design: DesignSpec, step: int) -> None:
    table, ids, ctx = parsed
    problems = Problems(table.source)
    stored_ctx = replay.context_array(stored.attrs["context"], len(design.features))
    where = pd.Index(stored["participant"]).get_indexer(pd.Index(ids))
    problems.rows(table.frame, where < 0, "participant", f"had no decision at step {step} (already assigned)")
    hit = np.flatnonzero(where >= 0)
    for j, feature in enumerate(design.features):
        differs = np.zeros(len(ids), dtype=bool)
        differs[hit] = ctx[hit, j] != stored_ctx[where[hit], j]
        problems.rows(table.frame, differs, feature,
                      f"step {step} was already assigned with a different value of this feature")
    problems.raise_if_any()


# --------------------------------------------------------------------------
# record
# --------------------------------------------------------------------------
def record(db: str | Path, outcomes: str | Path, *, correct: bool = False) -> RecordResult:
    """Record outcomes from a CSV file.

    Columns: ``participant``, ``decision`` and the design's reward column
    (an empty reward cell means the session did not happen); optionally
    ``step`` and ``arm``, which must then match the stored decision (a guard
    against mixed-up files), and ``propensity`` and ``condition``, ignored
    (so the output of ``assign`` with a reward column added is accepted).

    A row for a decision that already has an outcome is skipped when the
    value is the same, and otherwise rejected unless ``correct`` is true,
    in which case it is stored as a new row that supersedes the old one.

    Raises
    ------
    LogError
        Any bad row rejects the whole file (nothing is written): unknown
        participant or decision, a decision not assigned yet, a duplicate row,
        a reward that is not a number or out of range (0/1 for a bernoulli
        outcome), a wrong header, an empty file, a step or arm that does not
        match, or a conflicting value without ``correct``.
    """
    with open_study(db) as study:
        design, conn = study.design, study.conn
        reward_col = design.study.reward
        table = read_table(outcomes, required=["participant", "decision", reward_col],
                           optional=["step", "arm", "propensity", "condition"], what="outcomes file")
        frame = table.frame
        problems = Problems(table.source)
        ids = nonempty(table, "participant", problems)
        dec = as_numbers(table, "decision", problems, integer=True, low=1)
        reward = as_numbers(table, reward_col, problems, allow_empty=True)
        if design.study.outcome == "bernoulli":
            problems.rows(frame, np.isfinite(reward) & (reward != 0) & (reward != 1), reward_col,
                          "expected 0 or 1 for a bernoulli outcome")
        step_given = as_numbers(table, "step", problems, integer=True, low=0) if "step" in frame else None
        if "arm" in frame:
            arm_given = frame["arm"].to_numpy(dtype=object)
            problems.rows(frame, ~np.isin(arm_given, list(design.arms)), "arm",
                          "expected one of " + ", ".join(design.arms))
        key_ok = (ids != "") & np.isfinite(dec)
        keyed = table.frame.assign(_key=np.where(key_ok, ids + "#" + np.where(key_ok, dec, 0).astype(np.int64)
                                                 .astype(str), np.arange(len(ids)).astype(str) + "#bad"))
        dup = keyed.duplicated("_key").to_numpy()
        if dup.any():
            first = pd.Series(np.arange(len(ids))).groupby(keyed["_key"].to_numpy(), sort=False).transform("min")
            for j in np.flatnonzero(dup)[:20]:
                problems.add(f"row {j + 1}, column decision: duplicate row for participant {format_value(ids[j])} "
                             f"(first on row {int(first.iat[j]) + 1}), got {format_value(frame['decision'].iat[j])}")
            if dup.sum() > 20:
                problems.add(f"column decision: {int(dup.sum()) - 20} more duplicate rows")

        with write_transaction(conn):
            # look up only the file's keys (indexed joins), not the whole history
            conn.execute("CREATE TEMP TABLE IF NOT EXISTS incoming (participant TEXT, decision INTEGER)")
            conn.execute("DELETE FROM temp.incoming")
            lookup = np.flatnonzero((ids != "") & ~dup)
            conn.executemany("INSERT INTO temp.incoming VALUES (?, ?)",
                             [(ids[j], int(dec[j]) if key_ok[j] else None) for j in lookup])
            known = conn.execute(
                "SELECT i.participant, i.decision, d.id, d.step, d.arm, l.id, l.reward, l.recorded, p.id "
                "FROM temp.incoming i LEFT JOIN participants p ON p.participant = i.participant "
                "LEFT JOIN decisions d ON d.participant = p.id AND d.decision = i.decision "
                "LEFT JOIN latest_outcomes l ON l.decision = d.id").fetchall()
            conn.execute("DELETE FROM temp.incoming")
            last = conn.execute("SELECT max(step) FROM steps").fetchone()[0]
            looked = pd.DataFrame(known, columns=["participant", "decision", "id", "step", "arm", "latest",
                                                  "latest_reward", "recorded", "pid"])
            enrolled = set(looked.loc[looked["pid"].notna(), "participant"])
            stored = looked[looked["id"].notna()].reset_index(drop=True)
            stored["_key"] = stored["participant"] + "#" + stored["decision"].astype(np.int64).astype(str)
            idx = pd.Index(stored["_key"]).get_indexer(keyed["_key"])
            idx[dup] = -1  # a repeated row is reported once, as a duplicate
            found = idx >= 0
            unknown = np.array([i != "" and i not in enrolled for i in ids], dtype=bool) & ~dup
            problems.rows(frame, unknown, "participant", "unknown participant (not enrolled)")
            made = np.zeros(len(ids), dtype=np.int64)
            not_yet = key_ok & ~dup & ~unknown & ~found
            for j in np.flatnonzero(not_yet)[:20]:
                made[j] = conn.execute("SELECT count(*) FROM decisions d JOIN participants p ON p.id = "
                                       "d.participant WHERE p.participant = ?", (ids[j],)).fetchone()[0]
                problems.add(f"row {j + 1}, column decision: decision {int(dec[j])} of participant "
                             f"{format_value(ids[j])} has not been assigned yet (decisions assigned so far: "
                             f"{made[j]}), got {format_value(frame['decision'].iat[j])}")
            if not_yet.sum() > 20:
                problems.add(f"column decision: {int(not_yet.sum()) - 20} more decisions not assigned yet")
            hit = np.flatnonzero(found)
            row = stored.iloc[idx[hit]]
            if step_given is not None:
                last_step = -1 if last is None else int(last)
                future = np.isfinite(step_given) & (step_given > last_step)
                problems.rows(frame, future, "step",
                              f"this step has not been assigned yet (last assigned step: "
                              f"{'none' if last is None else last_step})")
                wrong = np.zeros(len(ids), dtype=bool)
                wrong[hit] = np.isfinite(step_given[hit]) & (step_given[hit] != row["step"].to_numpy()) \
                    & ~future[hit]
                for j in np.flatnonzero(wrong)[:20]:
                    made_at = int(stored["step"].iat[idx[j]])
                    problems.add(f"row {j + 1}, column step: decision {int(dec[j])} of participant "
                                 f"{format_value(ids[j])} was made at step {made_at}, got "
                                 f"{format_value(frame['step'].iat[j])}")
            if "arm" in frame:
                wrong = np.zeros(len(ids), dtype=bool)
                wrong[hit] = np.isin(arm_given[hit], list(design.arms)) & (arm_given[hit] != row["arm"].to_numpy())
                for j in np.flatnonzero(wrong)[:20]:
                    problems.add(f"row {j + 1}, column arm: decision {int(dec[j])} of participant "
                                 f"{format_value(ids[j])} was assigned {format_value(stored['arm'].iat[idx[j]])}, "
                                 f"got {format_value(arm_given[j])}")
            latest = row["latest"].to_numpy(dtype=float, na_value=np.nan)
            old = row["latest_reward"].to_numpy(dtype=float, na_value=np.nan)
            new_r = reward[hit]
            has = np.isfinite(latest)
            same = has & ((old == new_r) | (np.isnan(old) & np.isnan(new_r)))
            conflict = has & ~same
            if conflict.any() and not correct:
                for j in np.flatnonzero(conflict)[:20]:
                    r = hit[j]
                    was = "empty (missed session)" if np.isnan(old[j]) else repr(float(old[j]))
                    problems.add(f"row {r + 1}, column {reward_col}: decision {int(dec[r])} of participant "
                                 f"{format_value(ids[r])} already has the outcome {was} (recorded "
                                 f"{row['recorded'].iat[j]}); pass --correct to supersede it, got "
                                 f"{format_value(frame[reward_col].iat[r])}")
                if conflict.sum() > 20:
                    problems.add(f"column {reward_col}: {int(conflict.sum()) - 20} more conflicting rows")
            problems.raise_if_any()  # file and database problems together; nothing written
            write = ~same
            n_new, n_corr = int((write & ~has).sum()), int((write & has).sum())
            if write.any():
                now = utc_now()
                batch = _new_batch(conn, "record", now, source=table.source, sha256=table.sha256,
                                   rows=int(write.sum()))
                dec_id = row["id"].to_numpy(dtype=np.int64)
                sup = [None if not h else int(x) for h, x in zip(has, np.nan_to_num(latest))]
                conn.executemany(
                    "INSERT INTO outcomes (decision, reward, batch, recorded, source, source_row, supersedes) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?)",
                    [(int(dec_id[j]), None if math.isnan(new_r[j]) else float(new_r[j]), batch, now, table.source,
                      int(hit[j]) + 1, sup[j]) for j in np.flatnonzero(write)])
        return RecordResult(n_new, n_corr, int(same.sum()))


# --------------------------------------------------------------------------
# status
# --------------------------------------------------------------------------
def status(db: str | Path) -> StudyStatus:
    """Who is due next, who is missing outcomes, decisions per arm, the latest posterior summary."""
    with open_study(db) as study, read_transaction(study.conn) as conn:
        design = study.design
        history = replay.load_history(conn, design, study.spec, study.seed)
        nxt = _next_step(conn)
        limit = int(conn.execute("SELECT coalesce(max(id), 0) FROM batches").fetchone()[0]) + 1
        who = replay.due(history, nxt, limit)
        made = np.bincount(history.d_part, minlength=history.n_participants) if history.n_participants else \
            np.zeros(0, dtype=np.int64)
        finished = int((made >= design.study.horizon).sum())
        has_outcome = np.zeros(len(history.d_id), dtype=bool)
        has_outcome[history.o_dec] = True
        miss = np.flatnonzero(~has_outcome)
        missing = pd.DataFrame({"participant": history.ids[history.d_part[miss]],
                                "decision": history.d_decision[miss], "step": history.d_step[miss]})
        missing = missing.sort_values(["step", "participant"], kind="stable").reset_index(drop=True)
        cond = np.where(history.control[history.d_part], "control", "adaptive")
        counts = (pd.DataFrame({"condition": cond, "arm": np.asarray(design.arms, dtype=object)[history.d_arm]})
                  .groupby(["condition", "arm"]).size().unstack("arm")
                  .reindex(columns=list(design.arms)).fillna(0).astype(np.int64))
        snap = conn.execute("SELECT summary FROM snapshots ORDER BY id DESC LIMIT 1").fetchone()
        enrolled = {"adaptive": int((~history.control).sum()), "control": int(history.control.sum())}
        return StudyStatus(
            policy=study.spec.name, kind=study.spec.kind, last_step=None if nxt == 0 else nxt - 1, next_step=nxt,
            enrolled=enrolled, due=history.ids[who.participant].tolist(), finished=finished,
            decisions=len(history.d_id), outcomes=int(has_outcome.sum()), missing=missing, arm_counts=counts,
            snapshot=None if snap is None else json.loads(snap[0]))


# --------------------------------------------------------------------------
# export
# --------------------------------------------------------------------------
def export(db: str | Path, out: str | Path | None = None, *, design_out: str | Path | None = None) -> pd.DataFrame:
    """The study as a StudyLog (one row per decision; the latest outcome of each).

    The table has the columns of :func:`poolbandit.log.log_columns` with the
    step, the probability table and the condition, is validated with
    :func:`poolbandit.log.validate_log`, and is written (atomically) to
    ``out`` if given. ``design_out`` receives the stored design text, so
    ``poolbandit fit LOG --design DESIGN`` reads exactly the study's design.
    """
    from ..cli._common import atomic_path
    from ..log import log_columns, validate_log, write_log

    with open_study(db) as study, read_transaction(study.conn) as conn:
        design = study.design
        rows = conn.execute(
            "SELECT p.participant, d.decision, d.arm, d.propensity, l.reward, d.policy, d.step, d.probabilities, "
            "d.context, p.covariates, d.condition FROM decisions d JOIN participants p ON p.id = d.participant "
            "LEFT JOIN latest_outcomes l ON l.decision = d.id ORDER BY p.id, d.decision").fetchall()
        text = conn.execute("SELECT text FROM design WHERE id = 1").fetchone()[0]
    if not rows:
        raise InputError(f"{db}: nothing to export yet (no decisions have been assigned)")
    k, f, q = design.n_arms, len(design.features), len(design.covariates)
    probs = replay.parse_json_floats([r[7] for r in rows], k)
    ctx = replay.context_array([r[8] for r in rows], f)
    cov = replay.parse_json_floats([r[9] for r in rows], q)
    data: dict[str, object] = {
        "participant": [r[0] for r in rows],
        "decision": np.array([r[1] for r in rows], dtype=np.int64),
        "arm": [r[2] for r in rows],
        "propensity": np.array([r[3] for r in rows], dtype=float),
        design.study.reward: np.array([np.nan if r[4] is None else r[4] for r in rows], dtype=float),
        "policy": [r[5] for r in rows],
        "step": np.array([r[6] for r in rows], dtype=np.int64),
    }
    for j, a in enumerate(design.arms):
        data[f"prob_{a}"] = probs[:, j]
    for j, name in enumerate(design.features):
        data[name] = ctx[:, j]
    for j, name in enumerate(design.covariates):
        data[name] = cov[:, j]
    data["condition"] = [r[10] for r in rows]
    df = pd.DataFrame(data)[log_columns(design, condition=True)]
    df = validate_log(df, design, source=f"{db} (export)")
    if out is not None:
        with atomic_path(out) as tmp:
            write_log(df, tmp)
    if design_out is not None:
        with atomic_path(design_out) as tmp:
            Path(tmp).write_text(text, encoding="utf-8")
    return df


# --------------------------------------------------------------------------
# verify
# --------------------------------------------------------------------------
def verify(db: str | Path) -> VerifyReport:
    """Re-derive every stored assignment and randomisation and compare them exactly.

    Works on an in-memory copy of the database (``sqlite3`` backup), so it
    sees one consistent state and holds no lock while it computes. For every
    step, in order, it recomputes who was due, each decision index, the
    probability table, the arm, the propensity, the policy name, the seed
    material and the posterior snapshot from the data committed before that
    step, and requires bit-for-bit equality. It also checks that every
    propensity is its table's entry for the chosen arm, that the design text
    matches its hash, and re-draws every enrolment randomisation.
    """
    import hashlib

    with open_study(db) as study:
        mem = sqlite3.connect(":memory:", isolation_level=None)
        study.conn.backup(mem)
        design, spec, seed = study.design, study.spec, study.seed
    try:
        return _verify(mem, design, spec, seed, hashlib)
    finally:
        mem.close()


def _verify(conn: sqlite3.Connection, design: DesignSpec, spec: PolicySpec, seed: int, hashlib) -> VerifyReport:
    bad: list[str] = []
    text, sha = conn.execute("SELECT text, sha256 FROM design WHERE id = 1").fetchone()
    if hashlib.sha256(text.encode("utf-8")).hexdigest() != sha:
        bad.append("design: the stored text does not match its sha256")
    history = replay.load_history(conn, design, spec, seed)
    full = conn.execute("SELECT id, propensity, probabilities, policy, condition, seed, spawn_key, snapshot "
                        "FROM decisions ORDER BY step, participant").fetchall()
    prop = np.array([r[1] for r in full], dtype=float)
    table = replay.parse_json_floats([r[2] for r in full], design.n_arms)
    chosen = table[np.arange(len(full)), history.d_arm] if len(full) else np.zeros(0)
    for j in np.flatnonzero(chosen != prop)[:50]:
        bad.append(f"decision {history.d_decision[j]} of {history.ids[history.d_part[j]]}: propensity "
                   f"{prop[j]!r} is not the probability table's entry {chosen[j]!r} for arm "
                   f"{design.arms[history.d_arm[j]]}")
    snaps = dict(conn.execute("SELECT id, summary FROM snapshots").fetchall())
    steps = conn.execute("SELECT step, batch, seed, spawn_key, snapshot, n FROM steps ORDER BY step").fetchall()
    for i, (s, batch, s_seed, s_key, s_snap, s_n) in enumerate(steps):
        where = f"step {s}"
        if s != i:
            bad.append(f"{where}: steps are not consecutive (expected step {i})")
        if s_seed != str(seed) or s_key != replay.key_text(replay.step_keys(s)[0][:2]):
            bad.append(f"{where}: seed material {s_seed}/{s_key} differs from the study seed's")
        rows = np.flatnonzero(history.d_step == s)
        who = replay.due(history, s, batch)
        if len(who.participant) != len(rows) or not np.array_equal(who.participant, history.d_part[rows]):
            stored_ids = set(history.ids[history.d_part[rows]].tolist())
            derived_ids = set(history.ids[who.participant].tolist())
            bad.append(f"{where}: participants due differ (only stored: {sorted(stored_ids - derived_ids)[:10]}, "
                       f"only derived: {sorted(derived_ids - stored_ids)[:10]})")
            continue
        if s_n != len(rows):
            bad.append(f"{where}: step records {s_n} decisions, found {len(rows)}")
        got = replay.derive(history, who, history.d_context[rows], batch)
        checks = [
            ("decision index", who.decision, history.d_decision[rows]),
            ("arm", got.arm, history.d_arm[rows]),
            ("propensity", got.propensity, prop[rows]),
            ("policy", got.policy, np.array([full[j][3] for j in rows], dtype=object)),
            ("condition", np.where(got.control, "control", "adaptive"),
             np.array([full[j][4] for j in rows], dtype=object)),
            ("seed", np.full(len(rows), str(seed), dtype=object), np.array([full[j][5] for j in rows], dtype=object)),
            ("spawn key", got.spawn_key, np.array([full[j][6] for j in rows], dtype=object)),
        ]
        for name, derived, stored in checks:
            differ = np.asarray(derived != stored, dtype=bool)
            for j in np.flatnonzero(differ)[:10]:
                r = rows[j]
                bad.append(f"{where}, participant {history.ids[history.d_part[r]]}, decision "
                           f"{history.d_decision[r]}: {name} stored {stored[j]!r}, re-derived {derived[j]!r}")
        tab_diff = np.any(got.probabilities != table[rows], axis=1)
        for j in np.flatnonzero(tab_diff)[:10]:
            r = rows[j]
            bad.append(f"{where}, participant {history.ids[history.d_part[r]]}, decision {history.d_decision[r]}: "
                       f"probability table stored {table[r].tolist()}, re-derived {got.probabilities[j].tolist()}")
        stored_snap = snaps.get(s_snap) if s_snap is not None else None
        if stored_snap != got.snapshot:
            bad.append(f"{where}: posterior snapshot differs from its re-derivation")
    n_rand = 0
    for rid, j_key, ratio, r_seed in conn.execute(
            "SELECT id, spawn_key, control_ratio, seed FROM randomisations ORDER BY id").fetchall():
        n_rand += 1
        members = conn.execute("SELECT condition FROM participants WHERE randomisation = ? ORDER BY source_row",
                               (rid,)).fetchall()
        index = int(j_key.split(",")[1])
        expect = replay.randomise(int(r_seed), index, len(members), ratio)
        stored = np.array([m[0] == "control" for m in members], dtype=bool)
        if r_seed != str(seed) or index != n_rand - 1:
            bad.append(f"randomisation {rid}: seed material {r_seed}/{j_key} is not the study's")
        if not np.array_equal(expect, stored):
            bad.append(f"randomisation {rid}: {int((expect != stored).sum())} conditions differ from the re-draw")
    return VerifyReport(len(steps), len(full), n_rand, bad)
