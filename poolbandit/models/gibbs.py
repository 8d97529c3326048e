"""The fast engine: a vectorised, partially collapsed Gibbs sampler.

Model
-----
For participant ``i = 1..N`` with observations ``t`` (design rows ``x_it``,
``P`` coefficients, covariates ``w_i`` of length ``Q``):

.. math::

    y_{it} = x_{it}'\\theta_i + e_{it}, \\qquad
    \\theta_i = \\beta + \\Gamma w_i + b_i, \\qquad
    b_i \\sim N(0, \\Sigma), \\qquad \\Sigma = D R D, \\; D = \\mathrm{diag}(\\tau).

Outcome: gaussian, ``e_it ~ N(0, sigma^2)`` with unknown ``sigma``, or
``N(0, s_it^2)`` with known ``s_it = obs_sd`` (then ``sigma`` is not a
parameter); or bernoulli, ``P(y_it = 1) = logistic(x_it' theta_i)``.

Priors (:class:`~poolbandit.spec.PriorSpec`):

* ``beta_p ~ N(0, beta_sd^2)``; ``Gamma_pq ~ N(0, gamma_sd^2)``;
* ``tau_p ~ HalfNormal(tau_scale)`` or ``HalfCauchy(tau_scale)``
  (``tau_family``) for coefficients with ``random[p]``; ``tau_p = 0`` (one
  value shared by everyone) for the others;
* ``sigma ~ HalfNormal(sigma_scale)`` (gaussian with unknown noise);
* ``R = I`` (``covariance = "diagonal"``, the default) or ``R ~ LKJ(lkj_eta)``
  over the random coefficients (``covariance = "full"``, the separation
  strategy of Barnard, McCulloch and Meng [3]_).

Sampler
-------
Per sweep (all steps vectorised over participants):

1. bernoulli only: ``omega_it ~ PG(1, x_it' theta_i)`` (Polson, Scott and
   Windle [2]_), which turns the likelihood of ``theta_i`` into a Gaussian one
   with precision ``X_i' Omega_i X_i`` and linear term ``X_i' kappa_i``,
   ``kappa = y - 1/2``;
2. each ``log tau_p`` (and each correlation parameter, and ``log sigma``) by
   univariate slice sampling (Neal [4]_) on its conditional **with every
   theta_i integrated out**: given the population mean ``m_i = beta + Gamma
   w_i`` the participant blocks are Gaussian, so the marginal likelihood is a
   sum of per-participant terms with ``P x P`` determinants (see
   :mod:`._gibbs_math`);
3. ``(beta, Gamma)`` jointly from their Gaussian conditional, again with
   ``theta`` integrated out;
4. every ``theta_i`` from its Gaussian full conditional.

Steps 2-3 form a Gibbs sampler on the marginal posterior of the population
parameters (given ``omega``), and step 4 completes the draw: a partially
collapsed Gibbs sampler (van Dyk and Park [5]_). Because the scales are never
updated given ``theta``, the centred sampler's sticking of ``tau`` when each
participant has only one or two observations (Papaspiliopoulos, Roberts and
Skold [6]_) does not arise. Coefficient blocks that the data do not couple
(``X_i'X_i`` is block diagonal by arm for design data) are handled separately,
so updating one ``tau_p`` costs ``O(N k^3)`` for its block of size ``k``.

References
----------
.. [1] Gelman, A., Carlin, J. B., Stern, H. S., Dunson, D. B., Vehtari, A. and
   Rubin, D. B. (2013). *Bayesian Data Analysis*, 3rd ed., chapter 5. CRC Press.
.. [2] Polson, N. G., Scott, J. G. and Windle, J. (2013). Bayesian inference for
   logistic models using Polya-Gamma latent variables. *JASA* 108(504),
   1339-1349. doi:10.1080/01621459.2013.829001
.. [3] Barnard, J., McCulloch, R. and Meng, X.-L. (2000). Modeling covariance
   matrices in terms of standard deviations and correlations, with application
   to shrinkage. *Statistica Sinica* 10(4), 1281-1311.
.. [4] Neal, R. M. (2003). Slice sampling. *Annals of Statistics* 31(3),
   705-767. doi:10.1214/aos/1056562461
.. [5] van Dyk, D. A. and Park, T. (2008). Partially collapsed Gibbs samplers:
   theory and methods. *JASA* 103(482), 790-796. doi:10.1198/016214508000000409
.. [6] Papaspiliopoulos, O., Roberts, G. O. and Skold, M. (2007). A general
   framework for the parametrization of hierarchical models. *Statistical
   Science* 22(1), 59-73. doi:10.1214/088342307000000014
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from .._random import RngLike, as_generator, spawn
from ..spec import PriorSpec
from . import _gibbs_math as gm
from ._polyagamma import draw_pg
from .data import ModelData

__all__ = ["GibbsState", "GibbsSampler", "sample_fast"]

#: Prior precision used for coefficients without participant variation when a
#: caller needs ``Sigma^{-1}`` explicitly (``tau_p = 0``); see
#: :meth:`GibbsSampler.likelihood_stats`.
FIXED_PRECISION = 1e12

_INITS = ("prior", "dispersed")


@dataclass
class GibbsState:
    """One draw of the fast engine.

    Attributes
    ----------
    beta : ndarray (P,)
        Population coefficients.
    gamma : ndarray (P, Q)
        Covariate effects (``Q`` may be 0).
    tau : ndarray (P,)
        Heterogeneity scales (0 for coefficients that do not vary).
    sigma : float or None
        Noise sd (gaussian with unknown noise), else None.
    theta : ndarray (N, P)
        Every participant's coefficients.
    corr_chol : ndarray (P, P) or None
        Lower Cholesky factor of the correlation matrix ``R`` (``covariance =
        "full"``; identity rows for coefficients that do not vary), else None.
    """

    beta: np.ndarray
    gamma: np.ndarray
    tau: np.ndarray
    sigma: float | None
    theta: np.ndarray
    corr_chol: np.ndarray | None = None

    @property
    def chol_sigma(self) -> np.ndarray:
        """A factor ``L`` with ``Sigma = L L'`` (``diag(tau) corr_chol``)."""
        if self.corr_chol is None:
            return np.diag(self.tau)
        return self.tau[:, None] * self.corr_chol

    @property
    def corr(self) -> np.ndarray:
        """The correlation matrix ``R`` (identity for a diagonal covariance)."""
        if self.corr_chol is None:
            return np.eye(len(self.tau))
        return self.corr_chol @ self.corr_chol.T

    def copy(self) -> "GibbsState":
        return GibbsState(self.beta.copy(), self.gamma.copy(), self.tau.copy(), self.sigma, self.theta.copy(),
                          None if self.corr_chol is None else self.corr_chol.copy())


class GibbsSampler:
    """Partially collapsed Gibbs sampler of the hierarchical model (see module docstring).

    Parameters
    ----------
    data : ModelData
        Outcomes, design rows, participants and covariates.
    priors : PriorSpec
        Prior scales, the tau family and the covariance structure.
    rng : Generator, int or None
        Randomness of the initial state and of every sweep.
    init : {"prior", "dispersed"}, default="prior"
        ``prior``: every parameter drawn from its prior. ``dispersed``: an
        overdispersed start for convergence diagnostics (``beta, Gamma`` with
        twice the prior sd, ``tau_p`` and ``sigma`` at their prior scale times
        ``exp(N(0, 1))``); ``theta`` is then drawn from the population.

    Notes
    -----
    The sampler never modifies the arrays of a state in place: every sweep
    builds new arrays, so a :class:`GibbsState` obtained from :attr:`state`
    stays valid (it is not copied).
    """

    def __init__(self, data: ModelData, priors: PriorSpec, *, rng: RngLike = None,
                 init: Literal["prior", "dispersed"] = "prior"):
        if init not in _INITS:
            raise ValueError(f"init must be one of {list(_INITS)}; got {init!r}")
        if priors.covariance not in ("diagonal", "full"):
            raise ValueError(f"priors.covariance must be 'diagonal' or 'full'; got {priors.covariance!r}")
        if priors.tau_family not in ("half-normal", "half-cauchy"):
            raise ValueError(f"priors.tau_family must be 'half-normal' or 'half-cauchy'; got {priors.tau_family!r}")
        if data.outcome not in ("gaussian", "bernoulli"):
            raise ValueError(f"outcome must be 'gaussian' or 'bernoulli'; got {data.outcome!r}")
        if data.outcome == "bernoulli" and not np.all((data.y == 0) | (data.y == 1)):
            raise ValueError("a bernoulli outcome must be 0 or 1")
        self.priors = priors
        self._rng = as_generator(rng)
        self._full = priors.covariance == "full"
        self._sigma_free = data.outcome == "gaussian" and data.obs_sd is None
        self.n_evals = 0  # log-density evaluations in the last sweep
        self._data = data
        self._prepare(data)
        self._init_state(init)
        if data.outcome == "bernoulli":
            self._draw_omega()

    # ------------------------------------------------------------------
    # Data and sufficient statistics
    # ------------------------------------------------------------------
    @property
    def data(self) -> ModelData:
        return self._data

    def _prepare(self, data: ModelData) -> None:
        n, P = data.X.shape
        N = data.n_participants
        X, y, g = data.X, data.y, data.group
        self._random = np.asarray(data.random, dtype=bool)
        self._Z = np.concatenate([np.ones((N, 1)), data.W], axis=1)  # (N, 1+Q)
        # indicator matrix participant x observation: sums over each participant's rows
        self._G = sp.csr_matrix((np.ones(n), (g, np.arange(n))), shape=(N, n))
        outer = (X[:, :, None] * X[:, None, :]).reshape(n, P * P)
        if data.outcome == "gaussian":
            w = np.ones(n) if data.obs_sd is None else 1.0 / np.asarray(data.obs_sd, dtype=float) ** 2
            self._S = np.asarray(self._G @ (outer * w[:, None])).reshape(N, P, P)
            self._s = np.asarray(self._G @ (X * (w * y)[:, None])).reshape(N, P)
            self._yy = float(np.sum(w * y * y))
            self._n_obs = n
            self._outer = None
            pattern = np.any(self._S != 0, axis=0) if N else np.zeros((P, P), bool)
        else:
            self._kappa = y - 0.5
            self._s = np.asarray(self._G @ (X * self._kappa[:, None])).reshape(N, P)
            self._outer = outer
            pattern = (outer != 0).any(axis=0).reshape(P, P) if n else np.zeros((P, P), bool)
        if self._full:
            r = np.flatnonzero(self._random)
            pattern[np.ix_(r, r)] = True
        pattern |= np.eye(P, dtype=bool)
        n_blocks, label = connected_components(sp.csr_matrix(pattern), directed=False)
        self._blocks = [np.flatnonzero(label == j) for j in range(n_blocks)]
        self._block_of = label
        if data.outcome == "gaussian":
            self._S_blocks = [self._S[:, idx[:, None], idx[None, :]] for idx in self._blocks]
        self._s_blocks = [self._s[:, idx] for idx in self._blocks]

    def _block_Ab(self, sigma: float | None = None) -> list[tuple[np.ndarray, np.ndarray]]:
        """``(A_i, b_i)`` restricted to each coefficient block."""
        if self._data.outcome == "bernoulli":
            A = self._A_bern
            return [(A[:, idx[:, None], idx[None, :]], sb) for idx, sb in zip(self._blocks, self._s_blocks)]
        if self._sigma_free:
            s2 = (self._sigma if sigma is None else sigma) ** 2
            return [(S / s2, sb / s2) for S, sb in zip(self._S_blocks, self._s_blocks)]
        return list(zip(self._S_blocks, self._s_blocks))

    def set_data(self, data: ModelData) -> None:
        """Replace the data by a larger study log of the same study (warm start).

        ``data.participants`` must begin with the current participants in the
        same order; new ids are appended. The sufficient statistics are
        recomputed, the current state is kept, and new participants' ``theta``
        are drawn from the current population distribution ``N(beta + Gamma
        w_i, Sigma)``.
        """
        old = self._data
        N0 = old.n_participants
        if tuple(data.participants[:N0]) != tuple(old.participants):
            raise ValueError("set_data: the new participants must extend the current ones in the same order")
        if tuple(data.coef) != tuple(old.coef) or data.outcome != old.outcome:
            raise ValueError("set_data: coefficients and outcome must stay the same")
        if not np.array_equal(np.asarray(data.random, bool), self._random):
            raise ValueError("set_data: the random coefficients must stay the same")
        if (data.obs_sd is None) != (old.obs_sd is None):
            raise ValueError("set_data: obs_sd must be given for both data sets or for neither")
        self._data = data
        self._prepare(data)
        N = data.n_participants
        if N > N0:
            m_new = self._beta + self._Z[N0:, 1:] @ self._gamma.T
            z = self._rng.standard_normal((N - N0, len(self._beta)))
            self._theta = np.concatenate([self._theta, m_new + z @ self._L().T], axis=0)
        if data.outcome == "bernoulli":
            self._draw_omega()

    # ------------------------------------------------------------------
    # State
    # ------------------------------------------------------------------
    def _L(self) -> np.ndarray:
        if self._corr_chol is None:
            return np.diag(self._tau)
        return self._tau[:, None] * self._corr_chol

    @property
    def state(self) -> GibbsState:
        """The current draw (not a copy; arrays are replaced, never modified, by later sweeps)."""
        return GibbsState(self._beta, self._gamma, self._tau, self._sigma, self._theta, self._corr_chol)

    def _init_state(self, init: str) -> None:
        rng, pr, data = self._rng, self.priors, self._data
        P, Q, N = data.n_coef, len(data.covariates), data.n_participants
        spread = 2.0 if init == "dispersed" else 1.0
        self._beta = spread * pr.beta_sd * rng.standard_normal(P)
        self._gamma = spread * pr.gamma_sd * rng.standard_normal((P, Q))
        if init == "prior":
            if pr.tau_family == "half-normal":
                tau = np.abs(pr.tau_scale * rng.standard_normal(P))
            else:
                tau = np.abs(pr.tau_scale * rng.standard_cauchy(P))
            sigma = abs(pr.sigma_scale * rng.standard_normal())
        else:
            tau = pr.tau_scale * np.exp(rng.standard_normal(P))
            sigma = pr.sigma_scale * float(np.exp(rng.standard_normal()))
        self._tau = np.where(self._random, np.maximum(tau, 1e-8), 0.0)
        self._sigma = max(sigma, 1e-8) if self._sigma_free else None
        self._corr_chol = None
        self._cpc = None
        if self._full:
            d = int(self._random.sum())
            self._cpc = np.zeros(d * (d - 1) // 2)
            if init == "dispersed" and d > 1:
                self._cpc = rng.uniform(-1.0, 1.0, d * (d - 1) // 2)
            self._corr_chol = self._embed_corr(self._cpc)
        m = self._mean()
        self._theta = m + rng.standard_normal((N, P)) @ self._L().T

    def _embed_corr(self, y: np.ndarray) -> np.ndarray:
        P = len(self._random)
        r = np.flatnonzero(self._random)
        C = np.eye(P)
        C[np.ix_(r, r)] = gm.cpc_to_cholesky(np.tanh(y), len(r))
        return C

    def _mean(self) -> np.ndarray:
        return self._beta + self._Z[:, 1:] @ self._gamma.T

    # ------------------------------------------------------------------
    # Likelihood pieces
    # ------------------------------------------------------------------
    def _draw_omega(self) -> None:
        X, g = self._data.X, self._data.group
        psi = np.einsum("tp,tp->t", X, self._theta[g])
        self._omega = draw_pg(1.0, psi, self._rng)
        N, P = self._theta.shape
        self._A_bern = np.asarray(self._G @ (self._outer * self._omega[:, None])).reshape(N, P, P)

    def _Ab(self, sigma: float | None = None) -> tuple[np.ndarray, np.ndarray]:
        if self._data.outcome == "bernoulli":
            return self._A_bern, self._s
        if self._sigma_free:
            s2 = (self._sigma if sigma is None else sigma) ** 2
            return self._S / s2, self._s / s2
        return self._S, self._s

    def likelihood_stats(self) -> tuple[np.ndarray, np.ndarray]:
        """Per-participant Gaussian likelihood terms of ``theta_i``.

        Returns ``(A, b)`` with shapes (N, P, P) and (N, P) such that, given the
        population parameters of :attr:`state` (and, for bernoulli, the current
        Polya-Gamma draws), ``theta_i ~ N(Q_i^{-1} (Sigma^{-1} m_i + b_i),
        Q_i^{-1})`` with ``Q_i = Sigma^{-1} + A_i`` and ``m_i = beta + Gamma
        w_i``. Gaussian: ``A_i = X_i'X_i / sigma^2``, ``b_i = X_i'y_i /
        sigma^2`` (weights ``1 / obs_sd^2`` when the noise is known).
        Bernoulli: ``A_i = X_i' Omega_i X_i``, ``b_i = X_i' kappa_i``,
        ``kappa = y - 1/2``.

        For coefficients without participant variation (``tau_p = 0``) the
        prior precision ``Sigma^{-1}_pp`` is infinite: a caller who needs
        ``Sigma^{-1}`` explicitly uses :data:`FIXED_PRECISION` (``1e12``) on
        that diagonal entry, which pins ``theta_ip`` to ``m_ip``;
        :meth:`theta_conditional` does this exactly without inverting ``Sigma``.
        The arrays are not copies; do not modify them.
        """
        return self._Ab()

    def theta_conditional(self, A: np.ndarray | None = None, b: np.ndarray | None = None):
        """Mean and covariance factor of ``theta_i`` given the population parameters.

        Parameters
        ----------
        A, b : arrays (N, P, P) and (N, P), optional
            Likelihood terms (default :meth:`likelihood_stats`); a caller may
            add pseudo-observations.

        Returns
        -------
        mean : ndarray (N, P)
        factor : ndarray (N, P, P)
            ``F_i`` with ``Cov(theta_i) = F_i F_i'``, so ``mean + F_i e`` with
            standard normal ``e`` is a draw. Computed as ``theta_i = m_i + L
            z_i`` (``Sigma = L L'``), exact when some ``tau_p = 0``.
        """
        A0, b0 = self._Ab()
        A = A0 if A is None else A
        b = b0 if b is None else b
        m = self._mean()
        L = self._L()
        P = L.shape[0]
        C = np.linalg.cholesky(L.T @ A @ L + np.eye(P))
        r = b - np.einsum("nij,nj->ni", A, m)
        u = np.linalg.solve(C, (r @ L)[..., None])
        z = np.linalg.solve(np.swapaxes(C, 1, 2), u)[..., 0]
        Cinv_t = np.linalg.solve(np.swapaxes(C, 1, 2), np.broadcast_to(np.eye(P), C.shape))
        return m + z @ L.T, L @ Cinv_t

    def _log_prior_tau(self, t: float) -> float:
        s = self.priors.tau_scale
        if self.priors.tau_family == "half-normal":
            return -0.5 * (t / s) ** 2
        return -np.log1p((t / s) ** 2)

    # ------------------------------------------------------------------
    # The sweep
    # ------------------------------------------------------------------
    def sweep(self, n: int = 1) -> None:
        """Run ``n`` full sweeps (see the module docstring for the order of updates)."""
        for _ in range(int(n)):
            self._sweep()

    def _sweep(self) -> None:
        self.n_evals = 0
        rng = self._rng
        if self._data.outcome == "bernoulli":
            self._draw_omega()
        m = self._mean()
        blocks = [(idx, Ab, bb, m[:, idx]) for idx, (Ab, bb) in zip(self._blocks, self._block_Ab())]
        # 2a. heterogeneity scales, theta integrated out
        for p in np.flatnonzero(self._random):
            idx, Ab, bb, mb = blocks[self._block_of[p]]
            if len(idx) == 1:  # scalar block: precompute what does not move with tau_p
                a = Ab[:, 0, 0]
                r2 = (bb[:, 0] - a * mb[:, 0]) ** 2

                def logf(x, a=a, r2=r2):
                    l2 = math.exp(2.0 * x)
                    Mi = 1.0 + l2 * a
                    return (0.5 * l2 * float(np.sum(r2 / Mi)) - 0.5 * float(np.sum(np.log(Mi)))
                            + self._log_prior_tau(math.exp(x)) + x)
            else:
                j = int(np.searchsorted(idx, p))
                Cb = None if self._corr_chol is None else self._corr_chol[np.ix_(idx, idx)]
                tau_b = self._tau[idx].copy()

                def logf(x, j=j, tau_b=tau_b, Ab=Ab, bb=bb, mb=mb, Cb=Cb):
                    t = math.exp(x)
                    tau_b[j] = t
                    Lb = np.diag(tau_b) if Cb is None else tau_b[:, None] * Cb
                    return gm.block_collapsed(Ab, bb, mb, Lb) + self._log_prior_tau(t) + x

            x, k = gm.slice_step(math.log(self._tau[p]), logf, rng)
            self.n_evals += k
            tau = self._tau.copy()
            tau[p] = math.exp(x)
            self._tau = tau
        # 2b. correlations (full covariance), theta integrated out
        if self._full and len(self._cpc):
            self._update_corr(blocks)
        # 2c. noise scale, theta integrated out
        if self._sigma_free:
            self._update_sigma(m)
        Abs = self._block_Ab()
        # 3. (beta, Gamma) jointly, theta integrated out
        self._update_mean(Abs)
        # 4. theta
        m = self._mean()
        L = self._L()
        theta = np.empty_like(m)
        for idx, (Ab, bb) in zip(self._blocks, Abs):
            theta[:, idx] = gm.block_draw_theta(Ab, bb, m[:, idx], L[np.ix_(idx, idx)], rng)
        self._theta = theta

    def _update_corr(self, blocks) -> None:
        r = np.flatnonzero(self._random)
        d = len(r)
        idx, Ab, bb, mb = blocks[self._block_of[r[0]]]
        eta = self.priors.lkj_eta
        tau_b = self._tau[idx]
        P = len(self._random)
        pos = np.searchsorted(idx, r)
        for c in range(len(self._cpc)):
            y = self._cpc.copy()

            def logf(x, c=c, y=y):
                y[c] = x
                lp, Cr = gm.lkj_log_density_unconstrained(y, d, eta)
                Cb = np.eye(len(idx))
                Cb[np.ix_(pos, pos)] = Cr
                return gm.block_collapsed(Ab, bb, mb, tau_b[:, None] * Cb) + lp

            x, k = gm.slice_step(self._cpc[c], logf, self._rng)
            self.n_evals += k
            y[c] = x
            self._cpc = y
        self._corr_chol = self._embed_corr(self._cpc)
        del P

    def _update_sigma(self, m: np.ndarray) -> None:
        L = self._L()
        n_obs, yy, scale = self._n_obs, self._yy, self.priors.sigma_scale
        scalar, general = [], []
        const = 0.0  # sum_i (s_i'm_i - m_i'S_i m_i / 2): multiplies 1 / sigma^2
        for idx, S, sb in zip(self._blocks, self._S_blocks, self._s_blocks):
            mb = m[:, idx]
            Lb = L[np.ix_(idx, idx)]
            const += float(np.sum(sb * mb) - 0.5 * np.einsum("ni,nij,nj->", mb, S, mb))
            if len(idx) == 1:
                if Lb[0, 0] > 0:
                    u = sb[:, 0] - S[:, 0, 0] * mb[:, 0]
                    scalar.append((S[:, 0, 0], u * u, Lb[0, 0] ** 2))
            elif np.any(Lb):
                general.append((S, sb, mb, Lb))

        def logf(x):
            s2 = math.exp(2.0 * x)
            total = -n_obs * x + (const - 0.5 * yy) / s2
            for Sd, u2, l2 in scalar:  # 1x1 blocks, see _gibbs_math.block_collapsed
                v = s2 + l2 * Sd
                total += 0.5 * l2 * float(np.sum(u2 / v)) / s2 - 0.5 * float(np.sum(np.log(v / s2)))
            for S, sb, mb, Lb in general:
                total += gm.block_collapsed(S / s2, sb / s2, mb, Lb)
            return total - 0.5 * s2 / scale**2 + x

        x, k = gm.slice_step(math.log(self._sigma), logf, self._rng)
        self.n_evals += k
        self._sigma = float(math.exp(x))

    def _update_mean(self, Abs) -> None:
        L = self._L()
        N, P = self._theta.shape
        Pm = np.zeros((N, P, P))
        cm = np.zeros((N, P))
        for idx, (Ab, bb) in zip(self._blocks, Abs):
            Pb, cb = gm.block_mean_precision(Ab, bb, L[np.ix_(idx, idx)])
            Pm[:, idx[:, None], idx[None, :]] = Pb
            cm[:, idx] = cb
        Z = self._Z
        a = Z.shape[1]
        D = a * P
        # sum_i (z_i z_i') (x) P_i, ordered (covariate slot, coefficient)
        zz = (Z[:, :, None] * Z[:, None, :]).reshape(N, a * a)
        prec = (zz.T @ Pm.reshape(N, P * P)).reshape(a, a, P, P).transpose(0, 2, 1, 3).reshape(D, D)
        lin = (Z.T @ cm).reshape(D)
        prior = np.concatenate([np.full(P, self.priors.beta_sd ** -2.0),
                                np.full(D - P, self.priors.gamma_sd ** -2.0)])
        prec[np.diag_indices(D)] += prior
        Lp = np.linalg.cholesky(prec)  # prec = Lp Lp'
        mean = np.linalg.solve(Lp.T, np.linalg.solve(Lp, lin))
        eta = mean + np.linalg.solve(Lp.T, self._rng.standard_normal(D))
        eta = eta.reshape(Z.shape[1], P)
        self._beta = eta[0].copy()
        self._gamma = eta[1:].T.copy()


# ----------------------------------------------------------------------
# Whole-posterior sampling
# ----------------------------------------------------------------------
def sample_fast(data: ModelData, priors: PriorSpec, *, chains: int = 4, draws: int = 1000, tune: int = 500,
                thin: int = 1, rng: RngLike = None, progress: bool = False,
                init: Literal["prior", "dispersed"] = "dispersed"):
    """Sample the posterior of the hierarchical model with the fast engine.

    Parameters
    ----------
    data : ModelData
    priors : PriorSpec
    chains : int, default=4
        Independent chains, each with its own stream spawned from ``rng``.
    draws : int, default=1000
        Kept draws per chain.
    tune : int, default=500
        Sweeps discarded at the start of each chain.
    thin : int, default=1
        Sweeps per kept draw.
    rng : Generator, int or None
    progress : bool, default=False
        Show a tqdm bar over chains.
    init : {"dispersed", "prior"}, default="dispersed"
        Starting point of each chain (see :class:`GibbsSampler`).

    Returns
    -------
    arviz.InferenceData
        ``posterior``: ``beta (coef)``, ``gamma (coef, covariate)`` when there
        are covariates, ``tau (coef)``, ``sigma ()`` for a gaussian outcome
        with unknown noise, ``theta (participant, coef)``, and ``corr (coef,
        coef_)`` for a full covariance. ``observed_data``: ``y (obs)``.
        ``sample_stats``: ``n_evals``, the log-density evaluations of the
        slice steps in the sweep (a cost measure).
    """
    import arviz as az

    if chains < 1 or draws < 1 or tune < 0 or thin < 1:
        raise ValueError(f"need chains >= 1, draws >= 1, tune >= 0, thin >= 1; got {chains}, {draws}, {tune}, {thin}")
    P, Q, N = data.n_coef, len(data.covariates), data.n_participants
    sigma_free = data.outcome == "gaussian" and data.obs_sd is None
    out = {"beta": np.empty((chains, draws, P)), "tau": np.empty((chains, draws, P)),
           "theta": np.empty((chains, draws, N, P))}
    if Q:
        out["gamma"] = np.empty((chains, draws, P, Q))
    if sigma_free:
        out["sigma"] = np.empty((chains, draws))
    if priors.covariance == "full":
        out["corr"] = np.empty((chains, draws, P, P))
    n_evals = np.empty((chains, draws), dtype=np.int64)
    streams = spawn(rng, chains)
    iterator = range(chains)
    if progress:
        from tqdm.auto import tqdm

        iterator = tqdm(iterator, desc="fast engine", unit="chain")
    for c in iterator:
        s = GibbsSampler(data, priors, rng=streams[c], init=init)
        s.sweep(tune)
        for d in range(draws):
            s.sweep(thin)
            st = s.state
            out["beta"][c, d] = st.beta
            out["tau"][c, d] = st.tau
            out["theta"][c, d] = st.theta
            if Q:
                out["gamma"][c, d] = st.gamma
            if sigma_free:
                out["sigma"][c, d] = st.sigma
            if priors.covariance == "full":
                out["corr"][c, d] = st.corr
            n_evals[c, d] = s.n_evals
    coef = list(data.coef)
    coords = {"coef": coef, "participant": list(data.participants)}
    dims = {"beta": ["coef"], "tau": ["coef"], "theta": ["participant", "coef"]}
    if Q:
        coords["covariate"] = list(data.covariates)
        dims["gamma"] = ["coef", "covariate"]
    if priors.covariance == "full":
        coords["coef_"] = coef
        dims["corr"] = ["coef", "coef_"]
    coords["obs"] = np.arange(len(data.y))
    dims["y"] = ["obs"]
    idata = az.from_dict(posterior=out, observed_data={"y": data.y}, sample_stats={"n_evals": n_evals},
                         coords=coords, dims=dims)
    for group in ("posterior", "sample_stats"):
        idata[group].attrs.update({"engine": "fast", "sampler": "partially collapsed Gibbs",
                                   "tune": int(tune), "thin": int(thin), "init": init})
    return idata
