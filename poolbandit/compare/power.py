"""Power of the two-group study: an adaptive condition against a random control.

Participants are randomised (half and half; with an odd number the control
gets the extra one) to the adaptive condition, where one policy of the
design assigns their arms and learns only from their own group, or to the
control, where arms are assigned uniformly at random. At the end each
participant's outcome is their mean observed reward, and the two groups are
compared with Welch's two-sample t-test (``scipy.stats.ttest_ind`` with
``equal_var=False``) at level ``alpha``.

The power for a study of ``n`` participants is estimated as the share of
simulated studies that reject, with its binomial Monte Carlo standard error;
the expected difference in mean reward (adaptive minus control) comes with
its Monte Carlo standard error and with the central 95% range of the
estimates a single study of that size would produce.

When the effect is fixed and the allocation does not adapt, this power
agrees with the closed form of the two-sample t-test (as computed by
``statsmodels.stats.power.TTestIndPower``); an adaptive allocation makes
participants' outcomes depend on the policy's learning, which the closed
form cannot capture, hence the simulation.

References
----------
.. [1] Welch, B. L. (1947). The generalization of "Student's" problem when
   several different population variances are involved. *Biometrika* 34,
   28-35. doi:10.1093/biomet/34.1-2.28
.. [2] Cohen, J. (1988). *Statistical Power Analysis for the Behavioral
   Sciences*, 2nd ed., chapter 2 (the t-test for means).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..errors import InputError
from .engine import child_seed

__all__ = ["PowerJob", "run_power_study", "power_items", "check_sizes", "summarise_power", "subset"]


@dataclass(frozen=True)
class PowerJob:
    """What every simulated two-group study shares.

    Attributes
    ----------
    design : DesignSpec
        In :func:`~poolbandit.compare.engine.portable` form.
    adaptive : PolicySpec
        The policy of the adaptive condition.
    control : PolicySpec
        The control condition's policy (uniform random).
    alpha : float
        Two-sided level of the test.
    """

    design: Any
    adaptive: Any
    control: Any
    alpha: float = 0.05


def subset(population, streams, index: np.ndarray):
    """The participants at ``index`` (roster positions) of a population and its streams."""
    from ..simulation.population import Population, Streams

    index = np.asarray(index, dtype=np.int64)
    pop = Population(population.design, [population.ids[i] for i in index], population.coef[index],
                     population.covariates[index], population.types[index], population.enrol_step[index])
    st = Streams(streams.noise[index], streams.attend[index], streams.feature[index], streams.n_decisions[index])
    return pop, st


def _participant_means(log: pd.DataFrame, reward: str) -> np.ndarray:
    y = log.groupby("participant", sort=True)[reward].mean().to_numpy(dtype=float)
    return y[np.isfinite(y)]


def run_power_study(job: PowerJob, item: tuple[int, int, np.random.SeedSequence]) -> dict[str, Any]:
    """Simulate one two-group study of ``n`` participants and test it.

    ``item`` is ``(n, replicate, seq)``; ``seq`` gives the population
    (``child_seed(seq, 0)``), its environment streams (1), the randomisation
    to conditions (2) and the two policies' own randomness (3 and 4).

    Returns
    -------
    dict
        ``size, replicate, n_adaptive, n_control, adaptive_mean, control_mean,
        difference, statistic, p_value, reject``.
    """
    from scipy import stats

    from ..simulation import draw_population, draw_streams, run_policy

    n, r, seq = item
    design = job.design
    gen = [np.random.default_rng(child_seed(seq, j)) for j in range(5)]
    population = draw_population(design, gen[0], size=n)
    streams = draw_streams(design, n, gen[1])
    order = gen[2].permutation(n)
    n_adaptive = n // 2
    groups = {"adaptive": np.sort(order[:n_adaptive]), "control": np.sort(order[n_adaptive:])}
    reward = design.study.reward
    means = {}
    for (name, index), spec, g in zip(groups.items(), (job.adaptive, job.control), gen[3:]):
        pop, st = subset(population, streams, index)
        means[name] = _participant_means(run_policy(design, spec, pop, st, g).log, reward)
    a, c = means["adaptive"], means["control"]
    if len(a) >= 2 and len(c) >= 2:
        test = stats.ttest_ind(a, c, equal_var=False)
        statistic, p = float(test.statistic), float(test.pvalue)
    else:  # too few participants with any observed reward
        statistic, p = float("nan"), float("nan")
    return {"size": int(n), "replicate": int(r), "n_adaptive": len(a), "n_control": len(c),
            "adaptive_mean": float(np.mean(a)) if len(a) else float("nan"),
            "control_mean": float(np.mean(c)) if len(c) else float("nan"),
            "difference": float(np.mean(a) - np.mean(c)) if len(a) and len(c) else float("nan"),
            "statistic": statistic, "p_value": p, "reject": bool(np.isfinite(p) and p < job.alpha)}


def power_items(root: np.random.SeedSequence, sizes: Sequence[int], replicates: int) -> list[tuple]:
    """Work units ``(n, r, seq)`` for every size and replicate (``seq = child_seed(root, r, 3, n)``)."""
    return [(int(n), r, child_seed(root, r, 3, int(n))) for n in sizes for r in range(replicates)]


def check_sizes(sizes: Sequence[Any]) -> list[int]:
    """Validate study sizes for power (integers >= 4, so each group has 2 participants)."""
    out = []
    for s in sizes:
        if isinstance(s, bool) or not isinstance(s, (int, np.integer)) or s < 4:
            raise InputError(f"--power-sizes: expected integers >= 4 (participants in both groups together), "
                             f"got {s!r}")
        out.append(int(s))
    if not out:
        raise InputError("--power-sizes: expected at least one size")
    return sorted(dict.fromkeys(out))


def summarise_power(rows: pd.DataFrame, *, alpha: float = 0.05) -> pd.DataFrame:
    """Power and expected difference per study size.

    Returns
    -------
    DataFrame
        ``size, replicates, power, power_se`` (binomial,
        ``sqrt(p (1 - p) / R)``), ``difference`` (mean over simulated studies,
        adaptive minus control), ``difference_se`` (its Monte Carlo SE),
        ``difference_low`` and ``difference_high`` (2.5% and 97.5%
        quantiles of the estimates: the range one study would see) and
        ``alpha``.
    """
    out = []
    for n, g in rows.groupby("size", sort=True):
        r = len(g)
        p = float(g["reject"].mean())
        d = g["difference"].to_numpy(dtype=float)
        d = d[np.isfinite(d)]
        out.append({
            "size": int(n), "replicates": r, "power": p, "power_se": float(np.sqrt(p * (1 - p) / r)),
            "difference": float(d.mean()) if len(d) else float("nan"),
            "difference_se": float(d.std(ddof=1) / np.sqrt(len(d))) if len(d) > 1 else float("nan"),
            "difference_low": float(np.quantile(d, 0.025)) if len(d) else float("nan"),
            "difference_high": float(np.quantile(d, 0.975)) if len(d) else float("nan"),
            "alpha": alpha,
        })
    return pd.DataFrame(out)
