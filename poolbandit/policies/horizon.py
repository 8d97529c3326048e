"""Horizon-aware index rules over the pooled posterior (and over the true prior, as oracles).

Thompson sampling keeps exploring at a rate that suits long horizons; a
participant who makes 14 to 42 decisions gains little from learning late. The
kinds here choose by an *index* per arm, computed in closed form from each
participant's Gaussian posterior of the arm values, and give the index winner
all the probability except a randomisation floor:

* ``pooled-greedy``: the posterior mean (pure exploitation);
* ``pooled-bayes-ucb``: a posterior quantile, at level
  ``1 - 1 / (t (log T)^c)`` for the participant's decision ``t`` of ``T``
  (Kaufmann, Cappe and Garivier [1]_), or a fixed ``quantile``;
* ``pooled-tempered-thompson``: the probability that each arm is best when the
  participant-level spread of the posterior is scaled by ``kappa`` in (0, 1]
  (``kappa = 1`` is ``pooled-thompson``; ``kappa -> 0`` tends to greedy);
* ``pooled-knowledge-gradient``: the posterior mean plus the one-step value of
  information weighted by the decisions this participant has left (Ryzhov,
  Powell and Frazier [2]_); with ``lookahead = m > 1`` the value of
  information of up to ``m`` pulls of one arm, the KG(*) idea of Frazier and
  Powell [3]_ adapted to the online objective (see :func:`kg_index`).

``oracle-prior-*`` are the same rules for each participant alone with the
true population distribution as prior (simulation only, like
``oracle-prior-thompson``): what the rule would do if pooling had already
learnt the population perfectly.

Before any reward has been observed every pooled kind gives the uniform
table: the posterior is then the prior, the same for every arm, so every rule
ties exactly (:meth:`~poolbandit.policies.pooled.PooledThompsonPolicy._prior_only`;
computed from a few prior draws of the heterogeneity scales, the knowledge
gradient would rank the arms by Monte Carlo chance and send the whole first
cohort to one arm).

Belief representation
---------------------
Given the population parameters, a participant's arm values in today's
context are independent normals (:class:`~poolbandit.policies.pooled.PooledThompsonPolicy`).
The belief is kept as a mixture: weights ``w (S, n)``, means and variances
``(S, n, K)`` over the ``S = population_draws`` retained Gibbs sweeps (equal
weights), or over the latent types of the true prior (posterior type weights)
for the oracles. The greedy index is the mixture mean; the Bayes-UCB index the
exact mixture quantile (bisection); tempered Thompson averages the
quadrature probabilities over components; the knowledge gradient is averaged
over components (the value of information given the population parameters,
an approximation that ignores what one observation teaches about the
population). With ``priors.covariance = "full"`` the index rules use each
arm's marginal variance; tempered Thompson uses the correlated rule.

Randomisation floor
-------------------
Every kind takes ``p_min`` (default 0.02): each arm keeps probability at least
``p_min``, the index winner(s) take the rest, ties split evenly
(:func:`~poolbandit.policies._probability.floor_and_split`); tempered Thompson
mixes its table with the uniform one in the same proportion,
``p_min + (1 - K p_min) q``. The floor is meant for designs that need later
inference (inverse-probability weighting, off-policy evaluation): it keeps
every propensity away from zero. ``p_min = 0`` gives the pure rule. A ``clip``
band, when also given, is applied after the floor by the base class; the
result keeps every arm at or above ``max(p_min, clip low)`` (clipping only
scales the arms it does not pin upwards when it pins an arm down, and pins
arms up to ``clip low``), and the arm is drawn from that final table, so the
logged propensity is always exactly the probability used.

References
----------
.. [1] Kaufmann, E., Cappe, O. and Garivier, A. (2012). On Bayesian upper
   confidence bounds for bandit problems. *Proceedings of the 15th
   International Conference on Artificial Intelligence and Statistics*
   (AISTATS), PMLR 22, 592-600.
.. [2] Ryzhov, I. O., Powell, W. B. and Frazier, P. I. (2012). The knowledge
   gradient algorithm for a general class of online learning problems.
   *Operations Research* 60(1), 180-195. doi:10.1287/opre.1110.0999
.. [3] Frazier, P. I. and Powell, W. B. (2010). Paradoxes in learning and the
   marginal value of information. *Decision Analysis* 7(4), 378-403.
   doi:10.1287/deca.1100.0190
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from scipy.special import expit, ndtr, ndtri

from ..errors import DesignError
from ._gaussian import prob_best_correlated, prob_best_normal
from ._probability import floor_and_split
from .base import Batch
from .pooled import OraclePriorThompsonPolicy, PooledThompsonPolicy, _PopulationDraw

__all__ = [
    "kg_factor", "knowledge_gradient", "kg_index", "mixture_quantile", "bayes_ucb_level",
    "Belief", "PooledGreedyPolicy", "PooledBayesUCBPolicy", "PooledTemperedThompsonPolicy",
    "PooledKnowledgeGradientPolicy", "OraclePriorGreedyPolicy", "OraclePriorBayesUCBPolicy",
    "OraclePriorTemperedThompsonPolicy", "OraclePriorKnowledgeGradientPolicy",
]

_TINY = 1e-300


# --------------------------------------------------------------------------
# Closed forms
# --------------------------------------------------------------------------
def kg_factor(z: np.ndarray) -> np.ndarray:
    """``f(z) = z Phi(z) + phi(z)``, the expected positive part of ``z + N(0, 1)``.

    References
    ----------
    .. [1] Ryzhov, Powell and Frazier (2012), see the module docstring.
    """
    z = np.asarray(z, dtype=float)
    return z * ndtr(z) + np.exp(-0.5 * z * z) / np.sqrt(2 * np.pi)


def _best_other(mean: np.ndarray) -> np.ndarray:
    """For every arm, the largest mean among the *other* arms (last axis)."""
    k = mean.shape[-1]
    if k == 1:
        return np.full_like(mean, -np.inf)
    top2 = np.sort(mean, axis=-1)[..., -2:]
    first = np.argmax(mean, axis=-1)[..., None]
    is_first = np.arange(k) == first
    return np.where(is_first, top2[..., :1], top2[..., 1:])


def knowledge_gradient(mean: np.ndarray, var: np.ndarray, noise_var, *, pulls=1) -> np.ndarray:
    """Value of information of ``pulls`` observations of each arm (independent normal beliefs).

    ``nu_k = s_k f(-|mu_k - max_{j != k} mu_j| / s_k)`` with
    ``s_k^2 = var_k^2 / (var_k + noise_var / pulls)``, the variance of the
    change in arm ``k``'s posterior mean that the observations bring, and
    ``f`` = :func:`kg_factor`: the expected increase of the largest posterior
    mean.

    Parameters
    ----------
    mean, var : ndarray (..., K)
    noise_var : float or ndarray broadcasting to (..., K)
    pulls : int or ndarray broadcasting to (..., K), default=1

    References
    ----------
    .. [1] Ryzhov, Powell and Frazier (2012), section 3; Frazier and Powell
       (2010) for several pulls. See the module docstring.
    """
    mean = np.asarray(mean, dtype=float)
    var = np.maximum(np.asarray(var, dtype=float), 0.0)
    s = var / np.sqrt(var + np.asarray(noise_var, dtype=float) / pulls + _TINY)
    gap = np.abs(mean - _best_other(mean))
    with np.errstate(divide="ignore", invalid="ignore"):
        out = s * kg_factor(-gap / np.where(s > 0, s, 1.0))
    return np.where(s > 0, out, 0.0)


def kg_index(mean: np.ndarray, var: np.ndarray, noise_var, remaining: np.ndarray, *,
             lookahead: int = 1) -> np.ndarray:
    """Online knowledge-gradient index of every arm, with an optional lookahead.

    Parameters
    ----------
    mean, var : ndarray (..., n, K)
        Posterior means and variances of the arm values.
    noise_var : float or ndarray broadcasting to (..., n, K)
        Variance of one observation.
    remaining : ndarray (n,)
        Decisions this participant has left *after* the current one.
    lookahead : int, default=1
        Largest number ``m`` of pulls of one arm considered.

    Returns
    -------
    ndarray (..., n, K)

    Notes
    -----
    With ``R`` decisions left after this one, the value of the plan "pull arm
    ``x`` ``m`` times, then exploit the best posterior mean", less the
    constant ``R mu*`` (``mu*`` the largest current mean), is

    .. math::

        I_x(m) = m \\mu_x + (1 - m) \\mu^* + (R + 1 - m)\\, \\nu_x(m),

    with :math:`\\nu_x(m)` the value of information of ``m`` pulls
    (:func:`knowledge_gradient`). ``m = 1`` gives the online knowledge
    gradient of Ryzhov, Powell and Frazier, :math:`\\mu_x + R \\nu_x`; the
    index is :math:`\\max_{1 \\le m \\le \\min(M, R + 1)} I_x(m)`. Taking the
    best ``m`` is the KG(*) remedy of Frazier and Powell for the
    non-concavity of the value of information: one noisy observation may be
    worth almost nothing while several are worth much.
    """
    mean = np.asarray(mean, dtype=float)
    R = np.asarray(remaining, dtype=float)[:, None]
    best = np.max(mean, axis=-1, keepdims=True)
    index = mean + R * knowledge_gradient(mean, var, noise_var, pulls=1)
    for m in range(2, int(lookahead) + 1):
        cand = m * mean + (1 - m) * best + (R + 1 - m) * knowledge_gradient(mean, var, noise_var, pulls=m)
        index = np.where(R + 1 >= m, np.maximum(index, cand), index)
    return index


def mixture_quantile(level: np.ndarray, weight: np.ndarray, mean: np.ndarray, sd: np.ndarray, *,
                     iterations: int = 60) -> np.ndarray:
    """Quantile of a mixture of normals, by bisection (vectorised).

    Parameters
    ----------
    level : ndarray (n,)
        Probability levels; ``<= 0`` gives ``-inf`` and ``>= 1`` gives ``+inf``.
    weight : ndarray (S, n)
        Component weights (rows of each participant sum to 1).
    mean, sd : ndarray (S, n, K)

    Returns
    -------
    ndarray (n, K)
        ``x`` with ``sum_s w_s Phi((x - mean_s) / sd_s) = level``; the answer
        lies between the smallest and the largest component quantile, and 60
        halvings of that bracket leave an error far below any difference
        between arms that matters.
    """
    level = np.asarray(level, dtype=float)
    inner = np.clip(level, 1e-300, 1 - 1e-16)
    sd = np.maximum(np.asarray(sd, dtype=float), 1e-12)
    comp = mean + sd * ndtri(inner)[None, :, None]
    lo, hi = comp.min(axis=0), comp.max(axis=0)
    w = np.asarray(weight, dtype=float)[..., None]
    for _ in range(iterations):
        mid = 0.5 * (lo + hi)
        below = np.sum(w * ndtr((mid[None] - mean) / sd), axis=0) < inner[:, None]
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    out = 0.5 * (lo + hi)
    out = np.where(level[:, None] <= 0, -np.inf, out)
    return np.where(level[:, None] >= 1, np.inf, out)


def bayes_ucb_level(decision: np.ndarray, horizon: int, *, c: float = 0.0) -> np.ndarray:
    """The published quantile schedule ``1 - 1 / (t (log T)^c)`` (Kaufmann, Cappe and Garivier 2012).

    ``t`` is the participant's 1-based decision index and ``T`` the horizon.
    At ``t = 1`` the level is 0 (every index is ``-inf``, so every arm ties).
    """
    t = np.asarray(decision, dtype=float)
    scale = np.log(horizon) ** c if c else 1.0
    return 1.0 - 1.0 / (t * scale)


# --------------------------------------------------------------------------
# Beliefs and rules
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class Belief:
    """A participant-level mixture of independent normal arm values.

    Attributes
    ----------
    weight : ndarray (S, n)
    mean, var : ndarray (S, n, K)
    noise_var : ndarray broadcasting to (S, n, K)
        Variance of one observation (per component).
    cov : ndarray (S, n, K, K) or None
        Full covariances when the arms are correlated (``covariance = "full"``).
    """

    weight: np.ndarray
    mean: np.ndarray
    var: np.ndarray
    noise_var: np.ndarray
    cov: np.ndarray | None = None


class _IndexRule:
    """Mixin: the four index rules over a :class:`Belief` (``rule`` names the rule)."""

    rule: ClassVar[str] = ""

    def _check_floor(self) -> None:
        p_min = float(self.params.get("p_min", 0.0))
        if p_min * self.n_arms > 1 + 1e-12:
            raise DesignError(f"policies.{self.spec.name}.p_min",
                              f"expected at most 1/K = {1 / self.n_arms:.4g} for {self.n_arms} arms, got {p_min!r}")

    def _belief(self, batch: Batch, rng: np.random.Generator) -> Belief:  # pragma: no cover - interface
        raise NotImplementedError

    def index(self, batch: Batch, rng: np.random.Generator | None = None) -> np.ndarray:
        """The rule's (n, K) index for ``batch`` (tempered Thompson: its probability table)."""
        b = self._belief(batch, rng)
        p = self.params
        if self.rule == "greedy":
            return np.einsum("sn,snk->nk", b.weight, b.mean)
        if self.rule == "bayes-ucb":
            q = p.get("quantile")
            level = (np.full(len(batch), float(q)) if q is not None
                     else bayes_ucb_level(batch.decision, self.design.study.horizon, c=float(p.get("c", 0.0))))
            return mixture_quantile(level, b.weight, b.mean, np.sqrt(b.var))
        if self.rule == "tempered-thompson":
            kappa = float(p.get("kappa", 0.5))
            out = np.zeros(b.mean.shape[1:])
            for s in range(len(b.mean)):
                if b.cov is None:
                    q = prob_best_normal(b.mean[s], kappa * np.sqrt(b.var[s]))
                else:
                    q = prob_best_correlated(b.mean[s], kappa**2 * b.cov[s])
                out += b.weight[s][:, None] * q
            return out / out.sum(axis=1, keepdims=True)
        if self.rule == "knowledge-gradient":
            remaining = np.maximum(self.design.study.horizon - np.asarray(batch.decision), 0)
            idx = kg_index(b.mean, b.var, b.noise_var, remaining, lookahead=int(p.get("lookahead", 1)))
            return np.einsum("sn,snk->nk", b.weight, idx)
        raise ValueError(f"unknown index rule {self.rule!r}")  # pragma: no cover

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        p_min = float(self.params.get("p_min", 0.0))
        idx = self.index(batch, rng)
        if self.rule == "tempered-thompson":
            return p_min + (1 - self.n_arms * p_min) * idx
        return floor_and_split(idx, p_min)


# --------------------------------------------------------------------------
# Pooled versions
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class _IndexDraw(_PopulationDraw):
    """A population draw that also keeps the noise sd of its sweep (None: bernoulli)."""

    sigma: float | None = None


class _PooledIndexPolicy(_IndexRule, PooledThompsonPolicy):
    """Pooled posterior (the warm-started Gibbs sampler of ``pooled-thompson``) seen through an index rule."""

    def __init__(self, spec, design, *, truth=None):
        super().__init__(spec, design, truth=truth)
        self._check_floor()

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        uniform = self._prior_only(batch)  # nothing observed yet: every arm ties (see pooled-thompson)
        return uniform if uniform is not None else super()._probabilities(batch, rng)

    def _record(self) -> _IndexDraw:
        base = super()._record()
        sigma = self._sampler.state.sigma
        return _IndexDraw(**vars(base), sigma=None if sigma is None else float(sigma))

    def _belief(self, batch: Batch, rng: np.random.Generator | None) -> Belief:
        self._fit(rng)
        means, variances, covs, noise = [], [], [], []
        for draw in self._draws:
            mv, cv = self.arm_value_moments(draw, batch.participant, batch.context)
            if cv.ndim == 3:
                covs.append(cv)
                cv = np.diagonal(cv, axis1=1, axis2=2)
            means.append(mv)
            variances.append(np.maximum(cv, 0.0))
            if draw.sigma is not None:
                noise.append(np.full_like(mv, draw.sigma**2))
            else:  # bernoulli: the local variance of one observation on the logit scale (Laplace)
                pr = expit(mv)
                noise.append(1.0 / np.maximum(pr * (1 - pr), 1e-6))
        s = len(means)
        return Belief(np.full((s, len(batch)), 1.0 / s), np.stack(means), np.stack(variances), np.stack(noise),
                      np.stack(covs) if covs else None)

    def posterior_summary(self) -> dict | None:
        """The population parameters of the last Gibbs sweep (for live-study snapshots), as ``pooled-thompson``."""
        if self._sampler is None:
            return None
        from ..models.design_matrix import coef_names

        st = self._sampler.state
        return {"source": "last Gibbs sweep of the step", "coef": coef_names(self.design.arms, self._features),
                "beta": st.beta, "tau": st.tau, "sigma": st.sigma, "observations": int(len(self.model_data().y))}


class PooledGreedyPolicy(_PooledIndexPolicy):
    """The arm with the highest pooled posterior mean in today's context (floor ``p_min``).

    Parameters (design keys): ``p_min`` (default 0.02; for designs that need
    later inference; 0 allowed) and those of ``pooled-thompson``. See the
    module docstring.
    """

    kind = "pooled-greedy"
    rule = "greedy"


class PooledBayesUCBPolicy(_PooledIndexPolicy):
    """The arm with the highest pooled posterior quantile (Bayes-UCB; floor ``p_min``).

    Parameters (design keys): ``c`` (default 0, the level
    ``1 - 1 / (t (log T)^c)``), ``quantile`` (a fixed level instead),
    ``p_min`` (default 0.02), and those of ``pooled-thompson``.

    References
    ----------
    .. [1] Kaufmann, E., Cappe, O. and Garivier, A. (2012). On Bayesian upper
       confidence bounds for bandit problems. AISTATS, PMLR 22, 592-600.
    """

    kind = "pooled-bayes-ucb"
    rule = "bayes-ucb"


class PooledTemperedThompsonPolicy(_PooledIndexPolicy):
    """Probability best under the pooled posterior with its participant-level spread scaled by ``kappa``.

    Parameters (design keys): ``kappa`` in (0, 1] (default 0.5), ``p_min``
    (default 0.02) and those of ``pooled-thompson``. Exact by quadrature.
    """

    kind = "pooled-tempered-thompson"
    rule = "tempered-thompson"


class PooledKnowledgeGradientPolicy(_PooledIndexPolicy):
    """Posterior mean plus the remaining decisions times the value of information (online KG).

    Parameters (design keys): ``lookahead`` (default 1; ``m > 1`` considers
    up to ``m`` pulls of one arm, :func:`kg_index`), ``p_min`` (default
    0.02) and those of ``pooled-thompson``.

    References
    ----------
    .. [1] Ryzhov, I. O., Powell, W. B. and Frazier, P. I. (2012). The
       knowledge gradient algorithm for a general class of online learning
       problems. *Operations Research* 60(1), 180-195.
    .. [2] Frazier, P. I. and Powell, W. B. (2010). Paradoxes in learning and
       the marginal value of information. *Decision Analysis* 7(4), 378-403.
    """

    kind = "pooled-knowledge-gradient"
    rule = "knowledge-gradient"


# --------------------------------------------------------------------------
# Oracle-prior versions (simulation only)
# --------------------------------------------------------------------------
class _OracleIndexPolicy(_IndexRule, OraclePriorThompsonPolicy):
    """Each participant alone with the true population prior, seen through an index rule."""

    def __init__(self, spec, design, *, truth=None):
        super().__init__(spec, design, truth=truth)
        self._check_floor()

    def _belief(self, batch: Batch, rng: np.random.Generator | None) -> Belief:
        w, mean, sd = self.posterior(batch.participant)
        off = self._offset(batch.context)
        var = np.broadcast_to(sd**2, mean.shape)
        return Belief(w.T, mean + off[None], var, np.full(mean.shape, self._noise**2))


class OraclePriorGreedyPolicy(_OracleIndexPolicy):
    """``pooled-greedy`` with the true population prior instead of pooling (simulation only)."""

    kind = "oracle-prior-greedy"
    rule = "greedy"


class OraclePriorBayesUCBPolicy(_OracleIndexPolicy):
    """``pooled-bayes-ucb`` with the true population prior instead of pooling (simulation only)."""

    kind = "oracle-prior-bayes-ucb"
    rule = "bayes-ucb"


class OraclePriorTemperedThompsonPolicy(_OracleIndexPolicy):
    """``pooled-tempered-thompson`` with the true population prior instead of pooling (simulation only)."""

    kind = "oracle-prior-tempered-thompson"
    rule = "tempered-thompson"


class OraclePriorKnowledgeGradientPolicy(_OracleIndexPolicy):
    """``pooled-knowledge-gradient`` with the true population prior instead of pooling (simulation only)."""

    kind = "oracle-prior-knowledge-gradient"
    rule = "knowledge-gradient"
