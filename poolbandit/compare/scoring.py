"""Scores of simulated studies and their Monte Carlo summaries.

Two kinds of work live here:

* per replicate: :class:`ClassificationScorer`, the hook that judges how well
  a finished simulated study lets us classify its participants (Brier score,
  share labelled, accuracy of the labels);
* across replicates: means with Monte Carlo standard errors
  (:func:`summarise_scores`), paired differences against a reference policy
  (:func:`paired_differences`), regret curves with bands
  (:func:`curve_bands`), and the regret-against-classification trade-off
  (:func:`pareto_mask`, :func:`tradeoff_table`).

Because every policy runs on the same simulated populations and environment
streams (common random numbers), the difference between two policies is
computed replicate by replicate; its standard error is
``sd(d_r) / sqrt(R)``, which is smaller than the unpaired
``sqrt(se_a^2 + se_b^2)`` whenever the two policies' scores are positively
correlated across replicates.

References
----------
.. [1] Brier, G. W. (1950). Verification of forecasts expressed in terms of
   probability. *Monthly Weather Review* 78(1), 1-3.
   doi:10.1175/1520-0493(1950)078<0001:VOFEIT>2.0.CO;2
.. [2] Law, A. M. (2015). *Simulation Modeling and Analysis*, 5th ed.,
   section 11.2 (common random numbers).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Literal, Protocol

import numpy as np
import pandas as pd

if TYPE_CHECKING:  # pragma: no cover
    from ..simulation.runner import SimulationResult

__all__ = [
    "METRIC_DIRECTIONS",
    "BASE_METRICS",
    "CLASSIFICATION_METRICS",
    "Scorer",
    "ClassificationScorer",
    "summarise_scores",
    "paired_differences",
    "curve_bands",
    "pareto_mask",
    "tradeoff_table",
]

#: Scores of every replicate (see :mod:`poolbandit.simulation.metrics`).
BASE_METRICS = ["regret", "mean_expected_reward", "mean_reward", "best_arm_share", "best_arm_identified"]
#: Scores of :class:`ClassificationScorer`.
CLASSIFICATION_METRICS = ["brier", "label_share", "accuracy"]
#: +1 where larger is better, -1 where smaller is better.
METRIC_DIRECTIONS: dict[str, int] = {
    "regret": -1, "mean_expected_reward": 1, "mean_reward": 1, "best_arm_share": 1, "best_arm_identified": 1,
    "gain": 1, "brier": -1, "label_share": 1, "accuracy": 1,
}


# --------------------------------------------------------------------------
# Per-replicate scorers
# --------------------------------------------------------------------------
class Scorer(Protocol):
    """What a per-replicate scorer looks like.

    A scorer is a picklable object (it travels to worker processes) called
    once per policy and replicate with the finished simulated study and a
    generator of its own; it returns a dict of float scores named in
    ``columns``.
    """

    columns: tuple[str, ...]

    def __call__(self, result: SimulationResult, rng: np.random.Generator) -> dict[str, float]: ...


class ClassificationScorer:
    """Judge how well a finished simulated study classifies its participants.

    For every participant the scorer needs posterior draws of the arm
    effects at the reference context:

    * a policy with its own posterior (unpooled and pooled Thompson
      sampling) provides them through ``effect_draws(ids, draws, rng)``;
    * for any other policy the log is analysed with ``fit``: ``"unpooled"``
      (each participant's own conjugate posterior,
      :func:`poolbandit.classify.unpooled_effects`; cheap), ``"fast"`` (the
      hierarchical model fitted with the fast engine; thorough but costly)
      or ``"none"`` (the classification scores are NaN).

    Categories follow :mod:`poolbandit.classify`: each draw is assigned to
    the first matching rule (else "undetermined"); a participant's
    probability of a category is the share of draws assigned to it, and the
    participant is labelled with the most probable category when that
    probability reaches ``threshold``. The truth is the same assignment
    applied to the participant's true expected rewards
    (:func:`poolbandit.classify.true_effects`).

    Parameters
    ----------
    draws : int, default=100
        Posterior draws per participant (Monte Carlo error of a category
        probability at most ``0.5 / sqrt(draws)`` for independent draws).
    threshold : float, default=0.8
        Probability a category needs before a participant is labelled (the
        default of :func:`poolbandit.classify.classify`).
    fit : {"unpooled", "fast", "none"}, default="unpooled"
        The analysis of logs from policies without a posterior of their own.
    fit_draws : int, default=200
        Draws kept from the fast engine (``fit="fast"``).

    Notes
    -----
    Called with a :class:`~poolbandit.simulation.SimulationResult` and a
    generator, it returns ``brier`` (mean over participants of the Brier
    score [1]_ ``sum_c (p_ic - y_ic)^2`` over the exclusive categories and
    "undetermined", as in :func:`poolbandit.classify.brier_decomposition`),
    ``label_share`` (share of participants labelled) and ``accuracy`` (share
    of labelled participants whose label is their true category; NaN when
    none is labelled).

    References
    ----------
    .. [1] Brier, G. W. (1950). Verification of forecasts expressed in terms
       of probability. *Monthly Weather Review* 78(1), 1-3.
    """

    columns = tuple(CLASSIFICATION_METRICS)

    def __init__(self, *, draws: int = 100, threshold: float = 0.8,
                 fit: Literal["unpooled", "fast", "none"] = "unpooled", fit_draws: int = 200):
        if fit not in ("unpooled", "fast", "none"):
            raise ValueError(f"fit must be 'unpooled', 'fast' or 'none', got {fit!r}")
        self.draws = int(draws)
        self.threshold = float(threshold)
        self.fit = fit
        self.fit_draws = int(fit_draws)

    def __call__(self, result: SimulationResult, rng: np.random.Generator) -> dict[str, float]:
        design = result.population.design
        nan = {c: float("nan") for c in self.columns}
        if not design.categories:
            return nan
        effect = self.effect_draws(result, rng)
        if effect is None:
            return nan
        from ..classify import true_effects

        return self.score(effect, true_effects(result.population), design.categories)

    # -- parts --------------------------------------------------------------
    def effect_draws(self, result: SimulationResult, rng: np.random.Generator):
        """Posterior draws of arm effects (chain, draw, participant, arm), or None when there are none."""
        pop = result.population
        design = pop.design
        policy = result.policy
        if hasattr(policy, "effect_draws"):
            return policy.effect_draws(list(pop.ids), self.draws, rng)
        if self.fit == "unpooled":
            from ..classify import unpooled_effects

            return unpooled_effects(result.log, design, draws=self.draws, rng=rng)
        if self.fit == "fast":
            return _fast_fit_effects(result, self.fit_draws, rng)
        return None

    def score(self, effect, truth, categories) -> dict[str, float]:
        """Brier score, share labelled and accuracy from draws and true effects (participant, arm)."""
        from ..classify import category_indicators, exclusive_codes

        effect = effect.transpose("chain", "draw", "participant", "arm")
        ids = [str(p) for p in effect["participant"].to_numpy()]
        truth = truth.transpose("participant", "arm").sel(participant=ids, arm=effect["arm"].to_numpy())
        n_cat = len(categories)
        codes = exclusive_codes(category_indicators(effect, categories)).to_numpy()  # (chain, draw, N)
        codes = codes.reshape(-1, codes.shape[-1])
        n = codes.shape[1]
        prob = np.zeros((n, n_cat + 1))
        for c in range(n_cat + 1):
            prob[:, c] = (codes == c).mean(axis=0)
        true_code = exclusive_codes(category_indicators(truth, categories)).to_numpy()  # (N,)
        y = np.zeros_like(prob)
        y[np.arange(n), true_code] = 1.0
        brier = float(np.mean(np.sum((prob - y) ** 2, axis=1)))
        top = np.argmax(prob[:, :n_cat], axis=1)
        labelled = prob[np.arange(n), top] >= self.threshold
        correct = top == true_code
        accuracy = float(correct[labelled].mean()) if labelled.any() else float("nan")
        return {"brier": brier, "label_share": float(labelled.mean()), "accuracy": accuracy}

    def __repr__(self) -> str:
        return (f"ClassificationScorer(draws={self.draws}, threshold={self.threshold}, fit={self.fit!r}, "
                f"fit_draws={self.fit_draws})")


def _fast_fit_effects(result: SimulationResult, draws: int, rng: np.random.Generator):
    """Arm effects from the hierarchical model (the design's population model) fitted to the log with the fast
    engine (one short chain)."""
    from ..models.data import ModelData
    from ..models.effects import arm_effects
    from ..models.gibbs import sample_fast
    from ..models.mixture import sample_mixture

    design = result.population.design
    data = ModelData.from_log(result.log, design, participants=list(result.population.ids))
    sampler = sample_mixture if design.priors.population == "mixture" else sample_fast
    idata = sampler(data, design.priors, chains=1, draws=draws, tune=max(50, draws // 2), rng=rng)
    scale = "probability" if design.study.outcome == "bernoulli" else "linear"
    return arm_effects(idata, design.arms, design.features, scale=scale)


# --------------------------------------------------------------------------
# Across replicates
# --------------------------------------------------------------------------
def summarise_scores(rows: pd.DataFrame, metrics: list[str], *, by: str = "policy") -> pd.DataFrame:
    """Mean and Monte Carlo standard error of each score across replicates.

    Parameters
    ----------
    rows : DataFrame
        One row per (``by``, replicate) with the score columns.
    metrics : list of str
        Score columns to summarise (missing ones are skipped).

    Returns
    -------
    DataFrame
        One row per value of ``by`` (in order of first appearance) with
        ``<score>``, ``<score>_se`` (``sd / sqrt(n)``, NaN values ignored) and
        ``replicates``.
    """
    cols = [c for c in metrics if c in rows.columns]
    g = rows.groupby(by, sort=False)[cols]
    mean = g.mean()
    se = g.std(ddof=1) / np.sqrt(g.count())
    out = pd.concat([mean, se.add_suffix("_se")], axis=1)
    out = out[[c for name in cols for c in (name, f"{name}_se")]]
    out["replicates"] = rows.groupby(by, sort=False).size().astype(int)
    return out.reset_index()


def paired_differences(rows: pd.DataFrame, reference: str, metrics: list[str], *, by: str = "policy",
                       z: float = 1.959964) -> pd.DataFrame:
    """Paired differences of each policy against ``reference``, replicate by replicate.

    Returns
    -------
    DataFrame
        One row per (policy, metric) for every policy other than the
        reference: ``difference`` (mean of policy minus reference),
        ``se`` (paired: ``sd(d_r)/sqrt(R)``), ``se_unpaired``
        (``sqrt(se_policy^2 + se_reference^2)``, what independent runs would
        give), ``lower`` and ``upper`` (``difference -+ z se``), ``z_score``
        and ``replicates``.
    """
    wide = {m: rows.pivot(index="replicate", columns=by, values=m) for m in metrics if m in rows.columns}
    out = []
    names = list(pd.unique(rows[by]))
    for name in names:
        if name == reference:
            continue
        for m, table in wide.items():
            d = (table[name] - table[reference]).dropna()
            n = len(d)
            if n == 0:
                continue
            se = float(d.std(ddof=1) / np.sqrt(n)) if n > 1 else float("nan")
            a, b = table[name].dropna(), table[reference].dropna()
            se_u = float(np.sqrt(a.var(ddof=1) / len(a) + b.var(ddof=1) / len(b))) if min(len(a), len(b)) > 1 \
                else float("nan")
            diff = float(d.mean())
            out.append({by: name, "reference": reference, "metric": m, "difference": diff, "se": se,
                        "se_unpaired": se_u, "lower": diff - z * se, "upper": diff + z * se,
                        "z_score": diff / se if se > 0 else float("nan"), "replicates": n})
    cols = [by, "reference", "metric", "difference", "se", "se_unpaired", "lower", "upper", "z_score", "replicates"]
    return pd.DataFrame(out, columns=cols)


def curve_bands(curves: np.ndarray, labels: list[str], *, z: float = 1.959964) -> pd.DataFrame:
    """Mean cumulative regret curves with bands.

    Parameters
    ----------
    curves : ndarray, shape (R, V, H)
        Per replicate, per policy, the mean cumulative regret per participant
        after each decision index.
    labels : list of str
        The V policy labels.

    Returns
    -------
    DataFrame
        ``policy, decision, cumulative_regret, se, lower, upper, q10, q90``:
        the mean over replicates, its Monte Carlo SE, the band ``mean -+ z se``
        and the 10% and 90% quantiles across replicates (the spread a single
        study would see).
    """
    r, v, h = curves.shape
    mean = curves.mean(axis=0)
    se = curves.std(axis=0, ddof=1) / np.sqrt(r) if r > 1 else np.full((v, h), np.nan)
    q10, q90 = np.quantile(curves, [0.1, 0.9], axis=0)
    return pd.DataFrame({
        "policy": np.repeat(labels, h),
        "decision": np.tile(np.arange(1, h + 1), v),
        "cumulative_regret": mean.reshape(-1),
        "se": se.reshape(-1),
        "lower": (mean - z * se).reshape(-1),
        "upper": (mean + z * se).reshape(-1),
        "q10": q10.reshape(-1),
        "q90": q90.reshape(-1),
    })


def pareto_mask(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Which points are non-dominated when both ``x`` and ``y`` are to be minimised.

    A point is dominated when another is no worse on both and strictly
    better on one. NaN points are never on the front.
    """
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y)
    no_worse = (x[None, :] <= x[:, None]) & (y[None, :] <= y[:, None])
    better = (x[None, :] < x[:, None]) | (y[None, :] < y[:, None])
    dominated = (no_worse & better & ok[None, :]).any(axis=1)
    return ok & ~dominated


def tradeoff_table(summary: pd.DataFrame, *, weight: float = 0.5, quality: str = "brier") -> pd.DataFrame:
    """Regret against classification quality: the non-dominated designs and a weighted pick.

    Parameters
    ----------
    summary : DataFrame
        One row per candidate (``policy`` or sweep point label in ``policy``)
        with ``regret`` and the quality column (and their ``_se``).
    weight : float in [0, 1], default=0.5
        Weight of regret; ``1 - weight`` goes to classification quality.
        Both objectives are rescaled to [0, 1] over the candidates first
        (0 = best candidate, 1 = worst), so the weight does not depend on
        their units.
    quality : str, default="brier"
        The classification score (``brier``: smaller is better;
        ``label_share`` or ``accuracy``: larger is better).

    Returns
    -------
    DataFrame
        The input columns plus ``pareto`` (bool), ``score`` (weighted,
        smaller is better; NaN when a score is missing) and ``chosen``
        (bool, the candidate with the smallest score; by regret alone when
        no candidate has a classification score).
    """
    if not 0.0 <= weight <= 1.0:
        raise ValueError(f"weight must lie in [0, 1], got {weight!r}")
    out = summary.copy()
    regret = out["regret"].to_numpy(dtype=float)
    q = out[quality].to_numpy(dtype=float) if quality in out else np.full(len(out), np.nan)
    q_loss = q if METRIC_DIRECTIONS.get(quality, -1) < 0 else -q
    out["pareto"] = pareto_mask(regret, q_loss)
    if np.isfinite(q_loss).any():
        score = weight * _unit(regret) + (1 - weight) * _unit(q_loss)
    else:
        score = _unit(regret)
    out["score"] = score
    chosen = np.zeros(len(out), dtype=bool)
    if np.isfinite(score).any():
        chosen[int(np.nanargmin(score))] = True
    out["chosen"] = chosen
    return out


def _unit(x: np.ndarray) -> np.ndarray:
    lo, hi = np.nanmin(x), np.nanmax(x)
    if not np.isfinite(lo) or hi - lo <= 0:
        return np.where(np.isfinite(x), 0.0, np.nan)
    return (x - lo) / (hi - lo)
