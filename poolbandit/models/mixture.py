r"""The fast engine for a finite-mixture (latent-class) population.

Model
-----
The likelihood is that of :mod:`.gibbs` (gaussian or bernoulli outcome,
``y_it = x_it' theta_i + e_it``); the population of ``theta_i`` is a mixture
of ``C`` normal distributions that share their covariance:

.. math::

    z_i \sim \mathrm{Categorical}(\pi), \qquad
    \pi \sim \mathrm{Dirichlet}(\alpha, \dots, \alpha), \qquad
    \theta_i \mid z_i \sim N(\mu_{z_i} + \Gamma w_i, \Sigma),

component means drawn around a common centre,

.. math::

    \mu_{cp} \sim N(\mu_{0p}, \omega_p^2), \qquad
    \mu_{0p} \sim N(0, \text{beta\_sd}^2), \qquad
    \omega_p \sim \text{the prior of } \tau_p,

and ``Gamma``, ``Sigma = diag(tau) R diag(tau)`` and the noise with the
priors of the normal population model (:class:`~poolbandit.spec.PriorSpec`:
``C = components``, ``alpha = mixture_concentration``; ``omega_p`` has the
half-normal or half-Cauchy prior of scale ``tau_scale``). The population mean
``beta = sum_c pi_c mu_c`` is reported as ``beta``, so every consumer of the
normal model's ``beta`` keeps working; ``weight (component)`` holds ``pi``,
``component_mean (component, coef)`` the ``mu_c``, ``component_center
(coef)`` and ``component_sd (coef)`` ``mu_0`` and ``omega``. Every
coefficient must vary between participants (a coefficient shared by
everyone would be a discrete mixture, not a density).

Why a common centre: with independent ``mu_cp ~ N(0, beta_sd^2)`` (``beta_sd``
wide enough for the outcome's location, 3 in the calibration scenario) each
extra occupied component pays an Occam factor of about the prior density
times the posterior width per coefficient (``log`` about ``-4`` per
coefficient with 20 members), so the posterior merges types that the data
do separate; the centre and spread put the component means on the scale of
the differences between types. Measured in
``benchmarks/classification_calibration.py`` (fast engine, 20 replicates
of the latent-types scenario, four components, concentration 1): reliability
0.0207 and Brier unpooled - pooled +0.0005 (SE 0.0037) with independent
``N(0, 3^2)`` component means; 0.0187 and +0.0050 (SE 0.0034) with the
common centre (the normal population model: 0.0355 and -0.0103).

Sampler
-------
:class:`MixtureGibbsSampler` extends the normal model's partially collapsed
Gibbs sampler (:class:`~.gibbs.GibbsSampler`). Given the labels, the model is
the normal model with participant prior means ``m_i = mu_{z_i} + Gamma w_i``,
which the base class's scale updates already take per participant. Each
sweep:

1. the labels ``z_i``, gaussian outcome: with ``theta_i`` integrated out,
   participant ``i``'s likelihood is Gaussian in its prior mean ``m`` with
   precision ``P_i = A_i - A_i M_i A_i`` and linear term ``c_i = b_i - A_i
   M_i b_i`` (``M_i = (Sigma^{-1} + A_i)^{-1}``, computed through ``L`` with
   ``Sigma = L L'`` so that nothing inverts ``Sigma``), so

   .. math::

       \log p(z_i = c \mid \cdot) = \log \pi_c - m_{ic}' P_i m_{ic} / 2
       + m_{ic}' c_i + \mathrm{const},

   vectorised over participants and components; bernoulli outcome: given
   ``theta_i`` (the Polya-Gamma weights are drawn from ``theta`` next, so the
   labels must be drawn jointly with, or given, ``theta``);
2. ``pi | z ~ Dirichlet(alpha + counts)``;
3. the heterogeneity scales and the noise sd (theta integrated out), as in
   the base class;
4. ``(mu_1..mu_C, Gamma)`` jointly from their Gaussian conditional with theta
   integrated out: the base class's joint update of ``(beta, Gamma)`` with
   the participant design row ``(onehot(z_i), w_i)`` instead of ``(1, w_i)``
   and the prior ``N(mu_0, diag(omega^2))`` of each ``mu_c``;
5. every ``theta_i`` from its Gaussian full conditional;
6. each ``log omega_p`` by slice sampling with ``mu_0`` integrated out (the
   ``C`` values ``mu_.p`` are ``N(0, omega_p^2 I + beta_sd^2 11')``), then
   ``mu_0 | mu, omega`` (normal).

Steps 1-4 and 6 (gaussian) sample the posterior of everything but ``theta`` by
Gibbs steps on conditionals with ``theta`` integrated out, and step 5
completes the draw (van Dyk and Park [2]_), as in the normal model.

Chains start from the data: rough per-participant estimates (a ridge fit,
prior ``N(0, I)`` around the mean of all estimates) are split into ``C``
groups by k-means++ seeding (Arthur and Vassilvitskii [3]_), one seeding per
chain from its own stream, and the component means start at the seeds. A
component mean drawn from its prior far from the data rarely captures
participants again, so a data-based start matters more here than in the
normal model.

Label switching: the labels of the components are not identified (the
likelihood and the priors are symmetric in them). The sampler does not
relabel: ``theta``, ``beta``, ``tau``, ``sigma``, ``Gamma``, sorted weights
and every category probability are invariant to the labels and are the
quantities to read; ``weight`` and ``component_mean`` per label are reported
as sampled (chains may use different labels, so their R-hat can be large).

References
----------
.. [1] Diebolt, J. and Robert, C. P. (1994). Estimation of finite mixture
   distributions through Bayesian sampling. *Journal of the Royal Statistical
   Society B* 56(2), 363-375. doi:10.1111/j.2517-6161.1994.tb01985.x
.. [2] van Dyk, D. A. and Park, T. (2008). Partially collapsed Gibbs samplers:
   theory and methods. *JASA* 103(482), 790-796. doi:10.1198/016214508000000409
.. [3] Arthur, D. and Vassilvitskii, S. (2007). k-means++: the advantages of
   careful seeding. *Proceedings of the 18th ACM-SIAM Symposium on Discrete
   Algorithms*, 1027-1035.
"""

from __future__ import annotations

from typing import Literal

import numpy as np

from .._random import RngLike
from ..spec import PriorSpec
from . import _gibbs_math as gm
from .data import ModelData
from .gibbs import GibbsSampler

__all__ = ["MixtureGibbsSampler", "sample_mixture"]



class MixtureGibbsSampler(GibbsSampler):
    """Partially collapsed Gibbs sampler of the mixture population model (see module docstring).

    Parameters
    ----------
    data : ModelData
        Outcomes, design rows, participants and covariates; every coefficient
        must vary between participants (``data.random`` all true).
    priors : PriorSpec
        Prior scales; ``components`` and ``mixture_concentration`` set the
        mixture (``population`` itself is not read: this class is the mixture).
    rng : Generator, int or None
    init : {"prior", "dispersed"}, default="prior"
        Start of the scales and of ``Gamma`` (see :class:`~.gibbs.GibbsSampler`);
        the component means and labels always start from the data (module docstring).
    """

    _PROGRESS = "fast engine (mixture)"

    def _extra_draws(self) -> dict:
        return {"weight": (self._pi, ["component"]), "component_mean": (self._mu, ["component", "coef"]),
                "component_center": (self._mu0, ["coef"]), "component_sd": (self._spread, ["coef"])}

    def _extra_coords(self) -> dict:
        return {"component": list(range(self._K))}

    def _extra_attrs(self) -> dict:
        return {"population": "mixture", "components": self._K}

    def _setup(self, data: ModelData, priors: PriorSpec, rngs: list, init: str) -> None:
        if not np.all(np.asarray(data.random, dtype=bool)):
            raise ValueError("the mixture population model needs every coefficient to vary between participants "
                             "(data.random all true)")
        K = int(priors.components)
        if K < 2:
            raise ValueError(f"priors.components must be an integer >= 2 for a mixture; got {priors.components!r}")
        self._K = K
        self._alpha = float(priors.mixture_concentration)
        super()._setup(data, priors, rngs, init)

    # ------------------------------------------------------------------
    # Data and state
    # ------------------------------------------------------------------
    def _prepare(self, data: ModelData, old: ModelData | None = None) -> None:
        super()._prepare(data, old)
        N = data.n_participants
        self._W = np.asarray(data.W, dtype=float)
        # the base class reads only the width of its design of prior means: more than one column means
        # "general per-participant prior means" (the scalar path then calls _update_mean and _mean)
        self._Z = np.ones((N, self._K + self._W.shape[1]))
        z = getattr(self, "_z", None)
        if z is not None and z.shape[1] < N:  # set_data with new participants: labels from the weights
            new = np.stack([_categorical(np.broadcast_to(pi, (N - z.shape[1], self._K)), r)
                            for pi, r in zip(self._pi, self._rngs)])
            self._z = np.concatenate([z, new], axis=1)

    def _init_state(self, init: str) -> None:
        data, K = self._data, self._K
        N, P = data.n_participants, data.n_coef
        est = self._rough_estimates()  # (N, P)
        mus, zs, pis = [], [], []
        for rng in self._rngs:
            centres = _kmeans_pp(est, K, rng, fallback_sd=self.priors.beta_sd)
            z = np.argmin(((est[:, None, :] - centres[None]) ** 2).sum(-1), axis=1) if N else np.zeros(0, int)
            counts = np.bincount(z, minlength=K)
            pis.append(rng.dirichlet(self._alpha + counts))
            mus.append(centres)
            zs.append(z)
        self._mu = np.array(mus).reshape(self._C, K, P)
        self._mu0 = self._mu.mean(axis=1)
        self._spread = np.maximum(self._mu.std(axis=1), 0.1 * self.priors.tau_scale)
        self._pi = np.array(pis)
        self._z = np.array(zs, dtype=np.int64).reshape(self._C, N)
        super()._init_state(init)  # scales, Gamma, sigma and theta (around _mean()); beta is replaced
        self._set_beta()

    def _rough_estimates(self) -> np.ndarray:
        """Per-participant ridge estimates ``(S_i + I)^{-1} (s_i + mbar)`` around the mean ``mbar`` of first passes.

        Gaussian: ``S_i = X_i'X_i``, ``s_i = X_i'y_i`` (weighted with a known
        noise sd). Bernoulli: ``S_i = X_i'X_i / 4`` (the Polya-Gamma weight at
        ``x'theta = 0``), ``s_i = X_i'(y_i - 1/2)``.
        """
        N, P = self._s.shape
        if self._data.outcome == "gaussian":
            S = self._S
        else:
            outer = (self._cell_X[:, :, None] * self._cell_X[:, None, :]).reshape(len(self._cell_X), P * P)
            S = np.asarray(self._G @ (outer * self._cell_h[:, None])).reshape(N, P, P) / 4.0
        eye = np.eye(P)
        first = np.linalg.solve(S + eye, self._s[..., None])[..., 0]
        mbar = first.mean(axis=0) if N else np.zeros(P)
        return np.linalg.solve(S + eye, (self._s + mbar)[..., None])[..., 0]

    def _mean(self) -> np.ndarray:
        """``m_i = mu_{z_i} + Gamma w_i`` per chain: (chain, N, P)."""
        m = np.take_along_axis(self._mu, self._z[:, :, None], axis=1)
        if self._W.shape[1]:
            m = m + np.einsum("nq,cpq->cnp", self._W, self._gamma)
        return m

    def _set_beta(self) -> None:
        self._beta = np.einsum("ck,ckp->cp", self._pi, self._mu)

    @property
    def weights(self) -> np.ndarray:
        """Mixture weights ``pi`` of the first chain: (C,)."""
        return self._pi[0]

    @property
    def component_means(self) -> np.ndarray:
        """Component means ``mu`` of the first chain: (C, P)."""
        return self._mu[0]

    @property
    def labels(self) -> np.ndarray:
        """Component labels ``z`` of the first chain: (N,)."""
        return self._z[0]

    # ------------------------------------------------------------------
    # The sweep
    # ------------------------------------------------------------------
    def _sweep(self) -> None:
        self._update_labels()
        self._pi = np.stack([r.dirichlet(self._alpha + np.bincount(z, minlength=self._K))
                             for z, r in zip(self._z, self._rngs)])
        super()._sweep()
        self._update_center()
        self._set_beta()

    def _update_center(self) -> None:
        """``log omega_p`` (``mu_0`` integrated out) by slice sampling, then ``mu_0 | mu, omega``."""
        C, K, P = self._mu.shape
        b2 = self.priors.beta_sd ** 2
        mbar = self._mu.mean(axis=1)  # (chain, P)
        ss = np.sum((self._mu - mbar[:, None, :]) ** 2, axis=1)  # (chain, P)
        prior = self._log_prior_tau

        def logf(x):  # x (m, chain * P), chain-major
            xx = x.reshape(x.shape[0], C, P)
            o2 = np.exp(2.0 * xx)
            v = o2 + K * b2  # variance along the mean direction
            out = (-(K - 1) * xx - 0.5 * np.log(v) - 0.5 * ss / o2 - 0.5 * K * mbar ** 2 / v
                   + prior(np.exp(xx)) + xx)
            return out.reshape(x.shape)

        x, k = gm.slice_step_vec(np.log(self._spread).ravel(), logf, self._rngs)
        self._count(k)
        self._spread = np.exp(x).reshape(C, P)
        prec = K / self._spread ** 2 + 1.0 / b2
        e = np.stack([r.standard_normal(P) for r in self._rngs])
        self._mu0 = (K * mbar / self._spread ** 2) / prec + e / np.sqrt(prec)

    def _label_loglik(self) -> np.ndarray:
        """``log p(data_i or theta_i | z_i = c, ...)`` up to a constant in ``c``: (chain, N, C)."""
        C, N, P = self._theta.shape
        K = self._K
        m = self._mu[:, None, :, :]  # (chain, 1, K, P)
        if self._W.shape[1]:
            m = m + np.einsum("nq,cpq->cnp", self._W, self._gamma)[:, :, None, :]
        m = np.broadcast_to(m, (C, N, K, P))
        if self._data.outcome == "gaussian":  # theta integrated out
            out = np.zeros((C, N, K))
            for grp, (A, b) in zip(self._groups, self._group_Ab()):
                Pg, cg = gm.group_mean_precision(A, b, self._group_L(grp))  # (chain|1, N, B, k, k), (.., k)
                mg = m[..., grp.idx]  # (chain, N, K, B, k)
                if grp.k == 1:
                    mg = mg[..., 0]
                    out += np.sum(mg * (cg[:, :, None, :, 0] - 0.5 * Pg[:, :, None, :, 0, 0] * mg), axis=-1)
                else:
                    Pm = (Pg[:, :, None] @ mg[..., None])[..., 0]
                    out += np.sum(mg * (cg[:, :, None] - 0.5 * Pm), axis=(-1, -2))
            return out
        # given theta: the normal density of theta_i under each component (shared Sigma = L L')
        L = self._L()  # (chain, P, P), lower triangular
        d = self._theta[:, :, None, :] - m  # (chain, N, K, P)
        if self._corr_chol is None:
            r = d / self._tau[:, None, None, :]
        else:
            r = np.linalg.solve(L[:, None, None], d[..., None])[..., 0]
        return -0.5 * np.sum(r * r, axis=-1)

    def _update_labels(self) -> None:
        logp = self._label_loglik() + np.log(self._pi)[:, None, :]
        logp -= logp.max(axis=-1, keepdims=True)
        prob = np.exp(logp)
        prob /= prob.sum(axis=-1, keepdims=True)
        self._z = np.stack([_categorical(p, r) for p, r in zip(prob, self._rngs)])

    def _update_mean(self, Abs, Ls) -> None:
        """``(mu_1..mu_C, Gamma)`` jointly, theta integrated out: design rows ``(onehot(z_i), w_i)`` per chain."""
        C, N, P = self._theta.shape
        K, Q = self._K, self._W.shape[1]
        a = K + Q
        D = a * P
        Pm, cm = self._mean_terms(Abs, Ls)
        onehot = np.eye(K)[self._z]  # (chain, N, K)
        if Q:
            Z = np.concatenate([onehot, np.broadcast_to(self._W, (C, N, Q))], axis=2)
            zz = (Z[..., :, None] * Z[..., None, :]).reshape(C, N, a * a)
            prec = np.einsum("cnz,cnf->czf", zz, Pm)
        else:  # block diagonal: each component's sum of its participants' precisions
            Z = onehot
            prec = np.zeros((C, K, K, P * P))
            blocks = np.einsum("cnk,cnf->ckf", onehot, Pm)
            prec[:, np.arange(K), np.arange(K)] = blocks
        prec = prec.reshape(C, a, a, P, P).transpose(0, 1, 3, 2, 4).reshape(C, D, D)
        lin = np.einsum("cna,cnp->cap", Z, cm).reshape(C, D)
        w_mu = np.broadcast_to((self._spread ** -2.0)[:, None, :], (C, K, P)).reshape(C, K * P)
        prior = np.concatenate([w_mu, np.full((C, D - K * P), self.priors.gamma_sd ** -2.0)], axis=1)
        prec[:, np.arange(D), np.arange(D)] += prior
        lin[:, :K * P] += (w_mu.reshape(C, K, P) * self._mu0[:, None, :]).reshape(C, K * P)
        Lp = np.linalg.cholesky(prec)
        z = np.stack([r.standard_normal(D) for r in self._rngs])
        u = np.linalg.solve(Lp, lin[..., None])[..., 0] + z
        eta = np.linalg.solve(np.swapaxes(Lp, 1, 2), u[..., None])[..., 0].reshape(C, a, P)
        self._mu = eta[:, :K].copy()
        self._gamma = np.swapaxes(eta[:, K:], 1, 2).copy()


def _categorical(prob: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One draw per row of ``prob`` (n, C) by inversion of the cumulative sums."""
    u = rng.random(prob.shape[0])
    cdf = np.cumsum(prob, axis=1)
    return np.minimum((u[:, None] * cdf[:, -1:] > cdf).sum(axis=1), prob.shape[1] - 1).astype(np.int64)


def _kmeans_pp(x: np.ndarray, k: int, rng: np.random.Generator, *, fallback_sd: float) -> np.ndarray:
    """k-means++ seeding (Arthur and Vassilvitskii 2007): ``k`` rows of ``x`` (n, P); prior draws when n < k."""
    n, P = x.shape
    if n < k:
        extra = fallback_sd * rng.standard_normal((k - n, P))
        return np.concatenate([x, extra], axis=0)
    centres = [x[rng.integers(n)]]
    d2 = ((x - centres[0]) ** 2).sum(axis=1)
    for _ in range(1, k):
        total = d2.sum()
        j = rng.integers(n) if total <= 0 else int(rng.choice(n, p=d2 / total))
        centres.append(x[j])
        d2 = np.minimum(d2, ((x - x[j]) ** 2).sum(axis=1))
    return np.array(centres)


def sample_mixture(data: ModelData, priors: PriorSpec, *, chains: int = 4, draws: int = 1000, tune: int = 500,
                   thin: int = 1, rng: RngLike = None, progress: bool = False,
                   init: Literal["prior", "dispersed"] = "dispersed"):
    """Sample the posterior of the mixture population model with the fast engine.

    Parameters are those of :func:`poolbandit.models.gibbs.sample_fast`;
    ``priors.components`` and ``priors.mixture_concentration`` set the mixture.

    Returns
    -------
    arviz.InferenceData
        ``posterior``: the variables of :func:`~.gibbs.sample_fast` (``beta``
        is the population mean ``sum_c pi_c mu_c``) plus ``weight
        (component)``, ``component_mean (component, coef)``,
        ``component_center (coef)`` and ``component_sd (coef)``, labels as
        sampled (see the module docstring on label switching);
        ``posterior.attrs["population"] = "mixture"``.
    """
    from .gibbs import sample_fast

    return sample_fast(data, priors, chains=chains, draws=draws, tune=tune, thin=thin, rng=rng, progress=progress,
                       init=init, sampler=MixtureGibbsSampler)
