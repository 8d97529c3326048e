"""Thompson sampling across the pooling spectrum.

Three kinds share one way of randomising: for every participant of a batch,
the probability that each arm is best in today's context under the policy's
posterior, optionally clipped into a band by the base class, and the arm drawn
from that table, so the logged propensity is exactly the probability used.

* ``pooled-thompson`` (:class:`PooledThompsonPolicy`): partial pooling. The
  hierarchical model of :mod:`poolbandit.models.data`,
  ``theta_i = beta + Gamma w_i + b_i``, ``b_i ~ N(0, Sigma)``, sampled by the
  fast engine (:class:`~poolbandit.models.gibbs.GibbsSampler`), warm-started
  from one decision step to the next.
* ``complete-pooling-thompson`` (:class:`CompletePoolingThompsonPolicy`):
  one set of arm effects shared by everyone (``Sigma = 0``).
* ``oracle-prior-thompson`` (:class:`OraclePriorThompsonPolicy`, simulation
  only): each participant alone (no pooling), but with the true population
  distribution as prior: the benchmark a pooled design can at best approach.

Why quadrature over population draws
------------------------------------
Given the population parameters ``(beta, Gamma, Sigma, sigma)`` (and, for a
bernoulli outcome, the Polya-Gamma variables of the current sweep) each
participant's coefficients are Gaussian,
``theta_i ~ N(Q_i^{-1}(Sigma^{-1} m_i + b_i), Q_i^{-1})`` with
``Q_i = Sigma^{-1} + A_i`` and ``m_i = beta + Gamma w_i``. Every design row
touches one arm's block of coefficients only, so ``A_i`` is block-diagonal by
arm; with a diagonal ``Sigma`` so is ``Q_i``, and the arm values
``v_ik = r_k(c)' theta_i`` in context ``c`` are *independent* normals. The
probability that arm ``k`` is best is then a one-dimensional integral,
computed by quadrature (:func:`~poolbandit.policies._gaussian.prob_best_normal`),
and averaged over the last ``population_draws`` sweeps of the sampler:

.. math::

    p_{ik} = \\frac1S \\sum_{s=1}^S P\\big(v_{ik} = \\max_j v_{ij} \\mid
    \\beta^{(s)}, \\Gamma^{(s)}, \\Sigma^{(s)}, \\sigma^{(s)}, \\text{data}\\big).

Only the population level is represented by draws; the participant level,
where the uncertainty that drives exploration lives, is integrated exactly
(a Rao-Blackwellised estimate of the posterior probability). By default
(``population_mean = "integrated"``) the population mean and the covariate
effects are integrated as well: given the scales of a draw the model is
jointly Gaussian in ``(beta, Gamma, theta_1..N)``, so the moments of each
``theta_i`` are closed forms (:func:`_integrated_moments`) and only the scales
``Sigma``, ``sigma`` (and the Polya-Gamma variables) are represented by draws. The table is a
deterministic function of the retained draws, so drawing the arm from it
gives a logged propensity that is exactly the probability used, with no
Monte Carlo noise between "the probability" and "the propensity", which
matters for the causal analyses of micro-randomised trials.

With ``priors.covariance = "full"`` the arm values are correlated given the
population parameters. Two arms are still exact (normal cdf of the
difference); with more arms the orthant probability is approximated by a
fixed scrambled Sobol rule
(:func:`~poolbandit.policies._gaussian.prob_best_correlated`, error of order
``1/1024``): still a deterministic function of the posterior, so the logged
propensity remains exact, but the table is an approximation of the posterior
probability.

References
----------
.. [1] Thompson, W. R. (1933). On the likelihood that one unknown probability
   exceeds another in view of the evidence of two samples. *Biometrika* 25,
   285-294. doi:10.2307/2332286
.. [2] Gelman, A. et al. (2013). *Bayesian Data Analysis*, 3rd ed., chapter 5
   (hierarchical normal models) and section 14.2 (conjugate linear regression).
.. [3] Gelfand, A. E. and Smith, A. F. M. (1990). Sampling-based approaches to
   calculating marginal densities. *JASA* 85(410), 398-409 (Rao-Blackwellised
   estimates from Gibbs output). doi:10.1080/01621459.1990.10476213
.. [4] Liao, P., Klasnja, P., Tewari, A. and Murphy, S. A. (2016). Sample size
   calculations for micro-randomized trials in mHealth. *Statistics in
   Medicine* 35(12), 1944-1971 (logging randomisation probabilities).
   doi:10.1002/sim.6847
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, replace

import numpy as np
import xarray as xr
from scipy import stats
from scipy.special import expit, logsumexp

from .._random import as_generator, spawn
from ..models.data import ModelData
from ..models.design_matrix import arm_rows, coef_names, design_rows
from ._gaussian import prob_best_correlated, prob_best_normal
from ._probability import prob_best
from .base import Batch, Policy

__all__ = ["PooledThompsonPolicy", "CompletePoolingThompsonPolicy", "OraclePriorThompsonPolicy"]

#: Seed of the sampler when a posterior is needed before any assignment drew randomness
#: (``exploit`` called first); a constant keeps that corner case reproducible.
_FALLBACK_SEED = 20_240_601


# --------------------------------------------------------------------------
# Shared helpers
# --------------------------------------------------------------------------
class _Rows:
    """Growing arrays of observed outcomes, design rows and participant indices."""

    def __init__(self, n_coef: int):
        self.n = 0
        self.y = np.empty(256)
        self.X = np.empty((256, n_coef))
        self.group = np.empty(256, dtype=np.int64)

    def add(self, y: np.ndarray, X: np.ndarray, group: np.ndarray) -> None:
        need = self.n + len(y)
        if need > len(self.y):
            cap = max(need, 2 * len(self.y))
            self.y = _grow(self.y, cap)
            self.X = _grow(self.X, cap)
            self.group = _grow(self.group, cap)
        # only the region beyond n is written: earlier views stay valid
        self.y[self.n:need] = y
        self.X[self.n:need] = X
        self.group[self.n:need] = group
        self.n = need

    def arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        return self.y[:self.n], self.X[:self.n], self.group[:self.n]


def _grow(a: np.ndarray, cap: int) -> np.ndarray:
    out = np.empty((cap,) + a.shape[1:], dtype=a.dtype)
    out[:len(a)] = a
    return out


def _effects_array(values: np.ndarray, ids, arms) -> xr.DataArray:
    """``values`` (draw, participant, arm) as an ``effect`` array with one chain."""
    return xr.DataArray(
        values[None], dims=("chain", "draw", "participant", "arm"),
        coords={"chain": [0], "draw": np.arange(values.shape[0]), "participant": list(ids), "arm": list(arms)},
        name="effect",
    )


def _scale_values(values: np.ndarray, scale: str | None, outcome: str) -> np.ndarray:
    scale = scale or ("probability" if outcome == "bernoulli" else "linear")
    if scale not in ("linear", "probability"):
        raise ValueError(f"scale must be 'linear' or 'probability'; got {scale!r}")
    return expit(values) if scale == "probability" else values


def _gaussian_conditional(A: np.ndarray, b: np.ndarray, m: np.ndarray, L: np.ndarray):
    """Mean and covariance of ``theta`` with prior ``N(m, L L')`` and likelihood ``exp(-theta'A theta/2 + b'theta)``.

    Batched over leading axes: ``A`` (..., d, d), ``b`` and ``m`` (..., d),
    ``L`` (..., d, d) broadcasting against ``A``. Written as
    ``theta = m + L z`` with ``z ~ N(0, I)`` a priori, so that
    ``M = I + L'AL``, ``Cov = L M^{-1} L'`` and ``mean = m + Cov (b - A m)``:
    no inverse of the prior covariance, so coefficients without variation
    (``tau = 0``) need no special case.
    """
    d = A.shape[-1]
    r = b - np.einsum("...ij,...j->...i", A, m)
    if d == 1:
        l2 = L[..., 0, 0] ** 2
        var = l2 / (1.0 + l2 * A[..., 0, 0])
        return m + (var * r[..., 0])[..., None], var[..., None, None]
    Lt = np.swapaxes(L, -1, -2)
    M = Lt @ A @ L + np.eye(d)
    cov = L @ np.linalg.solve(M, np.broadcast_to(Lt, M.shape))
    cov = 0.5 * (cov + np.swapaxes(cov, -1, -2))
    return m + np.einsum("...ij,...j->...i", cov, r), cov


def _integrated_moments(A: np.ndarray, b: np.ndarray, L: np.ndarray, Z: np.ndarray, beta_sd: float,
                        gamma_sd: float) -> tuple[np.ndarray, np.ndarray]:
    """Every participant's coefficient moments given the scales, with ``beta`` and ``Gamma`` integrated out.

    Given the scales (``Sigma = L L'``, the noise or Polya-Gamma terms in
    ``A`` and ``b``), the model is jointly Gaussian in ``phi = (beta,
    Gamma)`` and the participant deviations, so the population mean can be
    integrated in closed form instead of being represented by one draw.
    Integrating ``theta_i ~ N(m_i, Sigma)`` out of participant ``i``'s
    likelihood ``exp(-theta'A_i theta/2 + b_i'theta)`` leaves a Gaussian
    likelihood of ``m_i = beta + Gamma w_i`` with precision
    ``A_i - A_i M_i A_i`` and linear term ``b_i - A_i M_i b_i``, where
    ``M_i = (Sigma^{-1} + A_i)^{-1}`` (Woodbury; no inverse of ``A_i`` or
    ``Sigma`` is formed). Summed over participants with the prior
    ``beta ~ N(0, beta_sd^2)``, ``Gamma ~ N(0, gamma_sd^2)`` this gives
    ``phi ~ N(mu, V)``; then ``theta_i = G_i m_i + M_i b_i + N(0, M_i)``
    with ``G_i = I - M_i A_i`` has mean ``G_i mbar_i + M_i b_i`` and
    covariance ``M_i + G_i V_i G_i'`` (``mbar_i``, ``V_i`` the moments of
    ``m_i``).

    Parameters
    ----------
    A : ndarray (n, B, e, e)
        Likelihood precision blocks (``B`` arm blocks of ``e`` coefficients
        for a diagonal ``Sigma``; one block of all coefficients for a full one).
    b : ndarray (n, B, e)
    L : ndarray (B, e, e)
        Factor of each block of ``Sigma``.
    Z : ndarray (n, a)
        ``(1, w_i)``: the intercept and the participant covariates.
    beta_sd, gamma_sd : float
        Prior scales of the population mean and the covariate effects.

    Returns
    -------
    mean : ndarray (n, B, e)
    cov : ndarray (n, B, e, e)

    References
    ----------
    .. [1] Gelfand, A. E. and Smith, A. F. M. (1990), see the module
       docstring (Rao-Blackwellised estimates from Gibbs output).
    .. [2] Lindley, D. V. and Smith, A. F. M. (1972). Bayes estimates for the
       linear model. *JRSS B* 34(1), 1-41 (the hierarchical normal linear model).
    """
    n, nb, e = b.shape
    a = Z.shape[1]
    _, M = _gaussian_conditional(A, b, np.zeros_like(b), L)
    M = np.broadcast_to(M, A.shape)
    AM = A @ M
    Pm = A - AM @ A
    Pm = 0.5 * (Pm + np.swapaxes(Pm, -1, -2))
    cm = b - np.einsum("nbij,nbj->nbi", AM, b)
    prec = np.einsum("nj,nl,nbpq->bjplq", Z, Z, Pm).reshape(nb, a * e, a * e)
    lin = np.einsum("nj,nbp->bjp", Z, cm).reshape(nb, a * e)
    prior = np.concatenate([np.full(e, float(beta_sd) ** -2.0), np.full((a - 1) * e, float(gamma_sd) ** -2.0)])
    prec[:, np.arange(a * e), np.arange(a * e)] += prior
    V = np.linalg.inv(prec)
    V = 0.5 * (V + np.swapaxes(V, -1, -2))
    mu = np.einsum("bij,bj->bi", V, lin).reshape(nb, a, e)
    V = V.reshape(nb, a, e, a, e)
    mbar = np.einsum("nj,bjp->nbp", Z, mu)
    Vi = np.einsum("nj,nl,bjplq->nbpq", Z, Z, V)
    G = np.eye(e) - M @ A
    mean = np.einsum("nbij,nbj->nbi", G, mbar) + np.einsum("nbij,nbj->nbi", M, b)
    cov = M + G @ Vi @ np.swapaxes(G, -1, -2)
    return mean, 0.5 * (cov + np.swapaxes(cov, -1, -2))


@dataclass(frozen=True)
class _PopulationDraw:
    """One retained sweep: population parameters and the participant likelihood terms.

    ``A`` and ``b`` are the arm blocks (N, K, d, d) and (N, K, d) when the
    between-participant covariance is diagonal, else the full (N, P, P) and
    (N, P); ``L`` is then the factor of ``Sigma``.
    """

    beta: np.ndarray
    gamma: np.ndarray
    tau: np.ndarray
    A: np.ndarray
    b: np.ndarray
    L: np.ndarray | None = None
    #: with ``population_mean = "integrated"``: every participant's coefficient moments given the
    #: scales of this sweep, ``beta`` and ``Gamma`` integrated out (:func:`_integrated_moments`);
    #: mean (N, P) and covariance in the layout of :meth:`PooledThompsonPolicy.conditional`
    mean: np.ndarray | None = None
    cov: np.ndarray | None = None


# --------------------------------------------------------------------------
# Partial pooling
# --------------------------------------------------------------------------
class PooledThompsonPolicy(Policy):
    """Thompson sampling from the partially pooled hierarchical posterior.

    Parameters
    ----------
    spec : PolicySpec
        The named policy; its parameters (design keys, validated by
        :data:`~poolbandit.policies._catalogue.KINDS`) are listed below.
    design : DesignSpec
        Arms, features, covariates, outcome and ``[priors]`` of the model.
    truth : Population, optional
        Ignored (this kind never reads the truth).

    Other Parameters
    ----------------
    sweeps : int, default=5
        Gibbs sweeps per decision step after new rewards arrived (warm start).
    population_draws : int, default=4
        The last this many sweeps of the step are the population draws the
        probabilities are averaged over (at least this many sweeps are run).
    population_mean : {"integrated", "drawn"}, default="integrated"
        ``"integrated"``: given each retained draw's scales (``Sigma``, noise
        sd or Polya-Gamma variables), the population mean ``beta`` and the
        covariate effects ``Gamma`` are integrated out in closed form
        (:func:`_integrated_moments`), so only the scales are represented by
        draws; ``"drawn"``: the draw's own ``beta`` and ``Gamma`` are used.
        Integrating removes the Monte Carlo noise of the population mean that
        every participant would otherwise share (one unlucky draw sends the
        whole cohort the same way) at the cost of a few small linear solves
        per retained draw.
    burn_in : int, default=100
        Sweeps of the first fit, which starts from a prior draw.
    context : bool, default=True
        Model arm-by-context interactions; ``false`` drops the features.
    covariates : bool, default=True
        Model covariate effects ``Gamma``; ``false`` drops the covariates.
    explore_first, clip
        Forced exploration and clipping (base class).

    Notes
    -----
    The roster is fixed by :meth:`start`; every participant is in the model
    from the start, those without observations (late enrollers) with
    ``A_i = 0``, so their coefficients come from the population part
    ``N(beta + Gamma w_i, Sigma)`` of the posterior. Participant ``i`` is
    named by its roster position. See the module docstring for why the
    probabilities are computed by quadrature over population draws.
    """

    kind = "pooled-thompson"

    def _start(self) -> None:
        p, d, n = self.params, self.design, self.n_participants
        self._features = tuple(d.features) if p.get("context", True) else ()
        self._covs = tuple(d.covariates) if p.get("covariates", True) else ()
        self._width = 1 + len(self._features)
        self._n_coef = self.n_arms * self._width
        self._W = self.covariates[:, :len(self._covs)] if self._covs else np.zeros((n, 0))
        self._rows = _Rows(self._n_coef)
        self._ids = tuple(str(i) for i in range(n))
        self._sampler = None
        self._draws: list[_PopulationDraw] = []
        self._stale = True

    # -- data -------------------------------------------------------------
    def _model_context(self, context: np.ndarray) -> np.ndarray:
        context = np.asarray(context, dtype=float).reshape(len(context), -1)
        return context if self._features else context[:, :0]

    def _update(self, participant, arm, context, reward) -> None:
        self._rows.add(reward, design_rows(arm, self._model_context(context), self.n_arms), participant)
        self._stale = True

    def model_data(self) -> ModelData:
        """The observed rewards as :class:`~poolbandit.models.data.ModelData` (roster = positions)."""
        y, X, g = self._rows.arrays()
        return ModelData(
            y=y, X=X, group=g, W=self._W, participants=self._ids,
            coef=tuple(coef_names(self.design.arms, self._features)), covariates=self._covs,
            outcome=self.design.study.outcome, arms=tuple(self.design.arms), features=self._features,
        )

    # -- posterior ----------------------------------------------------------
    @property
    def sampler(self):
        """The warm-started :class:`~poolbandit.models.gibbs.GibbsSampler` (None before the first fit)."""
        return self._sampler

    @property
    def retained_draws(self) -> list[_PopulationDraw]:
        """The population draws the current probabilities average over (after the last fit)."""
        return list(self._draws)

    def _fit(self, rng: np.random.Generator | None) -> None:
        """Update the posterior with the rewards that arrived since the last fit."""
        if not self._stale and self._sampler is not None:
            return
        from ..models.gibbs import GibbsSampler

        data = self.model_data()
        keep = int(self.params.get("population_draws", 4))
        if self._sampler is None:
            seed = spawn(rng if rng is not None else _FALLBACK_SEED, 1)[0]
            self._sampler = GibbsSampler(data, self.design.priors, rng=seed, init="prior")
            total = int(self.params.get("burn_in", 100))
        else:
            self._sampler.set_data(data)
            total = int(self.params.get("sweeps", 5))
        self._sampler.sweep(max(total - keep, 0))
        draws = []
        for _ in range(keep):
            self._sampler.sweep(1)
            draws.append(self._record())
        self._draws = draws
        self._stale = False

    def _record(self) -> _PopulationDraw:
        st = self._sampler.state
        A, b = self._sampler.likelihood_stats()
        n, k, d = self.n_participants, self.n_arms, self._width
        if st.corr_chol is None:
            blocks = np.einsum("nkakb->nkab", A.reshape(n, k, d, k, d)).copy()
            draw = _PopulationDraw(st.beta.copy(), st.gamma.copy(), st.tau.copy(), blocks, b.reshape(n, k, d).copy())
        else:
            draw = _PopulationDraw(st.beta.copy(), st.gamma.copy(), st.tau.copy(), A.copy(), b.copy(),
                                   st.chol_sigma.copy())
        if self.params.get("population_mean", "integrated") == "integrated":
            draw = replace(draw, **dict(zip(("mean", "cov"), self._integrated(draw))))
        return draw

    def _integrated(self, draw: _PopulationDraw) -> tuple[np.ndarray, np.ndarray]:
        """Moments of every participant's coefficients given the draw's scales (beta, Gamma integrated out)."""
        n, k, d = self.n_participants, self.n_arms, self._width
        Z = np.concatenate([np.ones((n, 1)), self._W], axis=1)
        pr = self.design.priors
        if draw.L is None:
            L = np.zeros((k, d, d))
            L[:, np.arange(d), np.arange(d)] = draw.tau.reshape(k, d)
            mean, cov = _integrated_moments(draw.A, draw.b, L, Z, pr.beta_sd, pr.gamma_sd)
            return mean.reshape(n, -1), cov
        mean, cov = _integrated_moments(draw.A[:, None], draw.b[:, None], draw.L[None], Z, pr.beta_sd, pr.gamma_sd)
        return mean[:, 0], cov[:, 0]

    def conditional(self, draw: _PopulationDraw, participant: np.ndarray):
        """Coefficients of ``participant`` given one population draw: mean (n, P) and covariance.

        Given all the draw's population parameters, its ``beta`` and ``Gamma``
        included. The covariance is (n, K, d, d) arm blocks for a diagonal
        ``Sigma`` (``d = 1 + F``), else (n, P, P).
        """
        participant = np.asarray(participant)
        n, k, d = len(participant), self.n_arms, self._width
        m = draw.beta + self._W[participant] @ draw.gamma.T  # (n, P)
        if draw.L is None:
            L = np.zeros((k, d, d))
            L[:, np.arange(d), np.arange(d)] = draw.tau.reshape(k, d)
            mean, cov = _gaussian_conditional(draw.A[participant], draw.b[participant], m.reshape(n, k, d), L)
            return mean.reshape(n, -1), cov
        return _gaussian_conditional(draw.A[participant], draw.b[participant], m, draw.L)

    def moments(self, draw: _PopulationDraw, participant: np.ndarray):
        """The coefficient moments the policy acts on: :meth:`conditional`, or with
        ``population_mean = "integrated"`` (the default) the same with ``beta`` and ``Gamma``
        integrated out given the draw's scales (:func:`_integrated_moments`)."""
        if draw.mean is None:
            return self.conditional(draw, participant)
        participant = np.asarray(participant)
        return draw.mean[participant], draw.cov[participant]

    def arm_value_moments(self, draw: _PopulationDraw, participant: np.ndarray, context: np.ndarray):
        """Mean (n, K) and covariance (n, K) variances or (n, K, K) of the arm values in ``context``
        (from :meth:`moments`)."""
        participant = np.asarray(participant)
        if draw.L is None and self._width == 1:  # arm levels only: scalar blocks, no batched algebra
            if draw.mean is not None:
                return draw.mean[participant], draw.cov[participant, :, 0, 0]
            a, b = draw.A[participant, :, 0, 0], draw.b[participant, :, 0]
            m = draw.beta + self._W[participant] @ draw.gamma.T
            t2 = draw.tau**2
            var = t2 / (1.0 + t2 * a)
            return m + var * (b - a * m), var
        mean, cov = self.moments(draw, participant)
        z = np.concatenate([np.ones((len(participant), 1)), self._model_context(context)], axis=1)  # (n, d)
        n, k, d = len(participant), self.n_arms, self._width
        mv = np.einsum("nkd,nd->nk", mean.reshape(n, k, d), z)
        if draw.L is None:
            return mv, np.einsum("na,nkab,nb->nk", z, cov, z)
        R = arm_rows(self._model_context(context), k)  # (n, K, P)
        return mv, np.einsum("nkp,npq,njq->nkj", R, cov, R)

    # -- policy -------------------------------------------------------------
    def _prior_only(self, batch: Batch) -> np.ndarray | None:
        """The uniform table while nothing has been observed, else None.

        Before the first reward the posterior is the prior, and the prior is
        the same for every arm (one ``beta_sd``, one ``tau_scale``), so by
        symmetry every arm is equally likely to be best (and ties under every
        index rule of :mod:`~poolbandit.policies.horizon`). The exact table is
        uniform; computed from a few prior draws of the heterogeneity scales
        it would only carry their Monte Carlo chance, which a deterministic
        index rule turns into sending the whole first cohort to one arm.
        """
        if self._rows.n:
            return None
        return np.full((len(batch), self.n_arms), 1.0 / self.n_arms)

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        uniform = self._prior_only(batch)
        if uniform is not None:
            return uniform
        self._fit(rng)
        p = np.zeros((len(batch), self.n_arms))
        for draw in self._draws:
            mv, cv = self.arm_value_moments(draw, batch.participant, batch.context)
            if draw.L is None:
                p += prob_best_normal(mv, np.sqrt(np.maximum(cv, 0.0)))
            else:
                p += prob_best_correlated(mv, cv)
        return p / len(self._draws)

    def _exploit_index(self, participant, context) -> np.ndarray:
        self._fit(None)
        return sum(self.arm_value_moments(d, participant, context)[0] for d in self._draws) / len(self._draws)

    def effect_draws(self, ids: list[str], draws: int, rng: np.random.Generator, *, thin: int = 1,
                     scale: str | None = None) -> xr.DataArray:
        """Posterior draws of every participant's arm effects at the reference context.

        Continues a copy of the warm-started sampler (the policy's own chain
        is not advanced): after every ``thin`` sweeps, each participant's
        coefficients are drawn from their Gaussian full conditional with
        ``rng``. Dims (chain, draw, participant, arm), one chain, like
        :meth:`ThompsonPolicy.effect_draws
        <poolbandit.policies.thompson.ThompsonPolicy.effect_draws>`.
        ``scale`` defaults to the expected reward: ``probability`` for a
        bernoulli outcome (logistic of the linear predictor), else ``linear``.
        """
        rng = as_generator(rng)
        self._fit(rng)
        chain = copy.deepcopy(self._sampler)
        n, k = self.n_participants, self.n_arms
        rows = arm_rows(np.zeros((1, len(self._features))), k)[0]  # (K, P)
        out = np.empty((draws, n, k))
        for j in range(draws):
            chain.sweep(thin)
            mean, factor = chain.theta_conditional()
            theta = mean + np.einsum("npq,nq->np", factor, rng.standard_normal(mean.shape))
            out[j] = theta @ rows.T
        return _effects_array(_scale_values(out, scale, self.design.study.outcome), ids, self.design.arms)


# --------------------------------------------------------------------------
# Complete pooling
# --------------------------------------------------------------------------
class CompletePoolingThompsonPolicy(Policy):
    """Thompson sampling with one set of arm effects shared by everyone.

    * gaussian: Bayesian linear regression of the reward on the design row
      ``onehot(arm) (x) [1, context]`` (arm indicators only with
      ``context = false``), prior ``N(prior_mean, prior_sd^2)`` on every arm
      level and ``N(0, prior_sd^2)`` on every interaction, known noise sd
      ``noise_sd``; conjugate normal posterior (BDA3 section 14.2). The prior
      and the design are block-diagonal by arm, so the arm values in a given
      context are independent normals and the probability that each is best
      is computed by quadrature.
    * bernoulli: ``Beta(prior_alpha, prior_beta)`` per arm, shared by
      everyone; the context is not modelled (no conjugate form with a logit
      link).
    """

    kind = "complete-pooling-thompson"

    def _start(self) -> None:
        self._features = tuple(self.design.features) if self.params.get("context", True) else ()
        self._width = 1 + len(self._features)
        P = self.n_arms * self._width
        self._xtx = np.zeros((P, P))
        self._xty = np.zeros(P)
        self._success = np.zeros(self.n_arms)
        self._count = np.zeros(self.n_arms)
        self._bernoulli = self.design.study.outcome == "bernoulli"

    def _model_context(self, context: np.ndarray) -> np.ndarray:
        context = np.asarray(context, dtype=float).reshape(len(context), -1)
        return context if self._features else context[:, :0]

    def _update(self, participant, arm, context, reward) -> None:
        x = design_rows(arm, self._model_context(context), self.n_arms)
        self._xtx += x.T @ x
        self._xty += x.T @ reward
        np.add.at(self._success, arm, reward)
        np.add.at(self._count, arm, 1.0)

    def posterior(self) -> tuple[np.ndarray, np.ndarray]:
        """Mean (P,) and covariance (P, P) of the shared coefficients (gaussian)."""
        p = self.params
        P = len(self._xty)
        m0 = np.zeros(P)
        m0[::self._width] = p.get("prior_mean", 0.0)
        prec0 = 1.0 / p["prior_sd"] ** 2
        prec = prec0 * np.eye(P) + self._xtx / p["noise_sd"] ** 2
        cov = np.linalg.inv(prec)
        cov = 0.5 * (cov + cov.T)
        return cov @ (prec0 * m0 + self._xty / p["noise_sd"] ** 2), cov

    def _beta_posterior(self):
        p = self.params
        return stats.beta(p.get("prior_alpha", 1.0) + self._success,
                          p.get("prior_beta", 1.0) + self._count - self._success)

    def _moments(self, context: np.ndarray):
        mean, cov = self.posterior()
        R = arm_rows(self._model_context(context), self.n_arms)  # (n, K, P)
        return R @ mean, np.einsum("nkp,pq,nkq->nk", R, cov, R)

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        n = len(batch)
        if self._bernoulli:
            return np.repeat(prob_best(_beta_rows(self._beta_posterior())), n, axis=0)
        ctx = self._model_context(batch.context)
        uniq, inverse = np.unique(ctx, axis=0, return_inverse=True)
        mv, vv = self._moments(uniq)
        return prob_best_normal(mv, np.sqrt(np.maximum(vv, 0.0)))[np.ravel(inverse)]

    def _exploit_index(self, participant, context) -> np.ndarray:
        if self._bernoulli:
            return np.broadcast_to(self._beta_posterior().mean(), (len(participant), self.n_arms))
        return self._moments(context)[0]

    def effect_draws(self, ids: list[str], draws: int, rng: np.random.Generator, *,
                     scale: str | None = None) -> xr.DataArray:
        """Posterior draws of the shared arm effects at the reference context, the same for every participant.

        Dims (chain, draw, participant, arm), one chain; exact draws from the
        conjugate posterior. Bernoulli: arm probabilities (``scale`` is then
        ignored); gaussian: ``scale`` as in :meth:`PooledThompsonPolicy.effect_draws`.
        """
        rng = as_generator(rng)
        n, k = self.n_participants, self.n_arms
        if self._bernoulli:
            shared = self._beta_posterior().rvs(size=(draws, k), random_state=rng)
        else:
            mean, cov = self.posterior()
            coef = rng.multivariate_normal(mean, cov, size=draws, method="cholesky")
            shared = coef @ arm_rows(np.zeros((1, len(self._features))), k)[0].T
            shared = _scale_values(shared, scale, "gaussian")
        return _effects_array(np.broadcast_to(shared[:, None, :], (draws, n, k)).copy(), ids, self.design.arms)


def _beta_rows(dist):
    """A frozen beta with parameters of shape (1, K)."""
    return stats.beta(np.asarray(dist.args[0])[None], np.asarray(dist.args[1])[None])


# --------------------------------------------------------------------------
# No pooling, true prior (simulation only)
# --------------------------------------------------------------------------
class OraclePriorThompsonPolicy(Policy):
    """Each participant alone, with the true population distribution as prior (simulation only).

    The prior of participant ``i``'s level on arm ``k`` is the design's
    ``[population]``: ``N(mu_k + Gamma_k w_i, arm_sd_k^2)`` with ``mu`` the
    arm means; the arm-by-context effects (the same for everyone in the
    simulator) and the noise sd ``noise_sd`` are known. Each arm's level then
    has a conjugate normal posterior.

    With latent types the true prior is a mixture over types, which correlates
    a participant's arms (the type moves them together). This is handled
    exactly: the posterior is a mixture over types with weights
    ``share_t * prod_k N(ybar_ik; mu_tk + Gamma_k w_i, arm_sd_k^2 + noise_sd^2 / n_ik)``
    (the marginal likelihood of the arm means), the arms are independent
    normals within a type, and the probability that each arm is best is the
    weight-averaged quadrature over types.

    Only gaussian outcomes are supported (a logit link has no conjugate form);
    a bernoulli design raises ``ValueError``. ``context = false`` ignores the
    context effects (their contribution is then treated as noise).
    """

    kind = "oracle-prior-thompson"
    needs_truth = True

    def __init__(self, spec, design, *, truth=None):
        super().__init__(spec, design, truth=truth)
        if design.study.outcome != "gaussian":
            raise ValueError("policy kind 'oracle-prior-thompson' supports gaussian outcomes only")

    def _start(self) -> None:
        pop = self.design.population
        k, f = self.n_arms, self.n_features
        q = len(self.design.covariates)
        if pop.types:
            self._type_means = np.array([t.arm_means for t in pop.types])  # (T, K)
            shares = np.array([t.share for t in pop.types])
            self._log_share = np.log(shares / shares.sum())
        else:
            self._type_means = np.array(pop.arm_means, dtype=float)[None]
            self._log_share = np.zeros(1)
        self._sd = np.array(pop.arm_sd, dtype=float)
        self._noise = float(pop.noise_sd)
        self._use_context = bool(self.params.get("context", True))
        self._ctx_effect = np.array(pop.context_effects, dtype=float).reshape(k, f)
        gamma = np.array(pop.covariate_effects, dtype=float).reshape(k, q)
        self._shift = self.covariates[:, :q] @ gamma.T if q else np.zeros((self.n_participants, k))
        self._n = np.zeros((self.n_participants, k))
        self._sum = np.zeros((self.n_participants, k))

    def _offset(self, context: np.ndarray) -> np.ndarray:
        """Known context part of each arm's value, (n, K)."""
        if not self._use_context or self.n_features == 0:
            return np.zeros((len(context), self.n_arms))
        return np.asarray(context, dtype=float).reshape(len(context), -1) @ self._ctx_effect.T

    def _update(self, participant, arm, context, reward) -> None:
        off = self._offset(context)[np.arange(len(arm)), arm]
        np.add.at(self._n, (participant, arm), 1.0)
        np.add.at(self._sum, (participant, arm), reward - off)

    def posterior(self, participant: np.ndarray):
        """Type weights (n, T), level means (T, n, K) and sds (n, K) of the arm levels."""
        participant = np.asarray(participant)
        n, total = self._n[participant], self._sum[participant]
        prior_mean = self._type_means[:, None, :] + self._shift[participant][None]  # (T, n, K)
        s2 = self._sd**2
        s2n = self._noise**2
        with np.errstate(divide="ignore", invalid="ignore"):
            # precision form; a zero prior sd pins the level to its prior mean
            prec = np.where(s2 > 0, 1.0 / np.where(s2 > 0, s2, 1.0), np.inf) + n / s2n
            post_var = np.where(np.isinf(prec), 0.0, 1.0 / prec)
            mean = np.where(s2 > 0, post_var * (prior_mean / np.where(s2 > 0, s2, 1.0) + total / s2n), prior_mean)
            ybar = np.where(n > 0, total / np.maximum(n, 1.0), 0.0)
            marg_sd = np.sqrt(s2 + s2n / np.maximum(n, 1.0))
            loglik = np.where(n > 0, stats.norm.logpdf(ybar, prior_mean, marg_sd), 0.0).sum(axis=2)  # (T, n)
        logw = self._log_share[:, None] + loglik
        w = np.exp(logw - logsumexp(logw, axis=0, keepdims=True)).T  # (n, T)
        return w, mean, np.sqrt(post_var)

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        w, mean, sd = self.posterior(batch.participant)
        off = self._offset(batch.context)
        p = np.zeros((len(batch), self.n_arms))
        for t in range(len(mean)):
            p += w[:, t:t + 1] * prob_best_normal(mean[t] + off, sd)
        return p / p.sum(axis=1, keepdims=True)

    def _exploit_index(self, participant, context) -> np.ndarray:
        w, mean, _ = self.posterior(participant)
        return np.einsum("nt,tnk->nk", w, mean) + self._offset(context)

    def effect_draws(self, ids: list[str], draws: int, rng: np.random.Generator) -> xr.DataArray:
        """Exact posterior draws of every participant's arm levels (reference context).

        The type is drawn from its posterior weights for every draw and
        participant, then the levels from the normal posterior of that type.
        Dims (chain, draw, participant, arm), one chain.
        """
        rng = as_generator(rng)
        n = self.n_participants
        w, mean, sd = self.posterior(np.arange(n))
        cum = np.cumsum(w, axis=1)
        u = rng.random((draws, n, 1))
        t = np.minimum((u > cum[None]).sum(axis=2), len(mean) - 1)  # (draws, n)
        mu = mean[t, np.arange(n)[None, :]]  # (draws, n, K)
        values = mu + sd[None] * rng.standard_normal((draws, n, self.n_arms))
        return _effects_array(values, ids, self.design.arms)
