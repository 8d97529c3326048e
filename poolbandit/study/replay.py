"""Derive a step's assignments from the store, the same way every time.

The assignment of step ``s`` is a function of three things only: the design
(with the policy named at ``init``), the data committed before the step's
batch, and the study seed. :func:`derive` rebuilds the policy from scratch
each time::

    policy = make_policy(spec, design)
    policy.start(covariates of the adaptive roster)   # in enrolment order
    for t in past steps, in order:
        policy.note_assigned(adaptive decisions of step t)
        policy.observe(their outcomes as recorded before step s)  # latest version
    policy.assign(batch of step s, rng of step s)

with the step's generators from ``SeedSequence(seed, spawn_key=(0, s, 0))``
(adaptive) and ``(0, s, 1)`` (uniform control). ``study assign`` calls it
inside the write transaction; ``study verify`` calls it again for every
stored step with the data visible at that step (rows whose ``batch`` is
smaller than the step's) and compares bit for bit. Outcomes recorded late
are seen by the first step assigned after they were recorded, not before.

Enrolment randomisation between the adaptive and the control condition uses
``SeedSequence(seed, spawn_key=(1, j))`` for the ``j``-th randomisation: a
uniformly random permutation of the file's participants, the first
``round(R n)`` of which go to control (:func:`randomise`).
"""

from __future__ import annotations

import json
import math
import sqlite3
from dataclasses import dataclass

import numpy as np

from .._random import as_generator
from ..policies._probability import draw_arms
from ..policies.base import Batch
from ..policies.registry import make_policy
from ..spec import DesignSpec, PolicySpec

__all__ = ["History", "Due", "Derived", "load_history", "due", "derive", "randomise", "step_keys",
           "control_name", "json_floats", "parse_json_floats", "context_bytes", "context_array",
           "latest_rewards", "posterior_snapshot", "key_text"]

ASSIGN_STREAM = 0
ENROL_STREAM = 1


def step_keys(step: int) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """Spawn keys of the adaptive and the control generator of ``step``."""
    return (ASSIGN_STREAM, int(step), 0), (ASSIGN_STREAM, int(step), 1)


def _generator(seed: int, key: tuple[int, ...]) -> np.random.Generator:
    return as_generator(np.random.SeedSequence(seed, spawn_key=key))


def key_text(key: tuple[int, ...]) -> str:
    return ",".join(str(k) for k in key)


def control_name(design: DesignSpec) -> str:
    """Policy name logged for control decisions: the design's first ``random`` policy, else ``control``."""
    for name, spec in design.policies.items():
        if spec.kind == "random":
            return name
    return "control"


def json_floats(row: np.ndarray) -> str:
    """A JSON list of floats that reads back bit for bit (shortest round-trip repr)."""
    return "[" + ",".join(repr(float(x)) for x in row) + "]"


def parse_json_floats(texts: list[str], width: int) -> np.ndarray:
    """Parse many JSON lists of floats at once into an (n, width) array."""
    if not texts:
        return np.zeros((0, width))
    return np.asarray(json.loads("[" + ",".join(texts) + "]"), dtype=float).reshape(len(texts), width)


def context_bytes(row: np.ndarray) -> bytes:
    """A context row as stored: float64 little-endian bytes."""
    return np.ascontiguousarray(row, dtype="<f8").tobytes()


def context_array(blobs, width: int) -> np.ndarray:
    """Stored context rows back as an (n, width) float array (bit for bit)."""
    return np.frombuffer(b"".join(blobs), dtype="<f8").astype(float).reshape(len(blobs), width)


def _arm_codes(arms, design: DesignSpec) -> np.ndarray:
    import pandas as pd

    codes = pd.Index(list(design.arms)).get_indexer(np.asarray(arms, dtype=object))
    if len(codes) and codes.min() < 0:
        bad = np.asarray(arms, dtype=object)[codes < 0][0]
        raise ValueError(f"the store holds an arm {bad!r} that is not in the design")
    return codes.astype(np.int64)


def randomise(seed: int, index: int, n: int, ratio: float) -> np.ndarray:
    """Control flags for ``n`` participants (file order): exactly ``round(ratio n)`` controls.

    ``round`` is half up. The permutation comes from
    ``SeedSequence(seed, spawn_key=(1, index))``.
    """
    n_control = int(math.floor(ratio * n + 0.5))
    perm = _generator(seed, (ENROL_STREAM, int(index))).permutation(n)
    control = np.zeros(n, dtype=bool)
    control[perm[:n_control]] = True
    return control


# --------------------------------------------------------------------------
# The store as arrays
# --------------------------------------------------------------------------
@dataclass
class History:
    """Everything in the store that an assignment depends on, as arrays.

    Participants are in enrolment order (row id); decisions in (step,
    participant) order; outcomes in recording order (row id).
    """

    design: DesignSpec
    spec: PolicySpec
    seed: int
    # participants
    p_id: np.ndarray
    ids: np.ndarray
    p_batch: np.ndarray
    enrol_step: np.ndarray
    control: np.ndarray
    covariates: np.ndarray
    # decisions
    d_id: np.ndarray
    d_part: np.ndarray       # index into the participant arrays
    d_decision: np.ndarray
    d_step: np.ndarray
    d_arm: np.ndarray        # arm index
    d_context: np.ndarray    # (n, F)
    # outcomes
    o_id: np.ndarray
    o_dec: np.ndarray        # index into the decision arrays
    o_reward: np.ndarray
    o_batch: np.ndarray
    # steps
    step_batch: dict[int, int]

    @property
    def n_participants(self) -> int:
        return len(self.p_id)


def load_history(conn: sqlite3.Connection, design: DesignSpec, spec: PolicySpec, seed: int) -> History:
    """Read the store into a :class:`History` (inside the caller's transaction)."""
    q, f = len(design.covariates), len(design.features)
    rows = conn.execute("SELECT id, participant, batch, enrol_step, covariates, condition "
                        "FROM participants ORDER BY id").fetchall()
    p_id = np.array([r[0] for r in rows], dtype=np.int64)
    ids = np.array([r[1] for r in rows], dtype=object)
    p_batch = np.array([r[2] for r in rows], dtype=np.int64)
    enrol = np.array([r[3] for r in rows], dtype=np.int64)
    control = np.array([r[5] == "control" for r in rows], dtype=bool)
    cov = parse_json_floats([r[4] for r in rows], q)
    rows = conn.execute("SELECT id, participant, decision, step, arm, context FROM decisions "
                        "ORDER BY step, participant").fetchall()
    m = len(rows)
    cols = list(zip(*rows)) if rows else [()] * 6
    d_id = np.fromiter(cols[0], dtype=np.int64, count=m)
    d_part = np.searchsorted(p_id, np.fromiter(cols[1], dtype=np.int64, count=m))
    d_decision = np.fromiter(cols[2], dtype=np.int64, count=m)
    d_step = np.fromiter(cols[3], dtype=np.int64, count=m)
    d_arm = _arm_codes(cols[4], design)
    d_ctx = context_array(cols[5], f)
    rows = conn.execute("SELECT id, decision, coalesce(reward, 'nan'), batch FROM outcomes ORDER BY id").fetchall()
    m = len(rows)
    cols = list(zip(*rows)) if rows else [()] * 4
    o_id = np.fromiter(cols[0], dtype=np.int64, count=m)
    order = np.argsort(d_id, kind="stable")
    o_dec = order[np.searchsorted(d_id[order], np.fromiter(cols[1], dtype=np.int64, count=m))]
    o_reward = np.fromiter((float(x) for x in cols[2]), dtype=float, count=m)
    o_batch = np.fromiter(cols[3], dtype=np.int64, count=m)
    step_batch = dict(conn.execute("SELECT step, batch FROM steps").fetchall())
    return History(design, spec, seed, p_id, ids, p_batch, enrol, control, cov, d_id, d_part, d_decision,
                   d_step, d_arm, d_ctx, o_id, o_dec, o_reward, o_batch, step_batch)


def latest_rewards(history: History, batch_limit: int) -> np.ndarray:
    """The reward of every decision as recorded before ``batch_limit`` (latest version; NaN if none)."""
    out = np.full(len(history.d_id), np.nan)
    vis = np.flatnonzero(history.o_batch < batch_limit)
    if len(vis):
        rev = history.o_dec[vis][::-1]
        dec, first = np.unique(rev, return_index=True)
        out[dec] = history.o_reward[vis][::-1][first]
    return out


# --------------------------------------------------------------------------
# Who is due, and what they get
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class Due:
    """The participants due a decision at a step (indices into the participant arrays)."""

    step: int
    participant: np.ndarray
    decision: np.ndarray


def due(history: History, step: int, batch_limit: int) -> Due:
    """Participants enrolled before ``batch_limit``, started by ``step``, with decisions left."""
    n = history.n_participants
    before = history.d_step < step
    made = np.bincount(history.d_part[before], minlength=n) if n else np.zeros(0, dtype=np.int64)
    ok = (history.p_batch < batch_limit) & (history.enrol_step <= step) & (made < history.design.study.horizon)
    who = np.flatnonzero(ok)
    return Due(step, who, made[who] + 1)


@dataclass(frozen=True)
class Derived:
    """A step's assignments, aligned with :class:`Due` (participant order)."""

    arm: np.ndarray
    propensity: np.ndarray
    probabilities: np.ndarray
    control: np.ndarray
    policy: np.ndarray
    spawn_key: np.ndarray
    snapshot: str | None


def derive(history: History, who: Due, context: np.ndarray, batch_limit: int) -> Derived:
    """The assignments of step ``who.step`` (see the module docstring).

    ``context`` is (n_due, F), aligned with ``who.participant``.
    """
    design, step = history.design, who.step
    k = design.n_arms
    visible = history.p_batch < batch_limit
    adaptive = np.flatnonzero(visible & ~history.control)
    pos = np.full(history.n_participants, -1, dtype=np.int64)
    pos[adaptive] = np.arange(len(adaptive))
    n = len(who.participant)
    arm = np.zeros(n, dtype=np.int64)
    prop = np.zeros(n)
    table = np.zeros((n, k))
    is_control = history.control[who.participant]
    key_a, key_c = step_keys(step)
    snapshot = None

    rows_a = np.flatnonzero(~is_control)
    if len(rows_a):
        policy = make_policy(history.spec, design)
        policy.start(history.covariates[adaptive])
        reward = latest_rewards(history, batch_limit)
        past = np.flatnonzero((history.d_step < step) & (pos[history.d_part] >= 0))
        steps = history.d_step[past]
        cuts = np.flatnonzero(np.diff(steps)) + 1
        for chunk in np.split(past, cuts) if len(past) else []:
            p = pos[history.d_part[chunk]]
            a = history.d_arm[chunk]
            policy.note_assigned(p, a, history.d_decision[chunk])
            policy.observe(p, a, history.d_context[chunk], reward[chunk])
        part = who.participant[rows_a]
        batch = Batch(pos[part], who.decision[rows_a], np.asarray(context, dtype=float)[rows_a], step)
        got = policy.assign(batch, _generator(history.seed, key_a))
        arm[rows_a], prop[rows_a], table[rows_a] = got.arm, got.propensity, got.probabilities
        snapshot = posterior_snapshot(policy)
    rows_c = np.flatnonzero(is_control)
    if len(rows_c):
        uniform = np.full((len(rows_c), k), 1.0 / k)
        arm[rows_c], prop[rows_c] = draw_arms(uniform, _generator(history.seed, key_c))
        table[rows_c] = uniform
    names = np.where(is_control, control_name(design), history.spec.name).astype(object)
    keys = np.where(is_control, key_text(key_c), key_text(key_a)).astype(object)
    return Derived(arm, prop, table, is_control, names, keys, snapshot)


def posterior_snapshot(policy) -> str | None:
    """A JSON summary of a pooled policy's posterior at this step, or None for other kinds.

    A policy's own ``posterior_summary()`` (a mapping or a DataFrame) is used
    when it has one. Otherwise, from the policies' public state:

    * ``pooled-thompson``: the population parameters (``beta``, ``tau``,
      ``sigma``) of the last Gibbs sweep the step's probabilities used,
      labelled by coefficient, and the number of observations;
    * ``complete-pooling-thompson`` (gaussian): the posterior mean and sd of
      every shared coefficient.

    The JSON is canonical (sorted keys, round-trip floats) so that
    ``verify`` can compare it exactly.
    """
    fn = getattr(policy, "posterior_summary", None)
    summary = None
    if fn is not None:
        summary = fn()
        if hasattr(summary, "reset_index"):
            summary = summary.reset_index().to_dict(orient="list")
    elif policy.kind == "pooled-thompson" and getattr(policy, "sampler", None) is not None:
        st = policy.sampler.state
        summary = {"source": "last Gibbs sweep of the step", "coef": _coef_labels(policy, len(st.beta)),
                   "beta": st.beta, "tau": st.tau, "sigma": st.sigma,
                   "observations": int(len(policy.model_data().y))}
    elif policy.kind == "complete-pooling-thompson" and policy.design.study.outcome == "gaussian":
        mean, cov = policy.posterior()
        summary = {"source": "conjugate posterior", "coef": _coef_labels(policy, len(mean)), "mean": mean,
                   "sd": np.sqrt(np.diag(cov))}
    if summary is None:
        return None
    return json.dumps(summary, sort_keys=True, default=_jsonable)


def _coef_labels(policy, n_coef: int) -> list[str]:
    from ..models.design_matrix import coef_names

    design = policy.design
    features = design.features if n_coef == design.n_arms * (1 + len(design.features)) else ()
    return coef_names(design.arms, features)


def _jsonable(x):
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, np.ndarray):
        return x.tolist()
    raise TypeError(f"cannot store {type(x).__name__} in a posterior snapshot")
