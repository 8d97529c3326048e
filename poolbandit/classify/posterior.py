"""From posterior draws of arm effects to each participant's likely category.

The input is ``effect``, an :class:`xarray.DataArray` with dims
``(chain, draw, participant, arm)``: posterior draws of every participant's
arm effects in one context, as returned by
:func:`poolbandit.models.effects.arm_effects` (hierarchical posterior, either
engine) or :meth:`poolbandit.policies.thompson.ThompsonPolicy.effect_draws`
(unpooled conjugate posteriors).

For every participant :func:`classify` reports

* the posterior probability of each category, ``p = P(rule holds | data)``,
  estimated by the share of draws in which the rule holds, with its Monte
  Carlo standard error ``sd / sqrt(ESS)`` where ESS is ArviZ's effective
  sample size for the mean of the indicator (autocorrelation-aware, [1]_);
* the same for the exclusive set (each draw assigned to the first rule it
  matches, the rest to ``"undetermined"``), and the probability that a draw
  matches more than one rule (categories need not be exclusive);
* a label: the exclusive category with the top probability when that
  probability reaches ``threshold``, otherwise ``"undetermined"``;
* the posterior mean and highest-density interval (``arviz.hdi``, [2]_) of
  each arm effect and each contrast a rule names.

For the population it reports the expected share of each category among the
studied participants with a credible interval, computed draw by draw from the
participants' joint posterior, and, under the hierarchical model, the share
implied by the fitted population distribution for a new participant
(:func:`population_effects`).

References
----------
.. [1] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. and Buerkner, P.-C.
   (2021). Rank-normalization, folding, and localization: an improved R-hat
   for assessing convergence of MCMC. *Bayesian Analysis* 16, 667-718.
   doi:10.1214/20-BA1221
.. [2] Kruschke, J. K. (2015). *Doing Bayesian Data Analysis*, 2nd ed.,
   section 4.3.4 (highest density intervals). Academic Press.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import arviz as az
import numpy as np
import pandas as pd
import xarray as xr
from scipy.special import expit

from .._random import RngLike, as_generator
from ..errors import InputError
from ..models.design_matrix import arm_rows
from ..models.effects import context_vector
from ..spec import CategorySpec
from .rules import UNDETERMINED, category_indicators, check_categories, contrast_draws, exclusive_codes, \
    rule_contrasts

__all__ = [
    "Classification",
    "classify",
    "population_effects",
    "posterior_mean_mcse",
    "hdi_table",
    "PARTICIPANTS",
    "POPULATION",
]

#: ``source`` of shares computed from the studied participants' posteriors.
PARTICIPANTS = "studied participants"
#: ``source`` of shares implied by the fitted population distribution (a new participant).
POPULATION = "new participant (population model)"

_EFFECT_DIMS = ("chain", "draw", "participant", "arm")


@dataclass(frozen=True)
class Classification:
    """Category probabilities, labels, effects and shares of one posterior.

    Attributes
    ----------
    categories : tuple of CategorySpec
        The rules, in the design's order.
    participants : tuple of str
    arms : tuple of str
    mass : float
        Credible mass of every interval.
    threshold : float
        Minimum top exclusive probability for a label.
    probabilities : DataFrame
        One row per participant and category (the rules, then
        ``"undetermined"``, the draws that match no rule). Columns:
        ``participant``, ``category``, ``probability`` and ``mc_se`` (the rule
        alone), ``exclusive_probability`` and ``exclusive_mc_se`` (first
        matching rule).
    labels : DataFrame
        One row per participant: ``participant``, ``label``,
        ``top_category``, ``top_probability``, ``top_mc_se`` and
        ``overlap_probability`` (share of draws matching two or more rules).
    effects : DataFrame
        One row per participant and quantity: ``participant``, ``quantity``
        (an arm, or a contrast ``"A - B"``), ``kind`` (``arm`` or
        ``contrast``), ``mean``, ``sd``, ``mc_se``, ``hdi_low``, ``hdi_high``.
    prevalence : DataFrame
        ``source`` (:data:`PARTICIPANTS` or :data:`POPULATION`), ``set``
        (``exclusive`` or ``marginal``), ``category``, ``share`` (posterior
        mean), ``mc_se``, ``low``, ``high`` (HDI at ``mass``).
    overlap_pairs : DataFrame
        ``category_a``, ``category_b``, ``mean_probability`` (over
        participants) and ``max_probability`` of both rules holding at once.
    indicators : xarray.DataArray of bool
        (chain, draw, participant, category): whether each rule holds.
    exclusive : xarray.DataArray of int
        (chain, draw, participant): index of the first matching rule, or
        ``len(categories)`` for none.
    context : dict
        The context the effects were computed in (for the record).
    """

    categories: tuple[CategorySpec, ...]
    participants: tuple[str, ...]
    arms: tuple[str, ...]
    mass: float
    threshold: float
    probabilities: pd.DataFrame
    labels: pd.DataFrame
    effects: pd.DataFrame
    prevalence: pd.DataFrame
    overlap_pairs: pd.DataFrame
    indicators: xr.DataArray = field(repr=False)
    exclusive: xr.DataArray = field(repr=False)
    context: dict = field(default_factory=dict)

    @property
    def names(self) -> list[str]:
        """Category names followed by ``"undetermined"``."""
        return [c.name for c in self.categories] + [UNDETERMINED]

    @property
    def overlapping(self) -> bool:
        """Whether any draw of any participant matched two or more rules."""
        return bool((self.labels["overlap_probability"] > 0).any())

    def table(self) -> pd.DataFrame:
        """The ``categories.csv`` table: probabilities with each participant's label and the probability
        that a draw matches two or more rules (``overlap_probability``, 0 for exclusive rules)."""
        out = self.probabilities.merge(self.labels[["participant", "label", "overlap_probability"]],
                                       on="participant", how="left", validate="many_to_one")
        return out[["participant", "category", "probability", "mc_se", "exclusive_probability",
                    "exclusive_mc_se", "label", "overlap_probability"]]

    def label_counts(self) -> pd.Series:
        """How many participants carry each label (every category and ``undetermined``)."""
        return self.labels["label"].value_counts().reindex(self.names, fill_value=0)

    def summary_lines(self) -> list[str]:
        """A few plain-text lines for a terminal."""
        n = len(self.participants)
        counts = self.label_counts()
        lines = [f"{n} participants; labels at probability >= {self.threshold:g}: "
                 + ", ".join(f"{k} {v}" for k, v in counts.items())]
        ex = self.prevalence[(self.prevalence["set"] == "exclusive")]
        for source, part in ex.groupby("source", sort=False):
            shares = ", ".join(f"{r.category} {r.share:.2f} [{r.low:.2f}, {r.high:.2f}]"
                               for r in part.itertuples())
            lines.append(f"shares ({source}, {self.mass:.0%} interval): {shares}")
        if self.overlapping:
            top = self.overlap_pairs.sort_values("mean_probability", ascending=False).iloc[0]
            lines.append(f"categories overlap: rules {top.category_a!r} and {top.category_b!r} hold together "
                         f"with probability {top.mean_probability:.3f} on average; labels use the exclusive set "
                         "(first matching rule)")
        return lines


# --------------------------------------------------------------------------
# Monte Carlo summaries, all through ArviZ
# --------------------------------------------------------------------------
def posterior_mean_mcse(draws: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean, Monte Carlo standard error and ESS of the mean over (chain, draw).

    Parameters
    ----------
    draws : ndarray of shape (chain, draw, ...)

    Returns
    -------
    mean, mc_se, ess : ndarrays of shape ``draws.shape[2:]``
        ``mc_se = sd / sqrt(ess)`` with ``sd`` the sample sd (ddof=1) over all
        draws and ``ess`` ArviZ's effective sample size for the mean
        (``arviz.ess(method="mean")``), which is what ``arviz.mcse(method="mean")``
        computes. A quantity constant over all draws has ``mc_se`` 0.
    """
    draws = np.asarray(draws, dtype=float)
    rest = [f"d{j}" for j in range(draws.ndim - 2)]
    ds = xr.Dataset({"x": (("chain", "draw", *rest), draws)})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ess = az.ess(ds, method="mean")["x"].to_numpy()
    flat = draws.reshape(draws.shape[0] * draws.shape[1], *draws.shape[2:])
    mean = flat.mean(axis=0)
    sd = flat.std(axis=0, ddof=1) if len(flat) > 1 else np.full(mean.shape, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        mcse = sd / np.sqrt(ess)
    return mean, mcse, ess


def hdi_table(draws: np.ndarray, *, mass: float) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper ends of ``arviz.hdi`` at ``mass`` over (chain, draw), shape ``draws.shape[2:]``."""
    draws = np.asarray(draws, dtype=float)
    rest = [f"d{j}" for j in range(draws.ndim - 2)]
    ds = xr.Dataset({"x": (("chain", "draw", *rest), draws)})
    h = az.hdi(ds, hdi_prob=mass)["x"].transpose(*rest, "hdi")
    return h.sel(hdi="lower").to_numpy(), h.sel(hdi="higher").to_numpy()


def _check_effect(effect: xr.DataArray) -> xr.DataArray:
    if not isinstance(effect, xr.DataArray):
        raise TypeError(f"effect must be an xarray.DataArray, got {type(effect).__name__}")
    if set(effect.dims) != set(_EFFECT_DIMS):
        raise ValueError(f"effect must have dims {_EFFECT_DIMS}, got {effect.dims}")
    effect = effect.transpose(*_EFFECT_DIMS)
    if not np.isfinite(effect.to_numpy()).all():
        raise ValueError("effect contains non-finite draws")
    return effect


def _check_unit(name: str, value: float, *, low_open: bool, high_open: bool) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = float("nan")
    ok = (v > 0 if low_open else v >= 0) and (v < 1 if high_open else v <= 1)
    if not ok:
        lo, hi = "(" if low_open else "[", ")" if high_open else "]"
        raise InputError(f"{name}: expected a number in {lo}0, 1{hi}, got {value!r}")
    return v


# --------------------------------------------------------------------------
# The main entry point
# --------------------------------------------------------------------------
def classify(
    effect: xr.DataArray,
    categories: Sequence[CategorySpec],
    *,
    mass: float = 0.9,
    threshold: float = 0.8,
    population_effect: xr.DataArray | None = None,
    context: Mapping[str, float] | None = None,
) -> Classification:
    """Classify every participant from posterior draws of their arm effects.

    Parameters
    ----------
    effect : xarray.DataArray
        Dims (chain, draw, participant, arm).
    categories : sequence of CategorySpec
        The design's rules (``design.categories``), in order.
    mass : float, default=0.9
        Credible mass of the HDIs of effects, contrasts and shares, in (0, 1).
    threshold : float, default=0.8
        A participant is labelled with the top exclusive category only when
        its probability is at least ``threshold``; otherwise ``"undetermined"``.
    population_effect : xarray.DataArray, optional
        Draws of new participants' effects from the fitted population
        distribution (:func:`population_effects`); adds the population-model
        shares to ``prevalence``. Unpooled posteriors have none.
    context : mapping, optional
        The context of ``effect``, recorded for reports.

    Returns
    -------
    Classification

    Raises
    ------
    InputError
        If ``mass`` or ``threshold`` is out of range, or there are no rules.
    """
    effect = _check_effect(effect)
    mass = _check_unit("mass", mass, low_open=True, high_open=True)
    threshold = _check_unit("threshold", threshold, low_open=True, high_open=False)
    arms = tuple(str(a) for a in effect["arm"].to_numpy())
    categories = check_categories(categories, arms)
    participants = tuple(str(p) for p in effect["participant"].to_numpy())
    names = [c.name for c in categories] + [UNDETERMINED]
    n_cat = len(categories)

    ind = category_indicators(effect, categories)  # (chain, draw, N, C)
    codes = exclusive_codes(ind)  # (chain, draw, N)
    iv, cv = ind.to_numpy(), codes.to_numpy()
    parts = []
    for block in _blocks(iv.shape[0] * iv.shape[1], len(participants), 2 * (n_cat + 1) + 1):
        onehot = np.eye(n_cat + 1, dtype=bool)[cv[:, :, block]]  # (chain, draw, b, C+1)
        marginal = np.concatenate([iv[:, :, block], onehot[..., -1:]], axis=-1)  # the remainder is in both sets
        n_match = iv[:, :, block].sum(axis=-1)
        stacked = np.concatenate([marginal, onehot, (n_match >= 2)[..., None]], axis=-1).astype(float)
        parts.append(posterior_mean_mcse(stacked)[:2])
    mean = np.concatenate([m for m, _ in parts])  # (N, 2(C+1)+1)
    mcse = np.concatenate([e for _, e in parts])
    p_marg, se_marg = mean[:, : n_cat + 1], mcse[:, : n_cat + 1]
    p_ex, se_ex = mean[:, n_cat + 1: 2 * (n_cat + 1)], mcse[:, n_cat + 1: 2 * (n_cat + 1)]
    overlap = mean[:, -1]

    n = len(participants)
    probabilities = pd.DataFrame({
        "participant": np.repeat(participants, n_cat + 1),
        "category": np.tile(names, n),
        "probability": p_marg.reshape(-1),
        "mc_se": se_marg.reshape(-1),
        "exclusive_probability": p_ex.reshape(-1),
        "exclusive_mc_se": se_ex.reshape(-1),
    })

    top = p_ex[:, :n_cat].argmax(axis=1)
    top_p = p_ex[np.arange(n), top]
    labelled = top_p >= threshold
    labels = pd.DataFrame({
        "participant": list(participants),
        "label": np.where(labelled, np.asarray(names, dtype=object)[top], UNDETERMINED),
        "top_category": np.asarray(names, dtype=object)[top],
        "top_probability": top_p,
        "top_mc_se": se_ex[np.arange(n), top],
        "overlap_probability": overlap,
    })

    effects = _effect_table(effect, categories, mass=mass)
    prevalence = [_shares(ind, codes, names, mass=mass, source=PARTICIPANTS)]
    if population_effect is not None:
        pe = _check_effect(population_effect)
        if tuple(str(a) for a in pe["arm"].to_numpy()) != arms:
            raise ValueError(f"population_effect arms {list(pe['arm'].to_numpy())} differ from effect arms {arms}")
        pind = category_indicators(pe, categories)
        prevalence.append(_shares(pind, exclusive_codes(pind), names, mass=mass, source=POPULATION))

    pairs = []
    iv = ind.to_numpy()
    for a in range(n_cat):
        for b in range(a + 1, n_cat):
            both = (iv[..., a] & iv[..., b]).mean(axis=(0, 1))
            pairs.append({"category_a": names[a], "category_b": names[b],
                          "mean_probability": float(both.mean()), "max_probability": float(both.max())})
    overlap_pairs = pd.DataFrame(pairs, columns=["category_a", "category_b", "mean_probability", "max_probability"])

    return Classification(
        categories=categories, participants=participants, arms=arms, mass=mass, threshold=threshold,
        probabilities=probabilities, labels=labels, effects=effects,
        prevalence=pd.concat(prevalence, ignore_index=True), overlap_pairs=overlap_pairs,
        indicators=ind, exclusive=codes, context=dict(context or {}),
    )


def _blocks(n_samples: int, n: int, width: int, *, budget: int = 2**24):
    """Slices of participants whose (samples, block, width) arrays stay under ``budget`` elements."""
    size = max(1, budget // max(1, n_samples * width))
    return [slice(i, min(i + size, n)) for i in range(0, n, size)]


def _effect_table(effect: xr.DataArray, categories: Sequence[CategorySpec], *, mass: float) -> pd.DataFrame:
    arms = [str(a) for a in effect["arm"].to_numpy()]
    pairs = rule_contrasts(categories, arms)
    contrasts = contrast_draws(effect, pairs).transpose("chain", "draw", "participant", "contrast")
    draws = np.concatenate([effect.to_numpy(), contrasts.to_numpy()], axis=-1)  # (chain, draw, N, Q)
    quantities = arms + [str(c) for c in contrasts["contrast"].to_numpy()]
    kinds = ["arm"] * len(arms) + ["contrast"] * len(pairs)
    cols: list[list[np.ndarray]] = [[], [], [], [], []]
    for block in _blocks(draws.shape[0] * draws.shape[1], draws.shape[2], draws.shape[3]):
        sub = draws[:, :, block]
        m, se, _ = posterior_mean_mcse(sub)
        flat = sub.reshape(-1, *sub.shape[2:])
        sd = flat.std(axis=0, ddof=1) if len(flat) > 1 else np.full(m.shape, np.nan)
        lo, hi = hdi_table(sub, mass=mass)
        for store, value in zip(cols, (m, se, sd, lo, hi)):
            store.append(value)
    mean, mcse, sd, low, high = (np.concatenate(c) for c in cols)
    n, q = mean.shape
    return pd.DataFrame({
        "participant": np.repeat([str(p) for p in effect["participant"].to_numpy()], q),
        "quantity": np.tile(quantities, n),
        "kind": np.tile(kinds, n),
        "mean": mean.reshape(-1),
        "sd": sd.reshape(-1),
        "mc_se": mcse.reshape(-1),
        "hdi_low": low.reshape(-1),
        "hdi_high": high.reshape(-1),
    })


def _shares(ind: xr.DataArray, codes: xr.DataArray, names: list[str], *, mass: float, source: str) -> pd.DataFrame:
    """Shares of each category among participants, draw by draw, summarised over draws."""
    n_cat = len(names) - 1
    cv = codes.to_numpy()
    ex = np.stack([(cv == j).mean(axis=2) for j in range(n_cat + 1)], axis=-1)  # (chain, draw, C+1)
    marg = np.concatenate([ind.to_numpy().mean(axis=2), ex[..., -1:]], axis=-1)
    rows = []
    for set_name, draws in (("exclusive", ex), ("marginal", marg)):
        mean, mcse, _ = posterior_mean_mcse(draws)
        low, high = hdi_table(draws, mass=mass)
        for j, name in enumerate(names):
            rows.append({"source": source, "set": set_name, "category": name, "share": mean[j],
                         "mc_se": mcse[j], "low": low[j], "high": high[j]})
    return pd.DataFrame(rows)


# --------------------------------------------------------------------------
# New participants from the fitted population distribution
# --------------------------------------------------------------------------
def population_effects(
    idata,
    arms: Sequence[str],
    features: Sequence[str] = (),
    *,
    context: Mapping[str, float] | None = None,
    covariates: np.ndarray | None = None,
    n_new: int = 100,
    scale: str = "linear",
    rng: RngLike = None,
) -> xr.DataArray:
    """Arm effects of simulated new participants, one batch per posterior draw.

    For every posterior draw ``s`` and every simulated participant ``m``,

    .. math::

        \\theta^{new}_{sm} = \\beta_s + \\Gamma_s w_m + \\tau_s \\odot z_{sm},
        \\qquad z_{sm} \\sim N(0, I),

    with ``w_m`` a participant drawn at random from the observed
    ``covariates`` (``0``, the reference participant, when none are given),
    and the arm effects in ``context`` follow from the design rows. With a
    full covariance (a posterior ``corr`` over some or all coefficients),
    ``z`` is correlated: ``Sigma = diag(tau) R diag(tau)``. Under the mixture
    population model (a posterior with ``weight (component)`` and
    ``component_mean (component, coef)``, :mod:`poolbandit.models.mixture`)
    each new participant first draws its component ``c ~ Categorical(pi_s)``
    and ``beta_s`` is replaced by that component's mean ``mu_{s,c}``.

    Parameters
    ----------
    idata : arviz.InferenceData or xarray.Dataset
        Hierarchical posterior with ``beta (coef)``, ``tau (coef)`` and, with
        covariates, ``gamma (coef, covariate)``.
    arms, features : sequence of str
        The design's arms and context features.
    context : mapping, optional
        Feature values (default: all 0).
    covariates : ndarray of shape (N, Q), optional
        Observed participant covariates to resample.
    n_new : int, default=100
        New participants per draw (the share's simulation noise shrinks as
        ``1/sqrt(n_new * draws)``).
    scale : {"linear", "probability"}, default="linear"
    rng : Generator, int or None

    Returns
    -------
    xarray.DataArray
        Dims (chain, draw, participant, arm), participants named ``new1``, ...
    """
    post = idata.posterior if hasattr(idata, "posterior") else idata
    for var in ("beta", "tau"):
        if var not in post:
            raise ValueError(f"the posterior has no {var!r}: population shares need a hierarchical posterior")
    rng = as_generator(rng)
    beta = post["beta"].transpose("chain", "draw", ...).to_numpy()  # (c, d, P)
    nc, nd, p = beta.shape
    z = rng.standard_normal((nc, nd, n_new, p))
    tau = post["tau"].transpose("chain", "draw", ...).to_numpy()  # (c, d, P)
    if "corr" in post:
        z = np.einsum("cdpq,cdmq->cdmp", _full_correlation(post), z)
    dev = tau[:, :, None, :] * z
    if "weight" in post and "component_mean" in post:
        theta = _component_means(post, rng, n_new) + dev
    else:
        theta = beta[:, :, None, :] + dev
    if "gamma" in post and covariates is not None:
        w_obs = np.asarray(covariates, dtype=float)
        gamma = post["gamma"].transpose("chain", "draw", ...).to_numpy()  # (c, d, P, Q)
        if w_obs.ndim != 2 or w_obs.shape[1] != gamma.shape[-1] or len(w_obs) == 0:
            raise ValueError(f"covariates must have shape (N >= 1, {gamma.shape[-1]}), got {w_obs.shape}")
        w = w_obs[rng.integers(0, len(w_obs), size=(nc, nd, n_new))]  # (c, d, m, Q)
        theta = theta + np.einsum("cdpq,cdmq->cdmp", gamma, w)
    rows = arm_rows(context_vector(tuple(features), context)[None, :], len(arms))[0]  # (K, P)
    if rows.shape[1] != p:
        raise ValueError(f"beta has {p} coefficients; arms and features imply {rows.shape[1]}")
    values = np.einsum("cdmp,kp->cdmk", theta, rows)
    if scale == "probability":
        values = expit(values)
    return xr.DataArray(
        values, dims=_EFFECT_DIMS,
        coords={"chain": post["beta"]["chain"].to_numpy(), "draw": post["beta"]["draw"].to_numpy(),
                "participant": [f"new{j + 1}" for j in range(n_new)], "arm": list(arms)},
        name="effect",
    )


def _component_means(post, rng: np.random.Generator, n_new: int) -> np.ndarray:
    """Each new participant's component mean (c, d, m, P), its component drawn from the draw's weights."""
    weight = post["weight"].transpose("chain", "draw", "component").to_numpy()  # (c, d, C)
    mu = post["component_mean"].transpose("chain", "draw", "component", "coef").to_numpy()  # (c, d, C, P)
    cdf = np.cumsum(weight, axis=-1)
    u = rng.random(weight.shape[:2] + (n_new,)) * cdf[..., -1:]
    comp = np.minimum((u[..., None] > cdf[:, :, None, :]).sum(axis=-1), weight.shape[-1] - 1)  # (c, d, m)
    return np.take_along_axis(mu, comp[..., None], axis=2)


def _full_correlation(post) -> np.ndarray:
    """Cholesky factors (c, d, P, P) of the correlation matrices, identity outside ``corr``'s coefficients."""
    corr = post["corr"]
    coef = [str(c) for c in post["beta"]["coef"].to_numpy()]
    d1, d2 = [d for d in corr.dims if d not in ("chain", "draw")]
    idx = [coef.index(str(c)) for c in corr[d1].to_numpy()]
    r = corr.transpose("chain", "draw", d1, d2).to_numpy()
    nc, nd = r.shape[:2]
    full = np.broadcast_to(np.eye(len(coef)), (nc, nd, len(coef), len(coef))).copy()
    full[:, :, np.ix_(idx, idx)[0], np.ix_(idx, idx)[1]] = r
    return np.linalg.cholesky(full)
