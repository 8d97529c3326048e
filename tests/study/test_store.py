"""The study store: schema, migrations, append-only rows, idempotent and reproducible assignments.

Outside references: the SQLite documentation (``PRAGMA user_version``,
``journal_mode = WAL``, ``foreign_keys``, ``RAISE(ABORT)`` in triggers), the
NumPy documentation of :class:`numpy.random.SeedSequence` (a child's
``spawn_key`` is its parent's key with the child's index appended), and the
UCB1 index of Auer, Cesa-Bianchi and Fischer (2002), recomputed by hand in
the test. Everything is seeded through the design's ``study.seed``.
"""

from __future__ import annotations

import math
import sqlite3

import numpy as np
import pandas as pd
import pytest

from poolbandit import parse_design, read_log
from poolbandit.errors import InputError
from poolbandit.study import SCHEMA_VERSION, StoreError, assign, enroll, export, init_study, record, status, verify
from poolbandit.study import store

from .helpers import DESIGN_BERNOULLI, DESIGN_GAUSSIAN, cli_in_process, db_state, write

UCB_ALONE = """
[study]
arms = ["drill", "story", "roleplay"]
horizon = 6
outcome = "gaussian"
reward = "log_minutes"
seed = 11

[policies.ucb]
kind = "ucb1"
c = 1.0
"""


def _study(tmp_path, text=DESIGN_BERNOULLI, policy="ucb", n=4, ratio=None):
    design = write(tmp_path / "design.toml", text)
    db = tmp_path / "study.sqlite"
    init_study(design, db, policy=policy)
    d = parse_design(text)
    rows = ["participant," + ",".join(d.covariates) if d.covariates else "participant"]
    for i in range(n):
        rows.append(f"p{i + 1:02d}" + (f",{(i - n / 2) / n}" if d.covariates else ""))
    enroll(db, write(tmp_path / "wave.csv", "\n".join(rows) + "\n"), control_ratio=ratio)
    return db, d


def _outcomes(tmp_path, name, table: pd.DataFrame, reward_col: str, values) -> str:
    df = table[["participant", "decision"]].copy()
    df[reward_col] = values
    path = tmp_path / name
    df.to_csv(path, index=False)
    return str(path)


def test_schema_version_wal_and_foreign_keys(tmp_path):
    """SQLite docs: the schema version lives in PRAGMA user_version; WAL persists in the file header."""
    db, _ = _study(tmp_path)
    conn = store.connect(db)
    try:
        assert store.schema_version(conn) == SCHEMA_VERSION == len(store.MIGRATIONS)
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert conn.execute("PRAGMA foreign_keys").fetchone()[0] == 1
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type IN ('table', 'view')")}
        assert {"design", "batches", "participants", "steps", "decisions", "outcomes", "snapshots",
                "randomisations", "latest_outcomes"} <= tables
        # a decision for a participant row that does not exist violates the foreign key
        with pytest.raises(sqlite3.IntegrityError):
            with store.write_transaction(conn):
                conn.execute("INSERT INTO steps (step, batch, seed, spawn_key, n, created) VALUES (0, 1, '1', '0,0', 0, 'x')")
                conn.execute("INSERT INTO decisions (participant, decision, step, arm, propensity, probabilities, "
                             "context, policy, condition, seed, spawn_key, created) VALUES "
                             "(999, 1, 0, 'drill', 0.5, '[]', '[]', 'x', 'adaptive', '1', '0,0,0', 'x')")
    finally:
        conn.close()


def test_rows_are_append_only(tmp_path):
    """Triggers with RAISE(ABORT) (SQLite docs) refuse UPDATE and DELETE on every table."""
    db, d = _study(tmp_path)
    table = assign(db)
    record(db, _outcomes(tmp_path, "o.csv", table, d.study.reward, [1, 0, 1, 0]))
    before = db_state(db)
    conn = store.connect(db)
    try:
        for sql in ("UPDATE outcomes SET reward = 0", "DELETE FROM outcomes", "UPDATE decisions SET arm = 'story'",
                    "DELETE FROM participants", "UPDATE design SET seed = '1'"):
            with pytest.raises(sqlite3.IntegrityError, match="append-only"):
                with store.write_transaction(conn):
                    conn.execute(sql)
        # one assignment per participant-decision, enforced by the schema itself
        with pytest.raises(sqlite3.IntegrityError, match="UNIQUE"):
            with store.write_transaction(conn):
                conn.execute("INSERT INTO decisions (participant, decision, step, arm, propensity, probabilities, "
                             "context, policy, condition, seed, spawn_key, created) SELECT participant, decision, "
                             "step, arm, propensity, probabilities, context, policy, condition, seed, spawn_key, "
                             "created FROM decisions LIMIT 1")
    finally:
        conn.close()
    assert db_state(db) == before


def test_migration_from_version_1(tmp_path):
    """An older database is migrated on open in one transaction; its rows are kept."""
    db, d = _study(tmp_path)
    table = assign(db)
    conn = sqlite3.connect(str(db), isolation_level=None)
    conn.execute("DROP VIEW latest_outcomes")  # what version 1 looked like
    conn.execute("PRAGMA user_version = 1")
    conn.close()
    conn = store.connect(db)
    try:
        assert store.schema_version(conn) == SCHEMA_VERSION
        assert conn.execute("SELECT count(*) FROM latest_outcomes").fetchone()[0] == 0
    finally:
        conn.close()
    assert record(db, _outcomes(tmp_path, "o.csv", table, d.study.reward, [1, 1, 0, 0])).new == 4
    assert verify(db).ok


def test_newer_or_foreign_files_are_refused(tmp_path, capsys):
    db, _ = _study(tmp_path)
    conn = sqlite3.connect(str(db), isolation_level=None)
    conn.execute("PRAGMA user_version = 99")
    conn.close()
    status_, _, err = cli_in_process(capsys, "status", "--db", db)
    assert status_ == 2 and "schema version 99" in err and "newer" in err
    junk = write(tmp_path / "junk.sqlite", "this is not a database, just text " * 50)
    status_, _, err = cli_in_process(capsys, "status", "--db", junk)
    assert status_ == 2 and "not a study database" in err
    missing = tmp_path / "missing.sqlite"
    status_, _, err = cli_in_process(capsys, "assign", "--db", missing)
    assert status_ == 2 and "no study database" in err and not missing.exists()


def test_init_refuses_overwrite_and_simulation_only_kinds(tmp_path, capsys):
    design = write(tmp_path / "design.toml", DESIGN_GAUSSIAN)
    db = tmp_path / "s.sqlite"
    status_, _, err = cli_in_process(capsys, "init", design, "--db", db, "--policy", "oracle")
    assert status_ == 2 and "simulated truth" in err and not db.exists()
    status_, _, err = cli_in_process(capsys, "init", design, "--db", db)
    assert status_ == 2 and "--policy" in err  # two live adaptive policies: the user must choose
    status_, out, _ = cli_in_process(capsys, "init", design, "--db", db, "--policy", "ucb")
    assert status_ == 0 and "seed 20261201" in out
    before = db_state(db)
    status_, _, err = cli_in_process(capsys, "init", design, "--db", db, "--policy", "ucb")
    assert status_ == 2 and "refusing to overwrite" in err
    assert db_state(db) == before
    conn = store.connect(db)
    text, sha = conn.execute("SELECT text, sha256 FROM design").fetchone()
    conn.close()
    assert text == DESIGN_GAUSSIAN and sha == parse_design(DESIGN_GAUSSIAN).sha256


def test_assign_twice_returns_the_stored_assignments(tmp_path, capsys):
    db, _ = _study(tmp_path, n=6)
    first = assign(db)
    before = db_state(db)
    again = assign(db, step=0)
    pd.testing.assert_frame_equal(first, again)
    status_, out, err = cli_in_process(capsys, "assign", "--db", db, "--step", "0")
    assert status_ == 0 and "nothing drawn" in err
    assert pd.read_csv(pd.io.common.StringIO(out))["arm"].tolist() == first["arm"].tolist()
    assert db_state(db) == before  # nothing drawn, nothing written
    with pytest.raises(InputError, match="next step is 1"):
        assign(db, step=3)


def test_same_seed_same_assignments_other_seed_differs(tmp_path):
    """Reproducibility: the assignments are a function of design, data and seed only."""
    runs = []
    for name, seed in (("a", 424242), ("b", 424242), ("c", 7)):
        folder = tmp_path / name
        folder.mkdir()
        db, d = _study(folder, DESIGN_BERNOULLI.replace("seed = 424242", f"seed = {seed}"), policy="solo",
                       n=12, ratio=0.5)
        arms = []
        for step in range(3):
            t = assign(db)
            arms += t["arm"].tolist() + t["condition"].tolist()
            record(db, _outcomes(folder, f"o{step}.csv", t, d.study.reward, (np.arange(len(t)) + step) % 2))
        runs.append(arms)
    assert runs[0] == runs[1]
    assert runs[0] != runs[2]


def test_step_generators_follow_seedsequence_spawn_keys(tmp_path):
    """NumPy docs: a SeedSequence child's spawn_key is the parent's key plus its index.

    Control participants get arm ``argmax(cumsum(1/K) > u)`` for one uniform
    ``u`` each from the generator of ``SeedSequence(seed).spawn(1)[0]
    .spawn(s + 1)[s].spawn(2)[1]``; recompute that here without poolbandit.
    """
    db, d = _study(tmp_path, n=10, ratio=1.0, policy="ucb")
    for step in range(2):
        t = assign(db)
        assert (t["condition"] == "control").all()
        child = np.random.SeedSequence(424242).spawn(1)[0].spawn(step + 1)[step].spawn(2)[1]
        u = np.random.default_rng(child).random(len(t))
        expected = np.array(d.arms)[np.floor(u * 3).astype(int)]
        assert t["arm"].tolist() == expected.tolist()
        assert (t["propensity"] == 1 / 3).all()
        record(db, _outcomes(tmp_path, f"o{step}.csv", t, d.study.reward, np.ones(len(t))))
    conn = store.connect(db)
    keys = [r[0] for r in conn.execute("SELECT DISTINCT spawn_key FROM decisions ORDER BY step")]
    conn.close()
    assert keys == ["0,0,1", "0,1,1"]


def _ucb1(n, total, c=1.0):
    """Auer et al. (2002): mean_j + c sqrt(2 ln n / n_j); untried arms first."""
    with np.errstate(divide="ignore", invalid="ignore"):
        idx = total / n + c * np.sqrt(2 * math.log(max(n.sum(), 1)) / n)
    return np.where(n > 0, idx, np.inf)


def test_replay_sees_exactly_the_outcomes_recorded_before_each_step(tmp_path):
    """UCB1 by hand on one participant, with one outcome recorded late and one corrected.

    The arm of a step must be the argmax of the UCB1 index over the outcomes
    recorded before that step (Auer, Cesa-Bianchi and Fischer 2002), not
    those recorded later; ``verify`` must agree after a correction.
    """
    design = write(tmp_path / "design.toml", UCB_ALONE)
    db = tmp_path / "s.sqlite"
    init_study(design, db)
    enroll(db, write(tmp_path / "w.csv", "participant\nann\n"))
    rewards = {"drill": 1.0, "story": 2.0, "roleplay": 0.5}
    n, total = np.zeros(3), np.zeros(3)
    arms = ["drill", "story", "roleplay"]
    late = None
    for step in range(6):
        t = assign(db)
        arm = t["arm"].iat[0]
        index = _ucb1(n, total)
        best = np.flatnonzero(index == index.max())
        assert arm in [arms[j] for j in best]
        assert t["propensity"].iat[0] == 1 / len(best)
        value = rewards[arm] + 0.1 * step
        if step == 3:
            late = (step, arm, value)  # recorded only after step 4 was assigned
        else:
            record(db, write(tmp_path / f"o{step}.csv", f"participant,decision,log_minutes\nann,{step + 1},{value}\n"))
            n[arms.index(arm)] += 1
            total[arms.index(arm)] += value
        if step == 4:
            s, a, v = late
            record(db, write(tmp_path / "late.csv", f"participant,decision,log_minutes\nann,{s + 1},{v}\n"))
            n[arms.index(a)] += 1
            total[arms.index(a)] += v
    record(db, write(tmp_path / "fix.csv", "participant,decision,log_minutes\nann,1,9.5\n"), correct=True)
    report = verify(db)
    assert report.ok, report.mismatches
    assert report.steps == 6 and report.decisions == 6
    log = export(db)
    assert log["log_minutes"].iat[0] == 9.5
    conn = store.connect(db)
    rows = conn.execute("SELECT o.reward, o.supersedes FROM outcomes o JOIN decisions d ON d.id = o.decision "
                        "WHERE d.decision = 1 ORDER BY o.id").fetchall()
    conn.close()
    assert rows[0][1] is None and rows[1][0] == 9.5 and rows[1][1] is not None  # both kept, the new one supersedes


def test_verify_catches_a_tampered_propensity(tmp_path, capsys):
    db, d = _study(tmp_path, policy="solo", n=5)
    t = assign(db)
    record(db, _outcomes(tmp_path, "o.csv", t, d.study.reward, [1, 0, 1, 1, 0]))
    assign(db)
    assert verify(db).ok
    conn = sqlite3.connect(str(db), isolation_level=None)
    conn.execute("DROP TRIGGER decisions_no_update")
    conn.execute("UPDATE decisions SET propensity = 0.5, probabilities = '[0.5,0.25,0.25]' WHERE id = "
                 "(SELECT max(id) FROM decisions)")
    conn.close()
    report = verify(db)
    assert not report.ok
    assert any("propensity" in m for m in report.mismatches)
    assert any("probability table" in m for m in report.mismatches)
    status_, _, err = cli_in_process(capsys, "verify", "--db", db)
    assert status_ == 1 and "FAILED" in err


def test_control_randomisation_is_logged_with_its_ratio(tmp_path):
    db, d = _study(tmp_path, n=20, ratio=0.25, policy="solo")
    conn = store.connect(db)
    ratio, method, n_c, n_a = conn.execute(
        "SELECT control_ratio, method, n_control, n_adaptive FROM randomisations").fetchone()
    conds = [r[0] for r in conn.execute("SELECT condition FROM participants ORDER BY id")]
    conn.close()
    assert (ratio, method, n_c, n_a) == (0.25, "permutation", 5, 15)
    assert conds.count("control") == 5
    t = assign(db)
    ctrl = t[t["condition"] == "control"]
    assert (ctrl["propensity"] == 1 / 3).all() and len(ctrl) == 5
    log = export(db)
    assert set(log.loc[log["condition"] == "control", "policy"]) == {"control"}
    assert set(log.loc[log["condition"] == "adaptive", "policy"]) == {"solo"}
    assert verify(db).randomisations == 1


def test_status_and_export(tmp_path):
    db, d = _study(tmp_path, n=4)
    t = assign(db)
    record(db, _outcomes(tmp_path, "o.csv", t.iloc[:3], d.study.reward, [1, 0, 1]))
    s = status(db)
    assert s.next_step == 1 and s.last_step == 0 and len(s.due) == 4
    assert s.missing[["participant", "decision"]].values.tolist() == [[t["participant"].iat[3], 1]]
    assert int(s.arm_counts.to_numpy().sum()) == 4
    out = tmp_path / "log.csv"
    df = export(db, out, design_out=tmp_path / "design-out.toml")
    back = read_log(out, parse_design((tmp_path / "design-out.toml").read_text()))
    pd.testing.assert_frame_equal(df, back)
    assert np.isnan(back["met_goal"].iat[-1])


def test_nobody_due_is_an_input_error(tmp_path):
    design = write(tmp_path / "design.toml", DESIGN_BERNOULLI)
    db = tmp_path / "s.sqlite"
    init_study(design, db, policy="ucb")
    before = db_state(db)
    with pytest.raises(InputError, match="no participant is due"):
        assign(db)
    assert db_state(db) == before
    with pytest.raises(StoreError):
        store.connect(tmp_path / "nothing.sqlite")
