"""Calibration of category probabilities and effect intervals, in simulation.

When the truth is known (a simulated population), the same rules applied to
the true arm effects give every participant's true category. The
classification is then scored by

* the Brier score [1]_ of the exclusive category probabilities,
  ``BS = (1/N) sum_i sum_c (p_ic - o_ic)^2`` (``o`` the one-hot true
  category, the remainder ``"undetermined"`` included), with Murphy's
  decomposition [2]_ ``BS = REL - RES + UNC`` computed category by category
  on binned probabilities and summed over categories (binning continuous
  probabilities adds the within-bin terms of [3]_, reported as
  ``within_bin`` so that the parts add up exactly);
* a reliability table: in each probability bin, the mean forecast against the
  observed frequency;
* the coverage of the effect and contrast HDIs (share of participant-arm
  pairs whose true effect lies inside);
* the share of participants labelled and the accuracy of those labels.

Scores pool over replicates with :meth:`Calibration.combine`.

References
----------
.. [1] Brier, G. W. (1950). Verification of forecasts expressed in terms of
   probability. *Monthly Weather Review* 78, 1-3.
   doi:10.1175/1520-0493(1950)078<0001:VOFEIT>2.0.CO;2
.. [2] Murphy, A. H. (1973). A new vector partition of the probability
   score. *Journal of Applied Meteorology* 12, 595-600.
   doi:10.1175/1520-0450(1973)012<0595:ANVPOT>2.0.CO;2
.. [3] Stephenson, D. B., Coelho, C. A. S. and Jolliffe, I. T. (2008). Two
   extra components in the Brier score decomposition. *Weather and
   Forecasting* 23, 752-757. doi:10.1175/2007WAF2006116.1
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
import xarray as xr

from ..models.effects import context_vector
from .rules import UNDETERMINED, category_indicators, contrast_draws, exclusive_codes, rule_contrasts

__all__ = ["Calibration", "calibrate", "true_effects", "true_categories", "brier_decomposition",
           "reliability_table"]


def true_effects(population, *, context: Mapping[str, float] | None = None) -> xr.DataArray:
    """True arm effects of a simulated population in ``context``: dims (participant, arm).

    On the reward scale: the expected reward (``logistic`` of the linear
    predictor for a bernoulli outcome), as in
    :meth:`~poolbandit.simulation.Population.truth_table`.
    """
    design = population.design
    c = context_vector(design.features, context)
    n = population.size
    values = population.expected(np.arange(n), np.broadcast_to(c, (n, len(c))))
    return xr.DataArray(values, dims=("participant", "arm"),
                        coords={"participant": list(population.ids), "arm": list(design.arms)}, name="truth")


def true_categories(truth: xr.DataArray, categories) -> pd.DataFrame:
    """Apply the rules to true effects (participant, arm).

    Returns
    -------
    DataFrame
        ``participant``, ``category`` (exclusive: first matching rule, else
        ``"undetermined"``) and one boolean column per rule.
    """
    ind = category_indicators(truth, categories).transpose("participant", "category")
    codes = exclusive_codes(ind).to_numpy()
    names = [c.name for c in categories] + [UNDETERMINED]
    out = pd.DataFrame({"participant": [str(p) for p in truth["participant"].to_numpy()],
                        "category": np.asarray(names, dtype=object)[codes]})
    for j, c in enumerate(categories):
        out[c.name] = ind.to_numpy()[:, j]
    return out


def _bin_index(p: np.ndarray, bins: int) -> np.ndarray:
    return np.clip(np.floor(p * bins).astype(np.int64), 0, bins - 1)


def brier_decomposition(probability, outcome, *, bins: int = 10) -> dict[str, float]:
    """Brier score and Murphy's decomposition on binned forecasts.

    Parameters
    ----------
    probability : array-like of shape (n,) or (n, C)
        Forecast probabilities (rows of a categorical forecast sum to 1).
    outcome : array-like of the same shape
        0/1 outcomes (one-hot rows for a categorical forecast).
    bins : int, default=10
        Equal-width probability bins on [0, 1] (the last bin is closed).

    Returns
    -------
    dict
        ``brier`` (mean over rows of the sum over categories), ``reliability``,
        ``resolution``, ``uncertainty`` and ``within_bin``, each summed over
        categories, with ``brier = reliability - resolution + uncertainty +
        within_bin``. ``within_bin`` is 0 when all forecasts in a bin are equal
        (Murphy's exact partition); ``n`` is the number of rows.
        ``reliability_chance`` is the reliability term a perfectly calibrated
        forecaster is expected to show with these forecasts and this many
        rows (outcomes drawn as Bernoulli(p)):
        ``sum_c (1/n) sum_bins sum_{i in bin} p_ic (1 - p_ic) / n_bin``; with few
        participants it is far from 0, so compare ``reliability`` with it.
    """
    p = np.asarray(probability, dtype=float)
    o = np.asarray(outcome, dtype=float)
    if p.shape != o.shape:
        raise ValueError(f"probability and outcome shapes differ: {p.shape} vs {o.shape}")
    if p.ndim == 1:
        p, o = p[:, None], o[:, None]
    n = len(p)
    if n == 0:
        raise ValueError("no forecasts to score")
    brier = float(np.sum((p - o) ** 2) / n)
    rel = res = unc = chance = 0.0
    for c in range(p.shape[1]):
        k = _bin_index(p[:, c], bins)
        count = np.bincount(k, minlength=bins)
        has = count > 0
        f_bar = np.bincount(k, weights=p[:, c], minlength=bins)[has] / count[has]
        o_bar = np.bincount(k, weights=o[:, c], minlength=bins)[has] / count[has]
        base = o[:, c].mean()
        rel += float(np.sum(count[has] * (f_bar - o_bar) ** 2) / n)
        res += float(np.sum(count[has] * (o_bar - base) ** 2) / n)
        unc += float(base * (1 - base))
        spread = np.bincount(k, weights=p[:, c] * (1 - p[:, c]), minlength=bins)[has]
        chance += float(np.sum(spread / count[has]) / n)
    return {"brier": brier, "reliability": rel, "resolution": res, "uncertainty": unc,
            "within_bin": brier - (rel - res + unc), "reliability_chance": chance, "n": n}


def reliability_table(probability, outcome, *, bins: int = 10) -> pd.DataFrame:
    """Forecast against observed frequency in equal-width bins (all forecasts pooled).

    Returns
    -------
    DataFrame
        ``bin``, ``low``, ``high``, ``n``, ``mean_probability``, ``observed``
        and ``observed_se`` (binomial, ``sqrt(o (1 - o) / n)``); empty bins are left out.
    """
    p = np.asarray(probability, dtype=float).reshape(-1)
    o = np.asarray(outcome, dtype=float).reshape(-1)
    k = _bin_index(p, bins)
    count = np.bincount(k, minlength=bins)
    has = count > 0
    f_bar = np.bincount(k, weights=p, minlength=bins)[has] / count[has]
    o_bar = np.bincount(k, weights=o, minlength=bins)[has] / count[has]
    idx = np.flatnonzero(has)
    return pd.DataFrame({"bin": idx, "low": idx / bins, "high": (idx + 1) / bins, "n": count[has],
                         "mean_probability": f_bar, "observed": o_bar,
                         "observed_se": np.sqrt(o_bar * (1 - o_bar) / count[has])})


@dataclass(frozen=True)
class Calibration:
    """A classification scored against the truth.

    Attributes
    ----------
    forecasts : DataFrame
        ``replicate``, ``participant``, ``category``, ``probability``
        (exclusive) and ``outcome`` (1 for the true category).
    intervals : DataFrame
        ``replicate``, ``participant``, ``quantity``, ``kind``, ``truth``,
        ``hdi_low``, ``hdi_high``, ``covered``.
    labels : DataFrame
        ``replicate``, ``participant``, ``label``, ``truth``, ``correct``
        (NaN where undetermined).
    mass : float
    bins : int
    """

    forecasts: pd.DataFrame
    intervals: pd.DataFrame
    labels: pd.DataFrame
    mass: float
    bins: int = 10

    @classmethod
    def combine(cls, items: Sequence["Calibration"]) -> "Calibration":
        """Pool several replicates (their ``replicate`` columns are renumbered 0, 1, ...)."""
        if not items:
            raise ValueError("nothing to combine")

        def cat(attr: str) -> pd.DataFrame:
            return pd.concat([getattr(c, attr).assign(replicate=r) for r, c in enumerate(items)], ignore_index=True)

        return cls(cat("forecasts"), cat("intervals"), cat("labels"), items[0].mass, items[0].bins)

    def _matrices(self) -> tuple[np.ndarray, np.ndarray]:
        f = self.forecasts
        keys = ["replicate", "participant"]
        p = f.pivot_table(index=keys, columns="category", values="probability", sort=False)
        o = f.pivot_table(index=keys, columns="category", values="outcome", sort=False)
        return p.to_numpy(), o.loc[p.index, p.columns].to_numpy()

    def brier(self) -> dict[str, float]:
        """Brier score and its decomposition (see :func:`brier_decomposition`)."""
        p, o = self._matrices()
        return brier_decomposition(p, o, bins=self.bins)

    def reliability(self) -> pd.DataFrame:
        """Reliability table of all category forecasts pooled."""
        return reliability_table(self.forecasts["probability"], self.forecasts["outcome"], bins=self.bins)

    def per_participant_brier(self) -> pd.Series:
        """Each participant's Brier score (sum over categories), indexed by (replicate, participant)."""
        f = self.forecasts
        return ((f["probability"] - f["outcome"]) ** 2).groupby([f["replicate"], f["participant"]], sort=False).sum()

    def summary(self) -> dict[str, float]:
        """Every score in one flat dict."""
        b = self.brier()
        arms = self.intervals[self.intervals["kind"] == "arm"]["covered"]
        con = self.intervals[self.intervals["kind"] == "contrast"]["covered"]
        lab = self.labels
        labelled = lab["label"] != UNDETERMINED
        return {
            "participants": int(len(lab)),
            "brier": b["brier"], "reliability": b["reliability"], "resolution": b["resolution"],
            "uncertainty": b["uncertainty"], "within_bin": b["within_bin"],
            "reliability_chance": b["reliability_chance"],
            "coverage": float(arms.mean()) if len(arms) else float("nan"),
            "coverage_se": float(np.sqrt(arms.mean() * (1 - arms.mean()) / len(arms))) if len(arms) else float("nan"),
            "contrast_coverage": float(con.mean()) if len(con) else float("nan"),
            "labelled_share": float(labelled.mean()),
            "labelled_accuracy": float(lab.loc[labelled, "correct"].mean()) if labelled.any() else float("nan"),
            "mass": self.mass,
        }


def calibrate(classification, truth: xr.DataArray, *, bins: int = 10) -> Calibration:
    """Score a classification against true effects (participant, arm) of the same participants.

    Parameters
    ----------
    classification : Classification
    truth : xarray.DataArray
        True arm effects, dims (participant, arm), in the same context and on
        the same scale as the classified effects (:func:`true_effects`).
    bins : int, default=10
        Probability bins of the reliability table and decomposition.
    """
    truth = truth.transpose("participant", "arm")
    ids = list(classification.participants)
    truth = truth.sel(participant=ids, arm=list(classification.arms))
    true_cat = true_categories(truth, classification.categories).set_index("participant")["category"]

    probs = classification.probabilities
    forecasts = pd.DataFrame({
        "replicate": 0,
        "participant": probs["participant"].to_numpy(),
        "category": probs["category"].to_numpy(),
        "probability": probs["exclusive_probability"].to_numpy(),
        "outcome": (true_cat.reindex(probs["participant"]).to_numpy() == probs["category"].to_numpy()).astype(float),
    })

    pairs = rule_contrasts(classification.categories, classification.arms)
    contrasts = contrast_draws(truth, pairs).transpose("participant", "contrast")
    true_values = pd.concat([
        truth.to_pandas().stack().rename("truth"),
        contrasts.to_pandas().stack().rename("truth") if pairs else pd.Series(dtype=float, name="truth"),
    ])
    true_values.index = true_values.index.set_names(["participant", "quantity"])
    eff = classification.effects.merge(true_values.reset_index(), on=["participant", "quantity"], how="left",
                                       validate="one_to_one")
    intervals = eff[["participant", "quantity", "kind", "truth", "hdi_low", "hdi_high"]].assign(
        covered=lambda d: (d["hdi_low"] <= d["truth"]) & (d["truth"] <= d["hdi_high"]))
    intervals.insert(0, "replicate", 0)

    lab = classification.labels[["participant", "label"]].copy()
    lab["truth"] = true_cat.reindex(lab["participant"]).to_numpy()
    lab["correct"] = np.where(lab["label"] == UNDETERMINED, np.nan, (lab["label"] == lab["truth"]).astype(float))
    lab.insert(0, "replicate", 0)
    return Calibration(forecasts, intervals, lab, classification.mass, bins)
