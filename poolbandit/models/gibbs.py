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
   ``kappa = y - 1/2``; the observations of a participant that share a
   design row share ``x'theta_i`` and only the sum of their variables enters,
   so one ``PG(n_u, x_u'theta_i)`` is drawn per such cell of ``n_u``
   observations (the law of that sum);
2. each ``log tau_p`` (and each correlation parameter, and ``log sigma``) by
   univariate slice sampling (Neal [4]_) on its conditional **with every
   theta_i integrated out**: given the population mean ``m_i = beta + Gamma
   w_i`` the participant blocks are Gaussian, so the marginal likelihood is a
   sum of per-participant terms with ``P x P`` determinants (see
   :mod:`._gibbs_math`);
   then (gaussian with unknown noise) one more slice update of the same
   collapsed conditional along a fixed line through ``(tau, sigma)``: the
   variances ``tau_p^2 - t, sigma^2 + t`` when every random coefficient is its
   own block (the ridge ``tau_p^2 + sigma^2 = const`` that the data identify
   when participants have one or two observations each), else ``log tau_p -
   t, log sigma + t``; this move runs while some random coefficient has fewer
   than ``_RIDGE_REPLICATION`` (5) observations per participant on average,
   and is left out once the noise is identified within participants (a choice
   made from the data alone, at ``set_data``);
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
With a diagonal covariance the other scales of the block are integrated out
first, which leaves a scalar-block formula per slice evaluation, and the
blocks of equal size are updated in lockstep (they are independent given
``beta, Gamma, sigma``); the noise scale's evaluations use eigen-terms of each
block computed once per sweep. :func:`sample_fast` runs its chains in lockstep
too (one array operation serves all chains; each chain keeps its own stream).

When every coefficient is its own block and the covariance is diagonal (arm
levels without context features, the common case), the sweep takes closed
forms instead (``GibbsSampler._sweep_scalar``): the same updates in the same
order on the same random numbers, with each slice evaluation a few array
operations over "units" (for a gaussian outcome, the participants with equal
``(X_i'X_i)_pp`` pooled), ``beta`` drawn elementwise without covariates, and
the lockstep slice steps evaluating several points per call
(:func:`._gibbs_math.slice_step_vec`).

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
from ._polyagamma import draw_pg, draw_pg_counts
from .data import ModelData

__all__ = ["GibbsState", "GibbsSampler", "sample_fast"]

#: Prior precision used for coefficients without participant variation when a
#: caller needs ``Sigma^{-1}`` explicitly (``tau_p = 0``); see
#: :meth:`GibbsSampler.likelihood_stats`.
FIXED_PRECISION = 1e12

_INITS = ("prior", "dispersed")

#: :func:`sample_fast` runs its chains in lockstep when ``chains * N * P^2`` is at most this.
_LOCKSTEP_SIZE = 4_000_000

#: Use the closed forms of scalar coefficient blocks (diagonal covariance) when they apply; tests turn it
#: off to check the scalar path against the general one on the same random stream.
_SCALAR_PATH = True

#: Points per log-density call of the lockstep slice steps (:func:`_gibbs_math.slice_step_vec`): stepping-out
#: positions ``ahead`` beyond the interval ends, shrinkage candidates in the first round (``first``, evaluated
#: with the stepping out) and in later rounds (``spec``). More points per call mean fewer calls; the defaults
#: suit log densities whose cost is mostly per call (gaussian tau, the noise scale, the ridge move), while a
#: bernoulli outcome's tau densities cost per point (one term per participant) and keep the defaults.
_SLICE_TAU_GAUSSIAN = {"ahead": 3, "first": 6, "spec": 6}
_SLICE_SIGMA = {"ahead": 2, "first": 6, "spec": 6}
_SLICE_RIDGE = {"ahead": 1, "first": 8, "spec": 6}

#: The ridge move (:meth:`GibbsSampler._update_sigma`) runs while some random coefficient has fewer than this
#: many observations per participant who has any (on average): with one or two each, ``tau_p^2 + sigma^2`` is
#: identified far better than its parts and the move is what lets the scales travel; with many, the noise
#: variance is identified within participants, the posterior correlation of ``tau_p^2`` and ``sigma^2`` is weak
#: and the move adds a quarter to a sweep's cost for no mixing (60 x 21 x 3 study: worst-tau ESS per sweep
#: 0.61 with / 0.49 without at 2.7 observations per cell, 0.86 / 0.93 at 7).
_RIDGE_REPLICATION = 5.0

#: Slice width of ``log sigma`` times ``sqrt(n + 1)``: the conditional's sd is about ``1 / sqrt(2 n)``, so the
#: first interval (about 8 sd) usually holds the whole slice, and the first call's candidates settle the update
_SIGMA_WIDTH = 12.0


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

    Internally every array of the state has a leading chain axis:
    :func:`sample_fast` runs its independent chains in lockstep (each with its
    own random stream), which shares the cost of every array operation.
    """

    #: label of the progress bar of :func:`sample_fast`
    _PROGRESS = "fast engine"

    def _extra_draws(self) -> dict:
        """Posterior variables of a subclass beyond the normal model's: name -> (value (chain, ...), dims)."""
        return {}

    def _extra_coords(self) -> dict:
        """Coordinates of :meth:`_extra_draws`'s dimensions."""
        return {}

    def _extra_attrs(self) -> dict:
        """Attributes of the InferenceData groups that describe a subclass's model."""
        return {}

    def __init__(self, data: ModelData, priors: PriorSpec, *, rng: RngLike = None,
                 init: Literal["prior", "dispersed"] = "prior"):
        self._setup(data, priors, [as_generator(rng)], init)

    @classmethod
    def _chains(cls, data: ModelData, priors: PriorSpec, rngs: list, init: str) -> "GibbsSampler":
        """Independent chains, one per generator in ``rngs``, updated in lockstep."""
        self = cls.__new__(cls)
        self._setup(data, priors, [as_generator(r) for r in rngs], init)
        return self

    def _setup(self, data: ModelData, priors: PriorSpec, rngs: list, init: str) -> None:
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
        self._rngs = rngs
        self._C = len(rngs)
        self._full = priors.covariance == "full"
        self._sigma_free = data.outcome == "gaussian" and data.obs_sd is None
        self._n_evals = np.zeros(self._C, np.int64)  # log-density evaluations in the last sweep
        self._slice_tau = _SLICE_TAU_GAUSSIAN if data.outcome == "gaussian" else {}
        self._data = data
        self._prepare(data)
        self._init_state(init)
        if data.outcome == "bernoulli":
            self._draw_omega()

    @property
    def _rng(self) -> np.random.Generator:
        return self._rngs[0]

    @property
    def n_evals(self):
        """Log-density evaluations of the slice steps in the last sweep (per chain when there are several)."""
        return int(self._n_evals[0]) if self._C == 1 else self._n_evals.copy()

    @property
    def _omega(self) -> np.ndarray:
        """Per-observation Polya-Gamma weights (n,) ((chains, n) when there are several).

        The sampler draws one ``PG(n_u, x_u'theta_i)`` per cell ``u`` (the
        ``n_u`` observations of a participant with one design row), the law of
        the sum of their ``PG(1, .)`` variables; each observation gets an equal
        share, so ``X_i' Omega_i X_i`` and every conditional are those of the
        per-observation augmentation.
        """
        w = self._omegas[:, self._cell_of] / self._cell_h[self._cell_of]
        return w[0] if self._C == 1 else w

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
        C = self._C
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
            # observations per participant and coefficient
            counts = np.asarray(G @ (Xn != 0).astype(float)).reshape(N, P)
            if old is not None:
                N0 = old.n_participants
                S[:N0] += self._S
                s[:N0] += self._s
                counts[:N0] += self._counts
                pattern |= self._pattern
                yy += self._yy
            self._S, self._s, self._yy, self._n_obs, self._counts = S, s, yy, n, counts
            # the ridge move serves data with little replication within participants (see _RIDGE_REPLICATION)
            rc = counts[:, self._random]
            seen = np.maximum((rc > 0).sum(axis=0), 1)
            self._ridge = bool(rc.shape[1]) and float(np.min(rc.sum(axis=0) / seen)) < _RIDGE_REPLICATION
            self._pattern = pattern.copy()
        else:
            kappa = y - 0.5
            Gobs = sp.csr_matrix((np.ones(n), (g, np.arange(n))), shape=(N, n))
            self._s = np.asarray(Gobs @ (X * kappa[:, None])).reshape(N, P)
            # observations of one participant with the same design row share x'theta_i, and only the sum of
            # their Polya-Gamma variables enters the sampler: one PG(n_u, x_u'theta_i) per such cell u
            cells, cell_of, counts = np.unique(np.concatenate([g[:, None].astype(float), X], axis=1), axis=0,
                                               return_inverse=True, return_counts=True)
            self._cell_of = cell_of.reshape(-1)
            self._cell_h = counts.astype(float)
            self._cell_g = cells[:, 0].astype(np.int64)
            self._cell_X = np.ascontiguousarray(cells[:, 1:])
            Uc = len(counts)
            self._G = sp.csr_matrix((np.ones(Uc), (self._cell_g, np.arange(Uc))), shape=(N, Uc))
            outer = (self._cell_X[:, :, None] * self._cell_X[:, None, :]).reshape(Uc, P * P)
            pattern = (outer != 0).any(axis=0).reshape(P, P) if n else np.zeros((P, P), bool)
        if self._full:
            r = np.flatnonzero(self._random)
            pattern[np.ix_(r, r)] = True
        pattern |= np.eye(P, dtype=bool)
        n_blocks, label = connected_components(sp.csr_matrix(pattern), directed=False)
        self._blocks = [np.flatnonzero(label == j) for j in range(n_blocks)]
        self._block_of = label
        # blocks of equal size form a group, processed together: arrays (chain, N, B, k, k)
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
                if grp.k == 1 and N:
                    vals, code = np.unique(S[..., 0, 0].T, return_inverse=True)
                    B, U = len(grp.members), len(vals)
                    if U * 4 <= N:
                        code = code.reshape(B, N) + (U * np.arange(B))[:, None]
                        full = code[None] + (B * U * np.arange(C))[:, None, None]  # (chain, B, N)
                        counts = np.bincount(code.ravel(), minlength=U * B).reshape(B, U)
                        self._codes.append((vals, full.ravel(), counts))
                        continue
                self._codes.append(None)
        else:
            self._gouter = [outer[:, grp.flat] for grp in self._groups]
            self._A_bern = None
        # scalar blocks and a diagonal covariance: the closed forms of :meth:`_sweep_scalar`
        self._scalar = (_SCALAR_PATH and not self._full and len(self._groups) == 1 and self._groups[0].k == 1
                        and np.array_equal(self._groups[0].idx[:, 0], np.arange(P)))
        if self._scalar:
            self._prepare_scalar()

    def _prepare_scalar(self) -> None:
        """Statistics of the scalar-block path, per coefficient ``p`` over "units" ``u``.

        Gaussian: the participants with equal ``a_ip = (X_i'X_i)_pp`` (weighted)
        form one unit, with its value ``vals``, count ``cnt``, sums ``SB`` of
        ``s_ip = (X_i'y_i)_p`` and ``SB2`` of ``s_ip^2`` (padded to a common
        number of units with zero counts); ``code`` maps (p, i) to ``p U + u``.
        Bernoulli: the ``a_ip`` change with the Polya-Gamma draws, so every
        participant is its own unit (computed per sweep).
        """
        N, P = self._s.shape
        rnd = np.flatnonzero(self._random)
        self._rnd = rnd
        self._sT = np.ascontiguousarray(self._s.T)
        self._all_random = len(rnd) == P
        if self._data.outcome != "gaussian":
            # every cell's design row has one nonzero entry (scalar blocks): its coefficient and value
            X = self._cell_X
            p = np.argmax(X != 0, axis=1) if len(X) else np.zeros(0, np.int64)
            val = X[np.arange(len(X)), p]
            flat = self._cell_g * P + p
            self._cell_flat = flat
            self._cell_val = None if np.all(val == 1.0) else val
            if len(np.unique(flat)) == len(flat):
                self._cell_sum = None  # one cell per (participant, coefficient): A is filled in place
            else:
                self._cell_sum = sp.csr_matrix((val * val, (flat, np.arange(len(flat)))), shape=(N * P, len(flat)))
            return
        a = np.ascontiguousarray(self._S[:, np.arange(P), np.arange(P)])  # (N, P)
        sb = self._s
        uniq = [np.unique(a[:, p], return_inverse=True) for p in range(P)]
        U = max([len(v) for v, _ in uniq] + [1])
        vals = np.zeros((P, U))
        code = np.empty((P, N), np.int64)
        for p, (v, c) in enumerate(uniq):
            vals[p, :len(v)] = v
            code[p] = p * U + c.reshape(-1)
        flat = code.ravel()
        sbt = sb.T.ravel()
        cnt = np.bincount(flat, minlength=P * U).reshape(P, U).astype(float)
        SB = np.bincount(flat, weights=sbt, minlength=P * U).reshape(P, U)
        SB2 = np.bincount(flat, weights=sbt * sbt, minlength=P * U).reshape(P, U)
        C = self._C
        self._sc = {
            "a": a, "vals": vals, "cnt": cnt, "SB": SB, "SB2": SB2, "VSB": vals * SB, "V2C": vals * vals * cnt,
            "VC": vals * cnt, "Asum": a.sum(axis=0), "SBsum": sb.sum(axis=0), "U": U,
            "code": (flat[None] + (P * U * np.arange(C))[:, None]).ravel(),  # (chain, P, N) -> chain P U + p U + u
        }

    def _group_Ab(self) -> list[tuple[np.ndarray, np.ndarray]]:
        """``(A_i, b_i)`` of every group of blocks: (chain or 1, N, B, k, k) and (chain or 1, N, B, k)."""
        if self._data.outcome == "bernoulli":
            return [(A, sb[None]) for A, sb in zip(self._gA, self._gs)]
        if self._sigma_free:
            s2 = self._sigma**2
            return [(S[None] / s2[:, None, None, None, None], sb[None] / s2[:, None, None, None])
                    for S, sb in zip(self._gS, self._gs)]
        return [(S[None], sb[None]) for S, sb in zip(self._gS, self._gs)]

    def _group_L(self, grp: _Group) -> np.ndarray:
        """The factor of ``Sigma`` restricted to each block of a group: (chain, 1, B, k, k)."""
        t = self._tau[:, grp.idx]  # (chain, B, k)
        if self._corr_chol is None:
            return (np.eye(grp.k) * t[:, :, None, :])[:, None]
        return (t[..., None] * self._corr_chol[:, grp.idx[:, :, None], grp.idx[:, None, :]])[:, None]

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
            m_new = self._mean()[:, N0:]
            L = self._L()
            z = np.stack([r.standard_normal((N - N0, len(self._random))) for r in self._rngs])
            self._theta = np.concatenate([self._theta, m_new + z @ np.swapaxes(L, 1, 2)], axis=1)
        if data.outcome == "bernoulli":
            self._draw_omega()

    # ------------------------------------------------------------------
    # State
    # ------------------------------------------------------------------
    def _L(self) -> np.ndarray:
        """``L`` with ``Sigma = L L'`` per chain: (chain, P, P)."""
        if self._corr_chol is None:
            return self._tau[:, :, None] * np.eye(self._tau.shape[1])
        return self._tau[:, :, None] * self._corr_chol

    @property
    def state(self) -> GibbsState:
        """The current draw (not a copy; arrays are replaced, never modified, by later sweeps)."""
        return GibbsState(self._beta[0], self._gamma[0], self._tau[0],
                          None if self._sigma is None else float(self._sigma[0]), self._theta[0],
                          None if self._corr_chol is None else self._corr_chol[0])

    def _init_state(self, init: str) -> None:
        pr, data = self.priors, self._data
        P, Q, N = data.n_coef, len(data.covariates), data.n_participants
        spread = 2.0 if init == "dispersed" else 1.0
        beta, gamma, taus, sigmas, cpcs, thetas = [], [], [], [], [], []
        d = int(self._random.sum())
        for rng in self._rngs:
            beta.append(spread * pr.beta_sd * rng.standard_normal(P))
            gamma.append(spread * pr.gamma_sd * rng.standard_normal((P, Q)))
            if init == "prior":
                if pr.tau_family == "half-normal":
                    tau = np.abs(pr.tau_scale * rng.standard_normal(P))
                else:
                    tau = np.abs(pr.tau_scale * rng.standard_cauchy(P))
                sigma = abs(pr.sigma_scale * rng.standard_normal())
            else:
                tau = pr.tau_scale * np.exp(rng.standard_normal(P))
                sigma = pr.sigma_scale * float(np.exp(rng.standard_normal()))
            taus.append(np.where(self._random, np.maximum(tau, 1e-8), 0.0))
            sigmas.append(max(sigma, 1e-8))
            cpc = np.zeros(d * (d - 1) // 2)
            if self._full and init == "dispersed" and d > 1:
                cpc = rng.uniform(-1.0, 1.0, d * (d - 1) // 2)
            cpcs.append(cpc)
            thetas.append(rng.standard_normal((N, P)))
        self._beta, self._gamma, self._tau = np.array(beta), np.array(gamma).reshape(self._C, P, Q), np.array(taus)
        self._sigma = np.array(sigmas) if self._sigma_free else None
        self._corr_chol = None
        self._cpc = None
        if self._full:
            self._cpc = np.array(cpcs)
            self._corr_chol = np.array([self._embed_corr(c) for c in self._cpc])
        self._theta = self._mean() + np.array(thetas) @ np.swapaxes(self._L(), 1, 2)

    def _embed_corr(self, y: np.ndarray) -> np.ndarray:
        P = len(self._random)
        r = np.flatnonzero(self._random)
        C = np.eye(P)
        C[np.ix_(r, r)] = gm.cpc_to_cholesky(np.tanh(y), len(r))
        return C

    def _mean(self) -> np.ndarray:
        """``m_i = beta + Gamma w_i`` per chain: (chain, N, P)."""
        N = self._Z.shape[0]
        if self._Z.shape[1] == 1:
            return np.repeat(self._beta[:, None, :], N, axis=1)
        return self._beta[:, None, :] + np.einsum("nq,cpq->cnp", self._Z[:, 1:], self._gamma)

    # ------------------------------------------------------------------
    # Likelihood pieces
    # ------------------------------------------------------------------
    def _draw_omega(self) -> None:
        N, C = self._theta.shape[1], self._C
        h = self._cell_h
        if self._scalar:
            P = self._theta.shape[2]
            psi = self._theta.reshape(C, N * P)[:, self._cell_flat]
            if self._cell_val is not None:
                psi = psi * self._cell_val
            self._omegas = np.empty(psi.shape)  # (chain, cells)
            for c, r in enumerate(self._rngs):
                draw_pg_counts(h, psi[c], r, self._omegas[c])
            if self._cell_sum is None:
                A = np.zeros((C, N * P))
                A[:, self._cell_flat] = self._omegas if self._cell_val is None else self._omegas * self._cell_val**2
            else:
                A = np.asarray(self._cell_sum @ self._omegas.T).T
            self._gA = [A.reshape(C, N, P, 1, 1)]
            self._A_bern = None
            return
        psi = np.einsum("up,cup->cu", self._cell_X, self._theta[:, self._cell_g])
        self._omegas = np.stack([draw_pg(h, p, r) for p, r in zip(psi, self._rngs)])  # (chain, cells)
        gA = []
        for grp, o in zip(self._groups, self._gouter):
            F = o.shape[1]
            prod = (o[:, :, None] * self._omegas.T[:, None, :]).reshape(len(o), F * C)
            A = np.asarray(self._G @ prod).reshape(N, F, C)
            gA.append(np.moveaxis(A, 2, 0).reshape(C, N, len(grp.members), grp.k, grp.k))
        self._gA = gA
        self._A_bern = None

    def _Ab(self) -> tuple[np.ndarray, np.ndarray]:
        """Full ``(A_i, b_i)`` of the first chain: (N, P, P) and (N, P)."""
        if self._data.outcome == "bernoulli":
            if self._A_bern is None:  # entries outside the blocks are zero
                N, P = self._theta.shape[1:]
                A = np.zeros((N, P * P))
                for grp, Ag in zip(self._groups, self._gA):
                    A[:, grp.flat] = Ag[0].reshape(N, -1)
                self._A_bern = A.reshape(N, P, P)
            return self._A_bern, self._s
        if self._sigma_free:
            s2 = float(self._sigma[0]) ** 2
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
        m = self._mean()[0]
        L = self._L()[0]
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
        if self._scalar:
            self._sweep_scalar()
            return
        self._n_evals = np.zeros(self._C, np.int64)
        if self._data.outcome == "bernoulli":
            self._draw_omega()
        m = self._mean()
        Abs = self._group_Ab()
        mgs = [m[:, :, grp.idx] for grp in self._groups]
        # 2a. heterogeneity scales, theta integrated out
        if self._full:
            self._update_tau_full(Abs, mgs)
        else:
            self._update_tau_diagonal(Abs, mgs)
        # 2b. correlations (full covariance), theta integrated out
        if self._full and self._cpc.shape[1]:
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
        N = m.shape[1]
        for grp, (A, b), L in zip(self._groups, Abs, Ls):
            e = np.stack([r.standard_normal((N, len(grp.members), grp.k)) for r in self._rngs])
            theta[:, :, grp.idx] = gm.group_draw_theta(A, b, m[:, :, grp.idx], L, e)
        self._theta = theta

    # ------------------------------------------------------------------
    # Scalar blocks with a diagonal covariance: closed forms
    # ------------------------------------------------------------------
    def _log_prior_var(self, v):
        """Log prior of ``tau`` at ``tau^2 = v`` (the density of ``tau``, up to a constant)."""
        s2 = self.priors.tau_scale ** 2
        if self.priors.tau_family == "half-normal":
            return -0.5 * v / s2
        return -np.log1p(v / s2)

    def _scalar_stats(self, m: np.ndarray):
        """Per-sweep statistics of the scalar path given the population means ``m`` (chain, N, P).

        Returns ``(vals, cnt, W, SBu, base)``: per coefficient and unit the value
        ``a`` ((1 or chain), P, U), the count (P, U) or None, ``W = sum (s_ip -
        a_ip m_ip)^2`` (chain, P, U), the sums of ``s_ip`` ((1 or chain), P,
        U), and ``base = sum_ip (s_ip m_ip - a_ip m_ip^2 / 2) - y'y / 2``
        (chain,) (gaussian; None for bernoulli). The collapsed log-likelihood
        of ``v_p = tau_p^2`` and ``s = sigma^2`` is then ``-n log(s) / 2 +
        base / s + sum_pu [-cnt log(1 + v a / s) / 2 + v W / (2 s (s + v a))]``.
        """
        C = self._C
        N, P = self._s.shape
        if self._data.outcome == "gaussian":
            sc = self._sc
            if self._Z.shape[1] == 1:  # m_ip = beta_p: sums over units in closed form
                beta = self._beta[:, :, None]  # (chain, P, 1)
                W = sc["SB2"] - 2.0 * beta * sc["VSB"] + beta * beta * sc["V2C"]
                b0 = self._beta
                const = b0 @ sc["SBsum"] - 0.5 * (b0 * b0) @ sc["Asum"]
            else:
                r = self._s - sc["a"] * m  # (chain, N, P)
                W = np.bincount(sc["code"], weights=np.swapaxes(r * r, 1, 2).ravel(),
                                minlength=C * P * sc["U"]).reshape(C, P, sc["U"])
                const = np.einsum("cnp,cnp->c", m, self._s - 0.5 * sc["a"] * m)
            return sc["vals"][None], sc["cnt"], W, sc["SB"][None], const - 0.5 * self._yy
        # (chain, P, N) with participants contiguous: the log densities sum over them
        A = np.ascontiguousarray(np.swapaxes(self._gA[0].reshape(C, N, P), 1, 2))
        mT = self._beta[:, :, None] if self._Z.shape[1] == 1 else np.swapaxes(m, 1, 2)
        r = self._sT - A * mT
        return A, None, r * r, self._sT[None], None

    def _sweep_scalar(self) -> None:
        """One sweep when every coefficient is its own block and the covariance is diagonal.

        The same updates, in the same order and on the same random numbers, as
        :meth:`_sweep`, with the block algebra in closed form: each ``tau_p``
        update, the noise scale's and the ridge move evaluate the collapsed
        log-likelihood of :meth:`_scalar_stats` on a handful of per-unit
        arrays (participants with equal ``(X_i'X_i)_pp`` pooled for a gaussian
        outcome); without covariates the coefficients of ``beta`` are
        independent given the scales, so they are drawn elementwise.
        """
        C = self._C
        N, P = self._s.shape
        self._n_evals = np.zeros(C, np.int64)
        gauss = self._data.outcome == "gaussian"
        if not gauss:
            self._draw_omega()
        no_cov = self._Z.shape[1] == 1
        m = self._beta[:, None, :] if no_cov else self._mean()
        vals, cnt, W, SBu, base = self._scalar_stats(m)
        rnd, allr = self._rnd, self._all_random
        R = len(rnd)
        s2 = self._sigma ** 2 if self._sigma_free else np.ones(C)
        if R:
            vals_r = vals if allr else vals[:, rnd]
            cnt_r = cnt if (allr or cnt is None) else cnt[rnd]
            W_r = W if allr else W[:, rnd]
            # 2a. every log tau_p (chain-major scalars); width 1, see _update_tau_diagonal
            if self._sigma_free:
                a_s = vals_r / s2[:, None, None]  # (chain, R, units): 1 + v a / s2 per unit
                hw = W_r * (0.5 / s2**2)[:, None, None]
            else:
                a_s, hw = vals_r, 0.5 * W_r
            prior_var = self._log_prior_var
            half_cnt = None if cnt_r is None else 0.5 * cnt_r
            # a half-normal prior adds -v / (2 tau_scale^2): folded into the coefficient of v
            c_hn = 0.5 / self.priors.tau_scale**2 if self.priors.tau_family == "half-normal" else None

            def logf_tau(x):
                xx = x.reshape(x.shape[0], C, R)
                v = np.exp(2.0 * xx)
                D = v[..., None] * a_s
                D += 1.0
                q = (hw / D).sum(axis=-1)
                np.log(D, out=D)
                if half_cnt is None:
                    D *= 0.5
                else:
                    D *= half_cnt
                if c_hn is None:
                    out = v * q - D.sum(axis=-1) + prior_var(v) + xx
                else:
                    q -= c_hn
                    out = v * q - D.sum(axis=-1) + xx
                return out.reshape(x.shape)

            x, k = gm.slice_step_vec(np.log(self._tau[:, rnd]).ravel(), logf_tau, self._rngs, **self._slice_tau)
            self._count(k)
            tau = self._tau.copy()
            tau[:, rnd] = np.exp(x).reshape(C, R)
            self._tau = tau
        if self._sigma_free:
            self._update_sigma_scalar(vals_r if R else None, cnt_r if R else None, W_r if R else None, base)
            s2 = self._sigma ** 2
        v = self._tau ** 2  # (chain, P)
        # 3. beta (and Gamma): theta integrated out
        if no_cov:
            D = v[:, :, None] * vals
            D += s2[:, None, None]  # (chain, P, units)
            prec = ((vals if cnt is None else self._sc["VC"]) / D).sum(axis=-1)
            prec += self.priors.beta_sd ** -2.0
            lin = (SBu / D).sum(axis=-1)
            z = np.array([r.standard_normal(P) for r in self._rngs])
            # the Cholesky factor of the diagonal precision is its square root (as in _update_mean)
            self._beta = lin / prec + z / np.sqrt(prec)
            m = self._beta[:, None, :]
        else:
            L = np.sqrt(v)[:, None, :, None, None]
            self._update_mean([self._scalar_Ab(s2)], [L])
            m = self._mean()
        # 4. theta: theta_ip = m_ip + t (t r / (s + v a) + e sqrt(s / (s + v a))), r = s_ip - a_ip m_ip
        e = np.array([r.standard_normal((N, P)) for r in self._rngs])
        t = np.sqrt(v)[:, None, :]
        vv = v[:, None, :]
        if gauss:
            a = self._sc["a"]
            D = vv * a
            D += s2[:, None, None]
            r = self._s - a * m
            self._theta = m + t * (t * r / D + e * np.sqrt(s2[:, None, None] / D))
        else:
            A = self._gA[0].reshape(C, N, P)
            M = vv * A
            M += 1.0
            self._theta = m + t * (t * (self._s - A * m) / M + e / np.sqrt(M))

    def _scalar_Ab(self, s2):
        """``(A_i, b_i)`` in the group layout of :meth:`_group_Ab` under noise variances ``s2`` (chain,)."""
        if self._data.outcome == "gaussian":
            a = self._sc["a"]
            if self._sigma_free:
                return (a[None] / s2[:, None, None])[..., None, None], (self._s[None] / s2[:, None, None])[..., None]
            return a[None, :, :, None, None], self._s[None, :, :, None]
        return self._gA[0], self._s[None, :, :, None]

    def _update_sigma_scalar(self, vals, cnt, W, base) -> None:
        """:meth:`_update_sigma` for the scalar path: the same two slice updates on the closed form.

        ``vals, cnt, W`` are the unit statistics of the random coefficients
        (:meth:`_scalar_stats`), None when no coefficient varies.
        """
        scale2 = self.priors.sigma_scale ** 2
        C, n_obs = self._C, self._n_obs
        rnd = self._rnd
        v0 = self._tau[:, rnd] ** 2  # (chain, R)
        # -n log(s) / 2 + base / s + sum_pu [-cnt log(1 + v a / s) / 2 + v W / (2 s (s + v a))]; with
        # x = log sigma, sum_pu cnt log(1 + v a / s) = sum_pu cnt log(s + v a) - 2 x n_terms
        n_terms = 0.0 if vals is None else (float(cnt.sum()) if cnt is not None else float(W[0].size))

        if vals is None:
            def logf(x):
                s = np.exp(2.0 * x)
                return (1.0 - n_obs) * x + base / s - (0.5 / scale2) * s
        else:
            lam = v0[..., None] * vals  # (chain, R, units)
            hw = (0.5 * v0)[..., None] * W

            def logf(x):
                s = np.exp(2.0 * x)
                D = lam + s[..., None, None]
                q = (hw / D).sum(axis=(-2, -1))
                np.log(D, out=D)
                if cnt is not None:
                    D *= cnt
                return ((1.0 - n_obs + n_terms) * x + (base + q) / s - 0.5 * D.sum(axis=(-2, -1))
                        - (0.5 / scale2) * s)

        x, k = gm.slice_step_vec(np.log(self._sigma), logf, self._rngs,
                                 width=min(1.0, _SIGMA_WIDTH / math.sqrt(n_obs + 1)), **_SLICE_SIGMA)
        self._count(k)
        sigma = np.exp(x)
        if vals is None or not self._ridge:
            self._sigma = sigma
            return
        s0 = sigma**2
        prior_var = self._log_prior_var
        # along the line: s + v a = D0 - t (a - 1) per unit and v W / 2 = G0 - t W / 2
        D0 = v0[..., None] * vals + s0[:, None, None]
        E = vals - 1.0
        hW = 0.5 * W
        G0 = v0[..., None] * hW
        t_hi = v0.min(axis=1)  # the line stays inside the support for -s0 < t < min_p v0_p
        c_log = (n_terms - n_obs - 1.0) * 0.5

        def logf_ridge(t):  # t (m, chain): variances v0 - t and s0 + t
            ok = (t < t_hi) & (t > -s0)
            fine = bool(ok.all())
            if not fine:
                t = np.where(ok, t, 0.0)
            tt = t[..., None, None]
            D = D0 - tt * E
            q = ((G0 - tt * hW) / D).sum(axis=(-2, -1))
            np.log(D, out=D)
            if cnt is not None:
                D *= cnt
            v, s = v0 - t[..., None], s0 + t
            # log-likelihood at x = log(s) / 2, the prior of sigma and the Jacobian of the variance coordinates
            out = (c_log * np.log(s) + (base + q) / s - 0.5 * D.sum(axis=(-2, -1)) - (0.5 / scale2) * s
                   + np.sum(prior_var(v) - 0.5 * np.log(v), axis=-1))
            return out if fine else np.where(ok, out, -np.inf)

        width = 0.5 * np.mean(v0 + s0[:, None], axis=1)
        t, k = gm.slice_step_vec(np.zeros(C), logf_ridge, self._rngs, width=width, **_SLICE_RIDGE)
        self._count(k)
        tau = self._tau.copy()
        tau[:, rnd] = np.sqrt(v0 - t[:, None])
        self._tau = tau
        self._sigma = np.sqrt(s0 + t)

    def _count(self, k: np.ndarray) -> None:
        """Add per-column evaluation counts of a lockstep slice step (columns chain-major)."""
        self._n_evals += np.asarray(k).reshape(self._C, -1).sum(axis=1)

    def _update_tau_diagonal(self, Abs, mgs) -> None:
        """Every ``log tau_p`` by slice sampling, blocks of a group and chains in lockstep (blocks are
        independent given ``beta, Gamma, sigma``; within a block the scales are updated one after another)."""
        C = self._C
        for gi, (grp, (A, b), mg) in enumerate(zip(self._groups, Abs, mgs)):
            codes = self._codes[gi] if self._data.outcome == "gaussian" else None
            for j in range(grp.k):
                sel = self._random[grp.idx[:, j]]
                if not sel.any():
                    continue
                coefs = grp.idx[sel, j]
                R = len(coefs)
                L = self._group_L(grp)
                if sel.all():
                    As, bs, ms = A, b, mg
                else:
                    As, bs, ms, L = A[:, :, sel], b[:, :, sel], mg[:, :, sel], L[:, :, sel]
                kk, g2 = gm.group_tau_terms(As, bs, ms, L, j)  # (chain or 1, N, R)
                kk = np.broadcast_to(kk, g2.shape)
                wts = None
                if codes is not None and sel.all():  # scalar blocks: sum over distinct X_i'X_i values
                    vals, code, counts = codes
                    U = len(vals)
                    g2 = np.bincount(code, weights=np.swapaxes(g2, 1, 2).ravel(), minlength=C * R * U)
                    g2 = g2.reshape(C * R, U).T
                    wts = np.tile(counts.T, (1, C))
                    s2 = self._sigma**2 if self._sigma_free else np.ones(C)
                    kk = vals[:, None] / np.repeat(s2, R)[None, :]
                else:
                    N = g2.shape[1]
                    g2 = np.moveaxis(g2, 0, 1).reshape(N, C * R)
                    kk = np.moveaxis(kk, 0, 1).reshape(N, C * R)
                logf = self._tau_logf(kk, g2, wts)
                # width 1 on log tau: its conditional can have a long left tail (tau near 0), which a
                # narrower width would cut short through the stepping-out budget
                x, k = gm.slice_step_vec(np.log(self._tau[:, coefs]).ravel(), logf, self._rngs, **self._slice_tau)
                self._count(k)
                tau = self._tau.copy()
                tau[:, coefs] = np.exp(x).reshape(C, R)
                self._tau = tau

    def _tau_logf(self, kk, g2, wts):
        """Log density of ``x = log tau`` for each column of ``(kk, g2)`` (see :func:`_gibbs_math.group_tau_terms`)."""
        prior = self._log_prior_tau

        def logf(x):
            t2 = np.exp(2.0 * x)  # (m, columns)
            v = 1.0 + t2[:, None, :] * kk  # (m, N or distinct values, columns)
            logv = np.log(v)
            if wts is not None:
                logv = logv * wts
            return 0.5 * t2 * np.sum(g2 / v, axis=1) - 0.5 * np.sum(logv, axis=1) + prior(np.exp(x)) + x

        return logf

    def _update_tau_full(self, Abs, mgs) -> None:
        for c, rng in enumerate(self._rngs):
            for p in np.flatnonzero(self._random):
                gi, bi = self._where[self._block_of[p]]
                grp = self._groups[gi]
                idx = grp.idx[bi]
                A, b = Abs[gi]
                Ab, bb, mb = A[min(c, len(A) - 1), :, bi], b[min(c, len(b) - 1), :, bi], mgs[gi][c, :, bi]
                j = int(np.searchsorted(idx, p))
                Cb = self._corr_chol[c][np.ix_(idx, idx)]
                tau_b = self._tau[c, idx].copy()

                def logf(x, j=j, tau_b=tau_b, Ab=Ab, bb=bb, mb=mb, Cb=Cb):
                    t = math.exp(x)
                    tau_b[j] = t
                    return gm.block_collapsed(Ab, bb, mb, tau_b[:, None] * Cb) + self._log_prior_tau(t) + x

                x, k = gm.slice_step(math.log(self._tau[c, p]), logf, rng)
                self._n_evals[c] += k
                tau = self._tau.copy()
                tau[c, p] = math.exp(x)
                self._tau = tau

    def _update_corr(self, Abs, mgs) -> None:
        r = np.flatnonzero(self._random)
        d = len(r)
        gi, bi = self._where[self._block_of[r[0]]]
        idx = self._groups[gi].idx[bi]
        eta = self.priors.lkj_eta
        pos = np.searchsorted(idx, r)
        A, b = Abs[gi]
        cpcs = self._cpc.copy()
        chols = self._corr_chol.copy()
        for c, rng in enumerate(self._rngs):
            Ab, bb, mb = A[min(c, len(A) - 1), :, bi], b[min(c, len(b) - 1), :, bi], mgs[gi][c, :, bi]
            tau_b = self._tau[c, idx]
            cpc = cpcs[c].copy()
            for q in range(len(cpc)):
                y = cpc.copy()

                def logf(x, q=q, y=y):
                    y[q] = x
                    lp, Cr = gm.lkj_log_density_unconstrained(y, d, eta)
                    Cb = np.eye(len(idx))
                    Cb[np.ix_(pos, pos)] = Cr
                    return gm.block_collapsed(Ab, bb, mb, tau_b[:, None] * Cb) + lp

                x, k = gm.slice_step(cpc[q], logf, rng)
                self._n_evals[c] += k
                cpc[q] = x
            cpcs[c] = cpc
            chols[c] = self._embed_corr(cpc)
        self._cpc = cpcs
        self._corr_chol = chols

    def _sigma_terms(self, m: np.ndarray, mgs):
        """The collapsed log-likelihood as a function of the noise variance and a common scale of ``tau``.

        Returns ``(logf, colmap)``. ``logf(x, c2)``: with ``s2 = exp(2 x)``
        (x shaped (points, chain)) and every scale multiplied by ``sqrt(c2)``,
        the log-likelihood (theta integrated out) ``-n log sigma - (yy/2 -
        const) / s2 + sum -log(1 + c2 lam / s2) / 2 + c2 w^2 / (2 s2 (s2 + c2
        lam))``, where ``lam, w^2`` are the eigen-terms of every block
        (:func:`_gibbs_math.group_sigma_terms`, which scale with ``tau``
        exactly this way); ``c2`` may also be given per term (points, chain,
        terms). ``colmap``: the coefficient of every term when all blocks with
        random coefficients are scalar, else None.
        """
        n_obs, yy, C = self._n_obs, self._yy, self._C
        # sum_i (s_i'm_i - m_i'S_i m_i / 2): multiplies 1 / sigma^2, per chain
        const = np.zeros(C)
        lams, w2s, cnts, cols = [], [], [], []
        scalar = True  # every term belongs to one coefficient (scalar blocks)
        for gi, (grp, S_g, s_g, mg) in enumerate(zip(self._groups, self._gS, self._gs, mgs)):
            if grp.k == 1:
                const += np.sum(mg[..., 0] * (s_g[..., 0] - 0.5 * S_g[..., 0, 0] * mg[..., 0]), axis=(1, 2))
            else:
                Sm = (S_g @ mg[..., None])[..., 0]
                const += np.sum(mg * (s_g - 0.5 * Sm), axis=(1, 2, 3))
            L = self._group_L(grp)
            if not np.any(L):
                continue
            lam, w2 = gm.group_sigma_terms(S_g, s_g, mg, L)  # (chain, N, B, k)
            codes = self._codes[gi]
            if codes is not None:  # scalar blocks: sum over distinct X_i'X_i values
                vals, code, counts = codes
                B, U = len(grp.members), len(vals)
                lams.append(((self._tau[:, grp.idx[:, 0]] ** 2)[:, :, None] * vals).reshape(C, B * U))
                w2s.append(np.bincount(code, weights=np.swapaxes(w2[..., 0], 1, 2).ravel(),
                                       minlength=C * B * U).reshape(C, B * U))
                cnts.append(counts.ravel().astype(float))
                cols.append(np.repeat(grp.idx[:, 0], U))
            else:
                lams.append(lam.reshape(C, -1))
                w2s.append(w2.reshape(C, -1))
                cnts.append(np.ones(lam[0].size))
                scalar = scalar and grp.k == 1
                cols.append(np.broadcast_to(grp.idx[:, 0], lam.shape[1:3]).reshape(-1))
        lam = np.concatenate(lams, axis=1) if lams else np.zeros((C, 0))
        w2 = np.concatenate(w2s, axis=1) if w2s else np.zeros((C, 0))
        cnt = np.concatenate(cnts) if cnts else np.zeros(0)
        if np.all(cnt == 1.0):
            cnt = None
        base = const - 0.5 * yy
        colmap = np.concatenate(cols) if (cols and scalar) else (np.zeros(0, np.int64) if scalar else None)

        n_terms = float(cnt.sum()) if cnt is not None else float(lam.shape[1])

        def logf(x, c2=None):
            s2 = np.exp(2.0 * x)  # (m, chain)
            if c2 is None:
                v = s2[..., None] + lam
                q = w2 / v
            else:  # c2 (m, chain, 1) or (m, chain, terms)
                v = s2[..., None] + c2 * lam
                q = c2 * w2 / v
            logv = np.log(v)
            if cnt is not None:
                logv = logv @ cnt
            else:
                logv = np.sum(logv, axis=-1)
            # sum log(v / s2) = sum log v - n_terms * 2x
            return (-n_obs * x + base / s2 + 0.5 * np.sum(q, axis=-1) / s2 - 0.5 * logv + n_terms * x)

        return logf, colmap

    def _update_sigma(self, m: np.ndarray, mgs) -> None:
        """``log sigma`` by slice sampling, then a joint move of ``sigma`` and every ``tau`` along their ridge.

        The second update slices along a fixed line through the current
        ``(tau, sigma)`` of the same collapsed conditional (a valid Gibbs
        update of the coordinate along the line). When every random
        coefficient is its own block the line is ``tau_p^2 - t, sigma^2 + t``
        in the variances, exactly along the ridge ``tau_p^2 + sigma^2 =
        const`` that the data identify when participants have one or two
        observations each (its stepping-out width depends only on those
        invariants of the line); otherwise it is ``log tau_p - t, log sigma +
        t``. Both shifts have a unit Jacobian in their coordinates.
        """
        scale = self.priors.sigma_scale
        C, n_obs = self._C, self._n_obs
        lik, colmap = self._sigma_terms(m, mgs)

        def logf(x):
            return lik(x) - 0.5 * np.exp(2.0 * x) / scale**2 + x

        # the width depends on the data only: log sigma is known to about 1 / sqrt(2 n)
        x, k = gm.slice_step_vec(np.log(self._sigma), logf, self._rngs,
                                 width=min(1.0, _SIGMA_WIDTH / math.sqrt(n_obs + 1)), **_SLICE_SIGMA)
        self._count(k)
        sigma = np.exp(x)
        rnd = np.flatnonzero(self._random)
        if not len(rnd) or not self._ridge:
            self._sigma = sigma
            return
        prior = self._log_prior_tau
        if colmap is not None:
            v0, s0 = self._tau[:, rnd] ** 2, sigma**2  # (chain, R), (chain,)
            where = np.full(len(self._random), -1)
            where[rnd] = np.arange(len(rnd))
            col = where[colmap]  # every term's coefficient among the random ones
            take = np.where(col >= 0, col, len(rnd))  # the last slot: factor 1 for fixed coefficients

            def logf_ridge(t):  # t (m, chain)
                v, s = v0 - t[..., None], s0 + t
                ok = np.all(v > 0, axis=-1) & (s > 0)
                v, s = np.where(ok[..., None], v, 1.0), np.where(ok, s, 1.0)
                ratio = np.concatenate([v / v0, np.ones(t.shape + (1,))], axis=-1)
                out = (lik(0.5 * np.log(s), ratio[..., take]) - 0.5 * s / scale**2 - 0.5 * np.log(s)
                       + np.sum(prior(np.sqrt(v)) - 0.5 * np.log(v), axis=-1))
                return np.where(ok, out, -np.inf)

            # the width is a function of the line's invariants tau_p^2 + sigma^2 only; it stays wide
            # because the conditional can also have a spike at an end of the line (the Jacobian
            # 1 / (2 tau_p) of the variance coordinates), a second piece of the slice to reach
            width = 0.5 * np.mean(v0 + s0[:, None], axis=1)
            t, k = gm.slice_step_vec(np.zeros(C), logf_ridge, self._rngs, width=width, **_SLICE_RIDGE)
            tau = self._tau.copy()
            tau[:, rnd] = np.sqrt(v0 - t[:, None])
            self._sigma = np.sqrt(s0 + t)
        else:
            lt = np.log(self._tau[:, rnd])
            x0 = np.log(sigma)

            def logf_ridge(t):  # t (m, chain)
                x = x0 + t
                ltau = lt - t[..., None]  # (m, chain, R)
                return (lik(x, np.exp(-2.0 * t)[..., None]) - 0.5 * np.exp(2.0 * x) / scale**2 + x
                        + np.sum(prior(np.exp(ltau)) + ltau, axis=-1))

            t, k = gm.slice_step_vec(np.zeros(C), logf_ridge, self._rngs)
            tau = self._tau.copy()
            tau[:, rnd] = np.exp(lt - t[:, None])
            self._sigma = np.exp(x0 + t)
        self._count(k)
        self._tau = tau

    def _mean_terms(self, Abs, Ls) -> tuple[np.ndarray, np.ndarray]:
        """Each participant's likelihood of its prior mean, theta integrated out: precision (chain, N, P*P)
        and linear term (chain, N, P), assembled from the coefficient groups."""
        C, N, P = self._theta.shape
        Pm = np.zeros((C, N, P * P))
        cm = np.zeros((C, N, P))
        for grp, (A, b), L in zip(self._groups, Abs, Ls):
            Pb, cb = gm.group_mean_precision(A, b, L)
            Pm[:, :, grp.flat] = np.broadcast_to(Pb, (C,) + Pb.shape[1:]).reshape(C, N, -1)
            cm[:, :, grp.idx.ravel()] = np.broadcast_to(cb, (C,) + cb.shape[1:]).reshape(C, N, -1)
        return Pm, cm

    def _update_mean(self, Abs, Ls) -> None:
        C, N, P = self._theta.shape
        Z = self._Z
        a = Z.shape[1]
        D = a * P
        if a == 1:  # no covariates: only the sums over participants are needed
            prec = np.zeros((C, P * P))
            lin = np.zeros((C, P))
            for grp, (A, b), L in zip(self._groups, Abs, Ls):
                Pb, cb = gm.group_mean_precision(A, b, L)
                prec[:, grp.flat] = np.broadcast_to(Pb.sum(axis=1), (C,) + Pb.shape[2:]).reshape(C, -1)
                lin[:, grp.idx.ravel()] = np.broadcast_to(cb.sum(axis=1), (C,) + cb.shape[2:]).reshape(C, -1)
            prec = prec.reshape(C, P, P)
        else:
            Pm, cm = self._mean_terms(Abs, Ls)
            # sum_i (z_i z_i') (x) P_i, ordered (covariate slot, coefficient)
            zz = (Z[:, :, None] * Z[:, None, :]).reshape(N, a * a)
            prec = np.einsum("nz,cnf->czf", zz, Pm).reshape(C, a, a, P, P).transpose(0, 1, 3, 2, 4).reshape(C, D, D)
            lin = np.einsum("na,cnp->cap", Z, cm).reshape(C, D)
        prior = np.concatenate([np.full(P, self.priors.beta_sd ** -2.0),
                                np.full(D - P, self.priors.gamma_sd ** -2.0)])
        prec[:, np.arange(D), np.arange(D)] += prior
        Lp = np.linalg.cholesky(prec)  # prec = Lp Lp'
        z = np.stack([r.standard_normal(D) for r in self._rngs])
        # mean + Lp^{-T} z = Lp^{-T} (Lp^{-1} lin + z)
        u = np.linalg.solve(Lp, lin[..., None])[..., 0] + z
        eta = np.linalg.solve(np.swapaxes(Lp, 1, 2), u[..., None])[..., 0].reshape(C, a, P)
        self._beta = eta[:, 0].copy()
        self._gamma = np.swapaxes(eta[:, 1:], 1, 2).copy()


# ----------------------------------------------------------------------
# Whole-posterior sampling
# ----------------------------------------------------------------------
def sample_fast(data: ModelData, priors: PriorSpec, *, chains: int = 4, draws: int = 1000, tune: int = 500,
                thin: int = 1, rng: RngLike = None, progress: bool = False,
                init: Literal["prior", "dispersed"] = "dispersed", sampler: type | None = None):
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
    sampler : type, optional
        The sampler class, :class:`GibbsSampler` (default) or a subclass such
        as :class:`~poolbandit.models.mixture.MixtureGibbsSampler`, whose
        ``_extra_draws``, ``_extra_coords`` and ``_extra_attrs`` add its own
        posterior variables, coordinates and attributes.

    Returns
    -------
    arviz.InferenceData
        ``posterior``: ``beta (coef)``, ``gamma (coef, covariate)`` when there
        are covariates, ``tau (coef)``, ``sigma ()`` for a gaussian outcome
        with unknown noise, ``theta (participant, coef)``, and ``corr (coef,
        coef_)`` for a full covariance, plus the sampler's extra variables.
        ``observed_data``: ``y (obs)``. ``sample_stats``: ``n_evals``, the
        log-density evaluations of the slice steps in the sweep (a cost
        measure).
    """
    import arviz as az

    if chains < 1 or draws < 1 or tune < 0 or thin < 1:
        raise ValueError(f"need chains >= 1, draws >= 1, tune >= 0, thin >= 1; got {chains}, {draws}, {tune}, {thin}")
    sampler = GibbsSampler if sampler is None else sampler
    P, Q, N = data.n_coef, len(data.covariates), data.n_participants
    sigma_free = data.outcome == "gaussian" and data.obs_sd is None
    out = {"beta": np.empty((chains, draws, P)), "tau": np.empty((chains, draws, P)),
           "theta": np.empty((chains, draws, N, P))}
    extra_dims: dict[str, list[str]] = {}
    extra_coords: dict = {}
    extra_attrs: dict = {}
    if Q:
        out["gamma"] = np.empty((chains, draws, P, Q))
    if sigma_free:
        out["sigma"] = np.empty((chains, draws))
    if priors.covariance == "full":
        out["corr"] = np.empty((chains, draws, P, P))
    n_evals = np.empty((chains, draws), dtype=np.int64)
    streams = spawn(rng, chains)
    # chains run in lockstep (one sampler with a chain axis) unless their arrays would be large
    lockstep = chains * N * P * P <= _LOCKSTEP_SIZE
    runs = [list(range(chains))] if lockstep else [[c] for c in range(chains)]
    iterator = runs
    if progress:
        from tqdm.auto import tqdm

        iterator = tqdm(runs, desc=sampler._PROGRESS, unit="chain" if not lockstep else "run")
    for cs in iterator:
        s = sampler._chains(data, priors, [streams[c] for c in cs], init)
        extra_coords, extra_attrs = s._extra_coords(), s._extra_attrs()
        s.sweep(tune)
        for d in range(draws):
            s.sweep(thin)
            out["beta"][cs, d] = s._beta
            out["tau"][cs, d] = s._tau
            out["theta"][cs, d] = s._theta
            for name, (value, vdims) in s._extra_draws().items():
                if name not in out:
                    out[name] = np.empty((chains, draws) + value.shape[1:])
                    extra_dims[name] = vdims
                out[name][cs, d] = value
            if Q:
                out["gamma"][cs, d] = s._gamma
            if sigma_free:
                out["sigma"][cs, d] = s._sigma
            if priors.covariance == "full":
                out["corr"][cs, d] = s._corr_chol @ np.swapaxes(s._corr_chol, 1, 2)
            n_evals[cs, d] = s._n_evals
    coef = list(data.coef)
    coords = {"coef": coef, "participant": list(data.participants), **extra_coords}
    dims = {"beta": ["coef"], "tau": ["coef"], "theta": ["participant", "coef"], **extra_dims}
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
        idata[group].attrs.update({"engine": "fast", "sampler": "partially collapsed Gibbs", **extra_attrs,
                                   "tune": int(tune), "thin": int(thin), "init": init})
    return idata
