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


@dataclass(frozen=True)
class _Group:
    """Coefficient blocks of one size ``k``: block numbers, their coefficients ``idx`` (B, k), flat ``P x P`` positions."""

    k: int
    members: list
    idx: np.ndarray
    flat: np.ndarray


def _same_prefix(a: np.ndarray | None, b: np.ndarray | None) -> bool:
    """``b`` begins with ``a`` (the same memory is trusted: model data are never modified in place)."""
    if a is None or b is None:
        return a is None and b is None
    if len(b) < len(a):
        return False
    head = b[:len(a)]
    if head.shape == a.shape and head.strides == a.strides and (
            len(a) == 0 or head.__array_interface__["data"][0] == a.__array_interface__["data"][0]):
        return True
    return bool(np.array_equal(head, a))


def _extends(old: ModelData, new: ModelData) -> bool:
    """The rows of ``new`` begin with the rows of ``old`` (same outcomes, design rows, participants, weights)."""
    return (_same_prefix(old.y, new.y) and _same_prefix(old.X, new.X) and _same_prefix(old.group, new.group)
            and _same_prefix(old.obs_sd, new.obs_sd))


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

    def _prepare(self, data: ModelData, old: ModelData | None = None) -> None:
        """Sufficient statistics, coefficient blocks and their groups.

        With ``old`` (gaussian outcome, ``data`` extends ``old`` row by row)
        only the new rows are added to the statistics.
        """
        n, P = data.X.shape
        N = data.n_participants
        X, y, g = data.X, data.y, data.group
        self._random = np.asarray(data.random, dtype=bool)
        self._Z = np.concatenate([np.ones((N, 1)), data.W], axis=1)  # (N, 1+Q)
        if data.outcome == "gaussian":
            n0 = 0 if old is None else len(old.y)
            Xn, yn, gn = X[n0:], y[n0:], g[n0:]
            w = np.ones(n - n0) if data.obs_sd is None else 1.0 / np.asarray(data.obs_sd[n0:], dtype=float) ** 2
            G = sp.csr_matrix((np.ones(n - n0), (gn, np.arange(n - n0))), shape=(N, n - n0))
            outer = (Xn[:, :, None] * Xn[:, None, :]).reshape(n - n0, P * P)
            S = np.asarray(G @ (outer * w[:, None])).reshape(N, P, P)
            s = np.asarray(G @ (Xn * (w * yn)[:, None])).reshape(N, P)
            pattern = (outer != 0).any(axis=0).reshape(P, P) if n > n0 else np.zeros((P, P), bool)
            yy = float(np.sum(w * yn * yn))
            if old is not None:
                N0 = old.n_participants
                S[:N0] += self._S
                s[:N0] += self._s
                pattern |= self._pattern
                yy += self._yy
            self._S, self._s, self._yy, self._n_obs = S, s, yy, n
            self._pattern = pattern.copy()
        else:
            self._G = sp.csr_matrix((np.ones(n), (g, np.arange(n))), shape=(N, n))
            self._kappa = y - 0.5
            self._s = np.asarray(self._G @ (X * self._kappa[:, None])).reshape(N, P)
            outer = (X[:, :, None] * X[:, None, :]).reshape(n, P * P)
            pattern = (outer != 0).any(axis=0).reshape(P, P) if n else np.zeros((P, P), bool)
        if self._full:
            r = np.flatnonzero(self._random)
            pattern[np.ix_(r, r)] = True
        pattern |= np.eye(P, dtype=bool)
        n_blocks, label = connected_components(sp.csr_matrix(pattern), directed=False)
        self._blocks = [np.flatnonzero(label == j) for j in range(n_blocks)]
        self._block_of = label
        # blocks of equal size form a group, processed together: arrays (N, B, k, k)
        sizes = sorted({len(b) for b in self._blocks})
        self._groups = []
        for k in sizes:
            members = [j for j, b in enumerate(self._blocks) if len(b) == k]
            idx = np.array([self._blocks[j] for j in members], dtype=np.int64).reshape(len(members), k)
            flat = (idx[:, :, None] * P + idx[:, None, :]).reshape(-1)
            self._groups.append(_Group(k, members, idx, flat))
        self._where = {}  # block -> (group, position in group)
        for gi, grp in enumerate(self._groups):
            for bi, j in enumerate(grp.members):
                self._where[j] = (gi, bi)
        self._gs = [self._s[:, grp.idx] for grp in self._groups]
        if data.outcome == "gaussian":
            self._gS = [self._S.reshape(N, P * P)[:, grp.flat].reshape(N, len(grp.members), grp.k, grp.k)
                        for grp in self._groups]
            # scalar blocks: the distinct values of X_i'X_i (counts for unit weights), for compressed sums
            self._codes = []
            for grp, S in zip(self._groups, self._gS):
                if grp.k == 1 and N > 64:
                    vals, code = np.unique(S[..., 0, 0].T, return_inverse=True)
                    code = code.reshape(len(grp.members), N)
                    if len(vals) * 4 <= N:
                        self._codes.append((vals, code + (len(vals) * np.arange(len(grp.members)))[:, None]))
                        continue
                self._codes.append(None)
        else:
            self._gouter = [outer[:, grp.flat] for grp in self._groups]
            self._A_bern = None

    def _group_Ab(self, sigma: float | None = None) -> list[tuple[np.ndarray, np.ndarray]]:
        """``(A_i, b_i)`` of every group of blocks: (N, B, k, k) and (N, B, k)."""
        if self._data.outcome == "bernoulli":
            return list(zip(self._gA, self._gs))
        if self._sigma_free:
            s2 = (self._sigma if sigma is None else sigma) ** 2
            return [(S / s2, sb / s2) for S, sb in zip(self._gS, self._gs)]
        return list(zip(self._gS, self._gs))

    def _group_L(self, grp: "_Group") -> np.ndarray:
        """The factor of ``Sigma`` restricted to each block of a group: (B, k, k)."""
        if self._corr_chol is None:
            return np.eye(grp.k) * self._tau[grp.idx][:, None, :]
        return self._tau[grp.idx][:, :, None] * self._corr_chol[grp.idx[:, :, None], grp.idx[:, None, :]]

    def set_data(self, data: ModelData) -> None:
        """Replace the data by a larger study log of the same study (warm start).

        ``data.participants`` must begin with the current participants in the
        same order; new ids are appended. The sufficient statistics are
        updated, the current state is kept, and new participants' ``theta``
        are drawn from the current population distribution ``N(beta + Gamma
        w_i, Sigma)``. For a gaussian outcome, when the rows of ``data`` begin
        with the current rows (a study log that grew), only the new rows are
        added to the statistics, so a step costs time in the new rows, not in
        the whole log; otherwise everything is recomputed.
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
        self._prepare(data, old if data.outcome == "gaussian" and _extends(old, data) else None)
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
        N = self._theta.shape[0]
        self._gA = [np.asarray(self._G @ (o * self._omega[:, None])).reshape(N, len(grp.members), grp.k, grp.k)
                    for grp, o in zip(self._groups, self._gouter)]
        self._A_bern = None

    def _Ab(self, sigma: float | None = None) -> tuple[np.ndarray, np.ndarray]:
        if self._data.outcome == "bernoulli":
            if self._A_bern is None:  # entries outside the blocks are zero
                N, P = self._theta.shape
                A = np.zeros((N, P * P))
                for grp, Ag in zip(self._groups, self._gA):
                    A[:, grp.flat] = Ag.reshape(N, -1)
                self._A_bern = A.reshape(N, P, P)
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

    def _log_prior_tau(self, t):
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
        Abs = self._group_Ab()
        mgs = [m[:, grp.idx] for grp in self._groups]
        # 2a. heterogeneity scales, theta integrated out
        if self._full:
            self._update_tau_full(Abs, mgs)
        else:
            self._update_tau_diagonal(Abs, mgs)
        # 2b. correlations (full covariance), theta integrated out
        if self._full and len(self._cpc):
            self._update_corr(Abs, mgs)
        # 2c. noise scale, theta integrated out
        if self._sigma_free:
            self._update_sigma(m, mgs)
            Abs = self._group_Ab()
        # 3. (beta, Gamma) jointly, theta integrated out
        Ls = [self._group_L(grp) for grp in self._groups]
        self._update_mean(Abs, Ls)
        # 4. theta
        m = self._mean()
        theta = np.empty_like(m)
        for grp, (A, b), L in zip(self._groups, Abs, Ls):
            e = rng.standard_normal((m.shape[0], len(grp.members), grp.k))
            theta[:, grp.idx] = gm.group_draw_theta(A, b, m[:, grp.idx], L, e)
        self._theta = theta

    def _update_tau_diagonal(self, Abs, mgs) -> None:
        """Every ``log tau_p`` by slice sampling, blocks of a group in lockstep (they are independent given
        ``beta, Gamma, sigma``; within a block the scales are updated one after another)."""
        for gi, (grp, (A, b), mg) in enumerate(zip(self._groups, Abs, mgs)):
            codes = self._codes[gi] if self._data.outcome == "gaussian" else None
            for j in range(grp.k):
                sel = self._random[grp.idx[:, j]]
                if not sel.any():
                    continue
                coefs = grp.idx[sel, j]
                if sel.all():
                    As, bs, ms, L = A, b, mg, self._group_L(grp)
                else:
                    As, bs, ms, L = A[:, sel], b[:, sel], mg[:, sel], self._group_L(grp)[sel]
                kk, g2 = gm.group_tau_terms(As, bs, ms, L, j)
                wts = None
                if codes is not None and sel.all():  # scalar blocks: sum over distinct X_i'X_i values
                    vals, code = codes
                    U = len(vals)
                    wts = np.bincount(code.ravel(), minlength=U * len(coefs)).reshape(len(coefs), U).T
                    g2 = np.bincount(code.ravel(), weights=g2.T.ravel(), minlength=U * len(coefs))
                    g2 = g2.reshape(len(coefs), U).T
                    kk = np.broadcast_to((vals / (self._sigma ** 2 if self._sigma_free else 1.0))[:, None],
                                         g2.shape)
                logf = self._tau_logf(kk, g2, wts)
                x, k = gm.slice_step_vec(np.log(self._tau[coefs]), logf, self._rng)
                self.n_evals += k
                tau = self._tau.copy()
                tau[coefs] = np.exp(x)
                self._tau = tau

    def _tau_logf(self, kk, g2, wts):
        """Log density of ``x = log tau`` for each column of ``(kk, g2)`` (see :func:`_gibbs_math.group_tau_terms`)."""
        prior = self._log_prior_tau

        def logf(x):
            t2 = np.exp(2.0 * x)  # (m, B)
            v = 1.0 + t2[:, None, :] * kk  # (m, N, B)
            logv = np.log(v)
            if wts is not None:
                logv = logv * wts
            return 0.5 * t2 * np.sum(g2 / v, axis=1) - 0.5 * np.sum(logv, axis=1) + prior(np.exp(x)) + x

        return logf

    def _update_tau_full(self, Abs, mgs) -> None:
        for p in np.flatnonzero(self._random):
            gi, bi = self._where[self._block_of[p]]
            grp = self._groups[gi]
            idx = grp.idx[bi]
            Ab, bb, mb = Abs[gi][0][:, bi], Abs[gi][1][:, bi], mgs[gi][:, bi]
            j = int(np.searchsorted(idx, p))
            Cb = self._corr_chol[np.ix_(idx, idx)]
            tau_b = self._tau[idx].copy()

            def logf(x, j=j, tau_b=tau_b, Ab=Ab, bb=bb, mb=mb, Cb=Cb):
                t = math.exp(x)
                tau_b[j] = t
                return gm.block_collapsed(Ab, bb, mb, tau_b[:, None] * Cb) + self._log_prior_tau(t) + x

            x, k = gm.slice_step(math.log(self._tau[p]), logf, self._rng)
            self.n_evals += k
            tau = self._tau.copy()
            tau[p] = math.exp(x)
            self._tau = tau

    def _update_corr(self, Abs, mgs) -> None:
        r = np.flatnonzero(self._random)
        d = len(r)
        gi, bi = self._where[self._block_of[r[0]]]
        idx = self._groups[gi].idx[bi]
        Ab, bb, mb = Abs[gi][0][:, bi], Abs[gi][1][:, bi], mgs[gi][:, bi]
        eta = self.priors.lkj_eta
        tau_b = self._tau[idx]
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

    def _sigma_terms(self, m: np.ndarray, mgs):
        """The collapsed log-likelihood as a function of the noise variance and a common scale of ``tau``.

        Returns ``logf(x, c2)``: with ``s2 = exp(2 x)`` and every scale
        multiplied by ``sqrt(c2)``, the log-likelihood (theta integrated out)
        ``-n log sigma - (yy/2 - const) / s2 + sum -log(1 + c2 lam / s2) / 2 +
        c2 w^2 / (2 s2 (s2 + c2 lam))``, where ``lam, w^2`` are the
        eigen-terms of every block (:func:`_gibbs_math.group_sigma_terms`,
        which scale with ``tau`` exactly this way).
        """
        n_obs, yy = self._n_obs, self._yy
        S, s = self._S, self._s
        # sum_i (s_i'm_i - m_i'S_i m_i / 2): multiplies 1 / sigma^2
        const = float(np.sum(s * m) - 0.5 * np.einsum("ni,nij,nj->", m, S, m))
        lams, w2s, cnts, cols = [], [], [], []
        scalar = True  # every column belongs to one coefficient (scalar blocks)
        for gi, (grp, S_g, s_g, mg) in enumerate(zip(self._groups, self._gS, self._gs, mgs)):
            L = self._group_L(grp)
            if not np.any(L):
                continue
            lam, w2 = gm.group_sigma_terms(S_g, s_g, mg, L)
            codes = self._codes[gi]
            if codes is not None:  # scalar blocks: sum over distinct X_i'X_i values
                vals, code = codes
                B, U = len(grp.members), len(vals)
                lams.append(((self._tau[grp.idx[:, 0]] ** 2)[:, None] * vals[None, :]).ravel())
                w2s.append(np.bincount(code.ravel(), weights=w2[..., 0].T.ravel(), minlength=U * B))
                cnts.append(np.bincount(code.ravel(), minlength=U * B).astype(float))
                cols.append(np.repeat(grp.idx[:, 0], U))
            else:
                lams.append(lam.reshape(-1))
                w2s.append(w2.reshape(-1))
                cnts.append(np.ones(lam.size))
                scalar = scalar and grp.k == 1
                cols.append(np.broadcast_to(grp.idx[:, 0], lam.shape[:2]).reshape(-1))
        lam = np.concatenate(lams) if lams else np.zeros(0)
        w2 = np.concatenate(w2s) if w2s else np.zeros(0)
        cnt = np.concatenate(cnts) if cnts else np.zeros(0)
        if np.all(cnt == 1.0):
            cnt = None
        base = const - 0.5 * yy
        colmap = np.concatenate(cols) if (cols and scalar) else (np.zeros(0, np.int64) if scalar else None)

        def logf(x, c2=1.0):
            s2 = np.exp(2.0 * x)  # (m, 1)
            cl = c2 * lam  # (m, M) or (M,)
            v = s2 + cl
            logv = np.log(v / s2)
            if cnt is not None:
                logv = logv * cnt
            return (-n_obs * x + base / s2 + 0.5 * np.sum(c2 * w2 / v, axis=1, keepdims=True) / s2
                    - 0.5 * np.sum(logv, axis=1, keepdims=True))

        return logf, colmap

    def _update_sigma(self, m: np.ndarray, mgs) -> None:
        """``log sigma`` by slice sampling, then a joint move of ``log sigma`` and every ``log tau``.

        The second update slices along the fixed direction ``(log tau, log
        sigma) + t (-1, ..., -1, +1)`` of the same collapsed conditional: a
        valid Gibbs update of the coordinate ``t`` (the shift has unit
        Jacobian), which moves along the ridge ``tau^2 + sigma^2 = const``
        where participants have one or two observations each.
        """
        scale = self.priors.sigma_scale
        lik, colmap = self._sigma_terms(m, mgs)

        def logf(x):
            return lik(x) - 0.5 * np.exp(2.0 * x) / scale**2 + x

        x, k = gm.slice_step_vec(np.array([math.log(self._sigma)]), logf, self._rng)
        self.n_evals += k
        sigma = float(math.exp(x[0]))
        rnd = np.flatnonzero(self._random)
        if not len(rnd):
            self._sigma = sigma
            return
        prior = self._log_prior_tau
        if colmap is not None:
            # scalar blocks: shift the variances, tau_p^2 - t and sigma^2 + t (exactly along the ridge)
            v0, s0 = self._tau[rnd] ** 2, sigma**2
            where = np.full(len(self._random), -1)
            where[rnd] = np.arange(len(rnd))
            col = where[colmap]  # every column's coefficient among the random ones
            keep = col >= 0

            def logf_ridge(t):  # t (m, 1)
                v, s = v0 - t, s0 + t
                ok = np.all(v > 0, axis=1, keepdims=True) & (s > 0)
                v, s = np.where(ok, v, 1.0), np.where(ok, s, 1.0)
                c2 = np.ones((t.shape[0], len(col)))
                c2[:, keep] = (v / v0)[:, col[keep]]
                out = (lik(0.5 * np.log(s), c2) - 0.5 * s / scale**2 - 0.5 * np.log(s)
                       + np.sum(prior(np.sqrt(v)) - 0.5 * np.log(v), axis=1, keepdims=True))
                return np.where(ok, out, -np.inf)

            # the width is a function of the line's invariants tau_p^2 + sigma^2 only
            t, k = gm.slice_step_vec(np.zeros(1), logf_ridge, self._rng, width=0.5 * float(np.mean(v0 + s0)))
            t = float(t[0])
            tau = self._tau.copy()
            tau[rnd] = np.sqrt(v0 - t)
            self._sigma = math.sqrt(s0 + t)
        else:
            # blocks of several coefficients: a common factor exp(-t) on every tau, exp(t) on sigma
            lt = np.log(self._tau[rnd])
            x0 = math.log(sigma)

            def logf_ridge(t):  # t (m, 1)
                x = x0 + t
                ltau = lt - t  # (m, R)
                return (lik(x, np.exp(-2.0 * t)) - 0.5 * np.exp(2.0 * x) / scale**2 + x
                        + np.sum(prior(np.exp(ltau)) + ltau, axis=1, keepdims=True))

            t, k = gm.slice_step_vec(np.zeros(1), logf_ridge, self._rng)
            t = float(t[0])
            tau = self._tau.copy()
            tau[rnd] = np.exp(lt - t)
            self._sigma = float(math.exp(x0 + t))
        self.n_evals += k
        self._tau = tau

    def _update_mean(self, Abs, Ls) -> None:
        N, P = self._theta.shape
        Pm = np.zeros((N, P * P))
        cm = np.zeros((N, P))
        for grp, (A, b), L in zip(self._groups, Abs, Ls):
            Pb, cb = gm.group_mean_precision(A, b, L)
            Pm[:, grp.flat] = Pb.reshape(N, -1)
            cm[:, grp.idx.ravel()] = cb.reshape(N, -1)
        Z = self._Z
        a = Z.shape[1]
        D = a * P
        if a == 1:
            prec = Pm.sum(axis=0).reshape(P, P)
            lin = cm.sum(axis=0)
        else:
            # sum_i (z_i z_i') (x) P_i, ordered (covariate slot, coefficient)
            zz = (Z[:, :, None] * Z[:, None, :]).reshape(N, a * a)
            prec = (zz.T @ Pm).reshape(a, a, P, P).transpose(0, 2, 1, 3).reshape(D, D)
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
