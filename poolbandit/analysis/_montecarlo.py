"""Monte Carlo checks of the analysis estimators against the simulated truth (tests and benchmarks).

:func:`replicate_studies` runs ``R`` independent studies of ``size``
participants. For per-participant policies it runs them as one simulation of
``R * size`` participants split into groups. This is exact
for policies that treat every participant alone (random, unpooled Thompson,
UCB1, the greedy rules with ``pool = "person"``), whose decisions for one
participant never depend on another's data, and for designs with one
enrolment wave; a pooled policy gets one simulation per replicate.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .._random import RngLike, spawn
from ..simulation import simulate
from ._prepare import Prepared, prepare

__all__ = ["Replicate", "replicate_studies", "summarise_replicates"]


@dataclass(frozen=True)
class Replicate:
    """One simulated study with the true values of its estimands.

    Attributes
    ----------
    log : DataFrame
    arm_truth : ndarray (K,)
        True arm values (participant-balanced, over analysed decisions).
    expected : ndarray (n, K)
        True expected reward of every arm at every row of ``log``.
    prepared : Prepared
        The analysed decisions of ``log``.
    """

    log: pd.DataFrame
    arm_truth: np.ndarray
    expected: np.ndarray
    prepared: Prepared

    def policy_truth(self, design, table: np.ndarray) -> float:
        """True value of a target policy given as an (n, K) table over the rows of ``log``."""
        prep = self.prepared
        v = np.sum(table[prep.rows] * self.expected[prep.rows], axis=1)
        return float(prep.per_participant(v).mean())

    def oracle_table(self) -> np.ndarray:
        """The true best arm in every decision's context (ties split evenly)."""
        from ..policies._probability import argmax_ties

        return argmax_ties(self.expected)


#: Policy kinds that decide for each participant from that participant's data alone.
_PER_PARTICIPANT = {"random", "thompson", "ucb1", "epsilon-greedy", "epsilon-decreasing"}


def replicate_studies(design, policy: str, replicates: int, size: int, rng: RngLike = None, *,
                      progress: bool = False) -> list[Replicate]:
    """``replicates`` independent simulated studies of ``size`` participants each.

    Per-participant policies on a one-wave design are batched into one
    simulation (see the module docstring); any other policy (pooled ones) is
    simulated once per replicate, each with a seed spawned from ``rng``.
    """
    if design.policy(policy).kind in _PER_PARTICIPANT and design.population.waves == 1:
        res = simulate(design, policy, rng, size=replicates * size)
        return _split(design, res, size, replicates)
    out = []
    gens = spawn(rng, replicates)
    if progress:
        from tqdm import tqdm

        gens = tqdm(gens, desc=f"simulating {policy}", leave=False)
    for g in gens:
        out += _split(design, simulate(design, policy, g, size=size), size, 1)
    return out


def _split(design, res, size: int, replicates: int) -> list[Replicate]:
    log = res.log
    pop = res.population
    code = pd.Index(pop.ids).get_indexer(log["participant"])
    ctx = log[list(design.features)].to_numpy(dtype=float) if design.features else np.zeros((len(log), 0))
    expected = pop.expected(code, ctx)
    rep = code // size
    out = []
    for r in range(replicates):
        rows = np.flatnonzero(rep == r)
        sub = log.iloc[rows].reset_index(drop=True)
        prep = prepare(sub, design)
        truth = prep.per_participant(expected[rows][prep.rows]).mean(axis=0)
        out.append(Replicate(sub, truth, expected[rows], prep))
    return out


def summarise_replicates(table: pd.DataFrame, *, by: list[str]) -> pd.DataFrame:
    """Bias, its Monte Carlo standard error, sd, mean se and coverage of estimates against the truth.

    ``table`` has one row per replicate and estimate with columns ``estimate``,
    ``se``, ``lower``, ``upper``, ``truth`` and the ``by`` columns.
    """
    t = table.assign(error=table["estimate"] - table["truth"],
                     covered=((table["lower"] <= table["truth"]) & (table["truth"] <= table["upper"])).astype(float))
    g = t.groupby(by, sort=False)
    out = pd.DataFrame({
        "bias": g["error"].mean(),
        "bias_mcse": g["error"].std(ddof=1) / np.sqrt(g.size()),
        "sd": g["error"].std(ddof=1),
        "mean_se": g["se"].mean(),
        "coverage": g["covered"].mean(),
        "replicates": g.size(),
    })
    return out.reset_index()
