"""The analysed decisions of a StudyLog, their propensity table and the shared estimators.

Every estimator of this package is a ratio of participant sums,

.. math::

    \\hat V = \\frac{\\sum_i a_i}{\\sum_i b_i},

with ``a_i`` and ``b_i`` built from participant ``i``'s own decisions (a mean
of participant scores has ``b_i = 1``). Its standard error respects
clustering by participant: either the cluster sandwich (linearisation)
estimator

.. math::

    \\widehat{se}^2 = \\frac{N}{N - 1} \\frac{\\sum_i (a_i - \\hat V b_i)^2}{(\\sum_i b_i)^2},

or a participant-level bootstrap (participants resampled with replacement,
the whole ratio recomputed, seeded through :mod:`poolbandit._random`).

Missing rewards (missed sessions) are treated as missing completely at random
among decisions: those decisions are dropped and every participant average is
renormalised over the participant's analysed decisions.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import pandas as pd
from scipy.special import ndtri

from .._random import RngLike, as_generator
from ..errors import LogError, format_value

__all__ = ["Prepared", "prepare", "ratio_estimate", "RATIO_COLUMNS"]

#: Columns every estimate row carries.
RATIO_COLUMNS = ["estimate", "se", "lower", "upper"]

SeMethod = Literal["sandwich", "bootstrap"]


@dataclass(frozen=True)
class Prepared:
    """The analysed decisions of a log (observed reward), ready for estimation.

    Attributes
    ----------
    rows : ndarray of int (n,)
        Positions of the analysed decisions in the full log.
    participant : ndarray of int (n,)
        Participant index in ``ids``.
    ids : list of str
        Participants with at least one analysed decision, in log order.
    arm : ndarray of int (n,)
    y : ndarray (n,)
    balance : ndarray (n,)
        ``1 / m_i``: participant ``i`` has ``m_i`` analysed decisions.
    chosen : ndarray (n,) or None
        Propensity of the chosen arm used for weighting (None when the log has none).
    table : ndarray (n, K) or None
        Probability of every arm; NaN where unknown (no ``prob_`` columns), None
        when the log has no propensities.
    notes : list of str
        Plain-language notes about the data (missing rewards, forced exploration).
    """

    rows: np.ndarray
    participant: np.ndarray
    ids: list[str]
    arm: np.ndarray
    y: np.ndarray
    balance: np.ndarray
    chosen: np.ndarray | None
    table: np.ndarray | None
    n_scheduled: int
    notes: list[str] = field(default_factory=list)

    @property
    def n_participants(self) -> int:
        return len(self.ids)

    def subset(self, keep: np.ndarray) -> "Prepared":
        """The same analysis restricted to the participants flagged in ``keep`` (shape (N,))."""
        mask = np.asarray(keep, dtype=bool)[self.participant]
        new_index = np.cumsum(keep) - 1
        return Prepared(
            rows=self.rows[mask], participant=new_index[self.participant[mask]],
            ids=[p for p, k in zip(self.ids, keep) if k], arm=self.arm[mask], y=self.y[mask],
            balance=self.balance[mask], chosen=None if self.chosen is None else self.chosen[mask],
            table=None if self.table is None else self.table[mask], n_scheduled=self.n_scheduled,
            notes=list(self.notes),
        )

    def per_participant(self, values: np.ndarray) -> np.ndarray:
        """Sum of ``balance * values`` per participant: the participant average, shape (N,) or (N, K)."""
        values = np.asarray(values, dtype=float)
        out = np.zeros((self.n_participants,) + values.shape[1:])
        w = self.balance.reshape((-1,) + (1,) * (values.ndim - 1))
        np.add.at(out, self.participant, w * values)
        return out

    def per_participant_sum(self, values: np.ndarray) -> np.ndarray:
        """Plain sum of ``values`` per participant, shape (N,) or (N, K)."""
        values = np.asarray(values, dtype=float)
        out = np.zeros((self.n_participants,) + values.shape[1:])
        np.add.at(out, self.participant, values)
        return out


def prepare(log: pd.DataFrame, design) -> Prepared:
    """Select the analysed decisions of a validated log and build its propensity table.

    The propensity column may be entirely empty (a log without propensities,
    see :func:`poolbandit.analysis.read_analysis_log`); then no weighted
    estimate can be made. Decisions inside a policy's forced-exploration
    period (``explore_first`` of the policy named in the log) are weighted with
    the marginal probability ``1/K``: the package shows the arms of each
    exploration block in a uniformly random order, so every position of the
    block has every arm with probability ``1/K`` even though the conditional
    probability of an arm already shown in the block is 0.

    Raises
    ------
    LogError
        If only some propensities are missing.
    """
    reward = design.study.reward
    k = design.n_arms
    n_all = len(log)
    prop_all = pd.to_numeric(log["propensity"], errors="coerce").to_numpy(dtype=float) \
        if "propensity" in log.columns else np.full(n_all, np.nan)
    known = np.isfinite(prop_all)
    if known.any() and not known.all():
        bad = np.flatnonzero(~known)[:10]
        raise LogError([f"row {j + 1}, column propensity: expected a probability in (0, 1] (or an entirely "
                        f"empty column for a log without propensities), got \"\"" for j in bad])
    y_all = log[reward].to_numpy(dtype=float)
    obs = np.isfinite(y_all)
    notes: list[str] = []
    n_missing = int((~obs).sum())
    if n_missing:
        notes.append(f"{n_missing} of {n_all} scheduled decisions have no reward (missed sessions); they are "
                     "treated as missing completely at random among decisions: dropped, and every participant "
                     "average is taken over that participant's remaining decisions.")
    rows = np.flatnonzero(obs)
    part = log["participant"].to_numpy()[rows]
    ids = list(pd.unique(log["participant"]))
    code = pd.Index(ids).get_indexer(part)
    present = np.bincount(code, minlength=len(ids)) > 0
    if not present.all():
        notes.append(f"{int((~present).sum())} participant(s) have no observed reward and are left out.")
    ids = [p for p, ok in zip(ids, present) if ok]
    code = pd.Index(ids).get_indexer(part)
    arm = pd.Index(design.arms).get_indexer(log["arm"].to_numpy()[rows]).astype(np.int64)
    counts = np.bincount(code, minlength=len(ids))
    balance = 1.0 / counts[code]

    chosen = table = None
    if known.all():
        pcols = [f"prob_{a}" for a in design.arms]
        if all(c in log.columns for c in pcols) and np.isfinite(log[pcols].to_numpy(dtype=float)).all():
            table = log[pcols].to_numpy(dtype=float)[rows].copy()
        else:
            table = np.full((len(rows), k), np.nan)
            p = prop_all[rows]
            table[p >= 1.0] = 0.0
            notes.append("the log has no probability table (prob_<arm> columns): only the chosen arm's "
                         "propensity is known, so positivity can be checked only where it is 1.")
            table[np.arange(len(rows)), arm] = p
        chosen = table[np.arange(len(rows)), arm].copy()
        forced = _forced_rows(log, design)[rows]
        if forced.any():
            table[forced] = 1.0 / k
            chosen[forced] = 1.0 / k
            notes.append(f"{int(forced.sum())} analysed decisions lie in a forced-exploration period; they are "
                         f"weighted with the marginal probability 1/K = {1 / k:.4g} of a randomly ordered "
                         "exploration block.")
    return Prepared(rows=rows, participant=code.astype(np.int64), ids=ids, arm=arm, y=y_all[rows],
                    balance=balance, chosen=chosen, table=table, n_scheduled=n_all, notes=notes)


def _forced_rows(log: pd.DataFrame, design) -> np.ndarray:
    """Rows inside the forced-exploration period of the policy named in the log."""
    forced = np.zeros(len(log), dtype=bool)
    decision = log["decision"].to_numpy()
    for name, spec in design.policies.items():
        m = spec.explore_first
        if m > 0:
            forced |= (log["policy"].to_numpy() == name) & (decision <= m)
    return forced


def ratio_estimate(num: np.ndarray, den: np.ndarray | None = None, *, level: float = 0.95,
                   se: SeMethod = "sandwich", n_boot: int = 1000, rng: RngLike = None) -> dict[str, float]:
    """Estimate ``sum(num) / sum(den)`` over participants with a clustered standard error.

    Parameters
    ----------
    num, den : ndarray of shape (N,)
        Participant sums; ``den`` defaults to ones (a mean of participant scores).
    level : float, default=0.95
        Coverage of the normal interval ``estimate +- z * se``.
    se : {"sandwich", "bootstrap"}, default="sandwich"
        Cluster sandwich (linearisation) or participant bootstrap.
    n_boot : int, default=1000
        Bootstrap resamples.
    rng : Generator, int or None
        Seeds the bootstrap.

    Returns
    -------
    dict
        ``estimate``, ``se``, ``lower``, ``upper``.
    """
    num = np.asarray(num, dtype=float)
    den = np.ones_like(num) if den is None else np.asarray(den, dtype=float)
    n = len(num)
    total = den.sum()
    if n == 0 or total <= 0:
        return dict.fromkeys(RATIO_COLUMNS, np.nan)
    est = num.sum() / total
    if n < 2:
        s = np.nan
    elif se == "bootstrap":
        g = as_generator(rng)
        counts = g.multinomial(n, np.full(n, 1.0 / n), size=n_boot).astype(float)
        d = counts @ den
        with np.errstate(invalid="ignore", divide="ignore"):
            boot = (counts @ num) / d
        boot = boot[np.isfinite(boot)]
        s = float(np.std(boot, ddof=1)) if len(boot) > 1 else np.nan
    elif se == "sandwich":
        resid = num - est * den
        s = float(np.sqrt(n / (n - 1) * np.sum(resid**2)) / total)
    else:
        raise ValueError(f"se must be \"sandwich\" or \"bootstrap\", got {format_value(se)}")
    z = float(ndtri(0.5 + level / 2))
    return {"estimate": float(est), "se": s, "lower": float(est - z * s), "upper": float(est + z * s)}
