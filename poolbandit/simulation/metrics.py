"""Regret and related scores of simulated studies, with Monte Carlo standard errors.

Per participant: cumulative expected regret (sum over decisions of the best
arm's expected reward minus the chosen arm's, in that decision's context),
mean expected and mean observed reward, share of decisions on the best arm,
and best-arm identification at the end (the arm the policy would exploit at
the reference context equals the true best there). Across replicates, each
score's replicate means are averaged and their standard error is
``sd / sqrt(R)``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .runner import SimulationResult

__all__ = ["participant_metrics", "replicate_metrics", "summarise", "regret_curve", "METRICS"]

#: Score columns of :func:`replicate_metrics`, in report order.
METRICS = ["regret", "mean_expected_reward", "mean_reward", "best_arm_share", "best_arm_identified"]


def participant_metrics(result: SimulationResult) -> pd.DataFrame:
    """One row per participant with the scores of :data:`METRICS`."""
    log = result.log
    reward = result.population.design.study.reward
    gap = log["best_expected_reward"] - log["expected_reward"]
    g = log.assign(_gap=gap, _best=(gap <= 1e-12).astype(float)).groupby("participant", sort=True)
    out = pd.DataFrame({
        "regret": g["_gap"].sum(),
        "mean_expected_reward": g["expected_reward"].mean(),
        "mean_reward": g[reward].mean(),
        "best_arm_share": g["_best"].mean(),
        "decisions": g["decision"].size(),
    })
    pop = result.population
    truth = pop.expected(np.arange(pop.size), np.zeros((pop.size, len(pop.design.features))))
    best = truth.max(axis=1)
    identified = truth[np.arange(pop.size), result.final_arm] >= best - 1e-12
    ident = pd.Series(identified.astype(float), index=pop.ids)
    out["best_arm_identified"] = ident.reindex(out.index).to_numpy()
    out.index.name = "participant"
    return out.reset_index()


def replicate_metrics(result: SimulationResult) -> dict[str, float]:
    """Participant-averaged scores of one simulated study (regret is per participant)."""
    m = participant_metrics(result)
    return {name: float(m[name].mean()) for name in METRICS}


def summarise(rows: pd.DataFrame, *, by: str = "policy") -> pd.DataFrame:
    """Mean and Monte Carlo standard error of each score across replicates.

    Parameters
    ----------
    rows : DataFrame
        One row per (policy, replicate) with the columns of :data:`METRICS`.

    Returns
    -------
    DataFrame
        One row per policy with ``<score>`` and ``<score>_se`` columns and ``replicates``.
    """
    cols = [c for c in METRICS if c in rows.columns]
    g = rows.groupby(by, sort=False)[cols]
    mean = g.mean()
    se = g.std(ddof=1) / np.sqrt(g.count())
    out = pd.concat([mean, se.add_suffix("_se")], axis=1)
    out = out[[c for name in cols for c in (name, f"{name}_se")]]
    out["replicates"] = g.size()
    return out.reset_index()


def regret_curve(result: SimulationResult) -> pd.DataFrame:
    """Mean cumulative regret per participant by decision index (decision, cumulative_regret)."""
    log = result.log
    gap = (log["best_expected_reward"] - log["expected_reward"]).to_numpy()
    table = pd.DataFrame({"participant": log["participant"], "decision": log["decision"], "gap": gap})
    wide = table.pivot(index="participant", columns="decision", values="gap").fillna(0.0)
    curve = wide.cumsum(axis=1).mean(axis=0)
    return pd.DataFrame({"decision": curve.index.astype(int), "cumulative_regret": curve.to_numpy()})
