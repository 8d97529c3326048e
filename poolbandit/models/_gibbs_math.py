"""Numerical kernels of the fast engine: collapsed Gaussian blocks, slice sampling, LKJ.

Everything here is vectorised over participants (leading axis ``N``); the only
Python loops run over coefficient blocks or over the steps of a univariate
slice sampler.

Collapsed blocks
----------------
Given the population mean ``m_i`` and a factor ``L`` of the random-effect
covariance (``Sigma = L L'``), participant ``i``'s data enter through a
Gaussian "likelihood" ``exp(-theta' A_i theta / 2 + b_i' theta)``. Writing
``theta_i = m_i + L z_i`` with ``z_i ~ N(0, I)`` and integrating ``z_i`` out,

.. math::

    \\log \\int = -\\tfrac12 m_i'A_i m_i + b_i'm_i - \\tfrac12 \\log|M_i|
                 + \\tfrac12 r_i'L M_i^{-1} L'r_i,
    \\qquad M_i = I + L'A_iL, \\quad r_i = b_i - A_i m_i.

This form never inverts ``Sigma``, so coefficients without participant
variation (a zero row of ``L``) need no special case.

References
----------
.. [1] Neal, R. M. (2003). Slice sampling. *Annals of Statistics* 31(3), 705-767.
   doi:10.1214/aos/1056562461
.. [2] Lewandowski, D., Kurowicka, D. and Joe, H. (2009). Generating random
   correlation matrices based on vines and extended onion method. *Journal of
   Multivariate Analysis* 100(9), 1989-2001. doi:10.1016/j.jmva.2009.04.008
"""

from __future__ import annotations

import math
from typing import Callable

import numpy as np

__all__: list[str] = []  # private module


# --------------------------------------------------------------------------
# Collapsed Gaussian blocks
# --------------------------------------------------------------------------
_SMALL = 4  # blocks up to this size use elementwise Cholesky / substitution (less call overhead)


def _cholesky(M: np.ndarray) -> np.ndarray:
    """Batched lower Cholesky factor; elementwise over the batch for small blocks."""
    k = M.shape[-1]
    if k > _SMALL:
        return np.linalg.cholesky(M)
    C = np.zeros_like(M)
    for j in range(k):
        d = M[:, j, j] - np.sum(C[:, j, :j] ** 2, axis=1)
        C[:, j, j] = np.sqrt(d)
        for i in range(j + 1, k):
            C[:, i, j] = (M[:, i, j] - np.sum(C[:, i, :j] * C[:, j, :j], axis=1)) / C[:, j, j]
    return C


def _forward(C: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Solve ``C x = v`` for lower-triangular ``C`` (N, k, k) and ``v`` (N, k) or (N, k, r)."""
    k = C.shape[-1]
    if k > _SMALL:
        return np.linalg.solve(C, v[..., None])[..., 0] if v.ndim == 2 else np.linalg.solve(C, v)
    x = np.empty_like(v)
    for i in range(k):
        acc = v[:, i].copy()
        for j in range(i):
            acc -= (C[:, i, j] * x[:, j].T).T if v.ndim == 3 else C[:, i, j] * x[:, j]
        x[:, i] = (acc.T / C[:, i, i]).T if v.ndim == 3 else acc / C[:, i, i]
    return x


def _backward(C: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Solve ``C' x = v`` for lower-triangular ``C`` (N, k, k) and ``v`` (N, k)."""
    k = C.shape[-1]
    if k > _SMALL:
        return np.linalg.solve(np.swapaxes(C, 1, 2), v[..., None])[..., 0]
    x = np.empty_like(v)
    for i in reversed(range(k)):
        acc = v[:, i].copy()
        for j in range(i + 1, k):
            acc -= C[:, j, i] * x[:, j]
        x[:, i] = acc / C[:, i, i]
    return x


def _block_prepare(A: np.ndarray, L: np.ndarray):
    """``M_i = I + L'A_iL`` and its Cholesky factor, batched: (N, k, k)."""
    k = L.shape[0]
    M = L.T @ A @ L + np.eye(k)
    return _cholesky(M)


def block_collapsed(A: np.ndarray, b: np.ndarray, m: np.ndarray, L: np.ndarray, *,
                    with_mean_terms: bool = False) -> float:
    """Sum over participants of the collapsed log-likelihood of one block.

    Parameters
    ----------
    A : (N, k, k); b, m : (N, k); L : (k, k)
    with_mean_terms : bool
        Include ``-m'Am/2 + b'm`` (needed when ``A, b`` change, i.e. for sigma).
    """
    r = b - np.einsum("nij,nj->ni", A, m)
    extra = 0.0
    if with_mean_terms:
        extra = float(np.sum(b * m) - 0.5 * np.einsum("ni,nij,nj->", m, A, m))
    if L.shape[0] == 1:
        l2 = L[0, 0] ** 2
        a = A[:, 0, 0]
        Mi = 1.0 + l2 * a
        return extra + float(-0.5 * np.sum(np.log(Mi)) + 0.5 * l2 * np.sum(r[:, 0] ** 2 / Mi))
    if not np.any(L):
        return extra
    C = _block_prepare(A, L)
    v = _forward(C, r @ L)
    logdet = np.sum(np.log(np.diagonal(C, axis1=1, axis2=2)))
    return extra + float(-logdet + 0.5 * np.sum(v * v))


def block_mean_precision(A: np.ndarray, b: np.ndarray, L: np.ndarray):
    """Precision and linear term of ``m_i`` with ``theta_i`` integrated out.

    Returns ``(P_i, c_i)`` with ``P_i = A_i - A_i L M_i^{-1} L' A_i`` and
    ``c_i = b_i - A_i L M_i^{-1} L' b_i`` (Woodbury: ``P_i = (A_i^{-1} + Sigma)^{-1}``).
    """
    if L.shape[0] == 1:
        l2 = L[0, 0] ** 2
        Mi = 1.0 + l2 * A[:, 0, 0]
        return (A[:, 0, 0] / Mi)[:, None, None], (b[:, 0] / Mi)[:, None]
    if not np.any(L):
        return A, b
    C = _block_prepare(A, L)
    LtA = L.T @ A  # L'A_i
    G = _forward(C, LtA)  # C^{-1} L'A_i
    g = _forward(C, b @ L)  # C^{-1} L'b_i
    return A - np.einsum("nki,nkj->nij", G, G), b - np.einsum("nki,nk->ni", G, g)


def block_draw_theta(A: np.ndarray, b: np.ndarray, m: np.ndarray, L: np.ndarray,
                     rng: np.random.Generator) -> np.ndarray:
    """Draw ``theta_i = m_i + L z_i`` from its full conditional, batched."""
    n, k = m.shape
    e = rng.standard_normal((n, k))
    r = b - np.einsum("nij,nj->ni", A, m)
    if k == 1:
        l = L[0, 0]
        Mi = 1.0 + l * l * A[:, 0, 0]
        z = l * r[:, 0] / Mi + e[:, 0] / np.sqrt(Mi)
        return m + (l * z)[:, None]
    if not np.any(L):
        return m.copy()
    C = _block_prepare(A, L)
    u = _forward(C, r @ L)  # C^{-1} L'r
    z = _backward(C, u + e)  # M^{-1}L'r + C^{-T} e
    return m + z @ L.T


# --------------------------------------------------------------------------
# Groups of equal-sized blocks, batched: A (N, B, k, k), b and m (N, B, k), L (B, k, k)
# --------------------------------------------------------------------------
def _chol(M: np.ndarray) -> np.ndarray:
    """Lower Cholesky factor over any leading axes; elementwise for small ``k``."""
    k = M.shape[-1]
    if k > _SMALL:
        return np.linalg.cholesky(M)
    C = np.zeros_like(M)
    for j in range(k):
        d = M[..., j, j] - np.sum(C[..., j, :j] ** 2, axis=-1) if j else M[..., 0, 0]
        C[..., j, j] = np.sqrt(d)
        for i in range(j + 1, k):
            num = M[..., i, j] - np.sum(C[..., i, :j] * C[..., j, :j], axis=-1) if j else M[..., i, 0]
            C[..., i, j] = num / C[..., j, j]
    return C


def _fwd(C: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Solve ``C x = v``: ``C`` (..., k, k) lower triangular, ``v`` (..., k) or (..., k, r) if ``v.ndim > C.ndim - 1``."""
    k = C.shape[-1]
    mat = v.ndim == C.ndim
    if k > _SMALL:
        return np.linalg.solve(C, v) if mat else np.linalg.solve(C, v[..., None])[..., 0]
    x = np.empty_like(v)
    for i in range(k):
        if mat:
            acc = v[..., i, :] - np.einsum("...j,...jr->...r", C[..., i, :i], x[..., :i, :]) if i else v[..., 0, :]
            x[..., i, :] = acc / C[..., i, i, None]
        else:
            acc = v[..., i] - np.sum(C[..., i, :i] * x[..., :i], axis=-1) if i else v[..., 0]
            x[..., i] = acc / C[..., i, i]
    return x


def _bwd(C: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Solve ``C' x = v`` for lower-triangular ``C`` (..., k, k) and ``v`` (..., k)."""
    k = C.shape[-1]
    if k > _SMALL:
        return np.linalg.solve(np.swapaxes(C, -1, -2), v[..., None])[..., 0]
    x = np.empty_like(v)
    for i in reversed(range(k)):
        acc = v[..., i] - np.sum(C[..., i + 1:, i] * x[..., i + 1:], axis=-1) if i < k - 1 else v[..., i]
        x[..., i] = acc / C[..., i, i]
    return x


def _mv(M: np.ndarray, v: np.ndarray) -> np.ndarray:
    """``M v`` over broadcast leading axes: (..., k, k) x (..., k) -> (..., k)."""
    return (M @ v[..., None])[..., 0]


def _tmv(M: np.ndarray, v: np.ndarray) -> np.ndarray:
    """``M' v`` over broadcast leading axes."""
    return (np.swapaxes(M, -1, -2) @ v[..., None])[..., 0]


def group_mean_precision(A: np.ndarray, b: np.ndarray, L: np.ndarray):
    """:func:`block_mean_precision` for groups of blocks: ``A`` (..., k, k), ``b`` (..., k), ``L``
    broadcastable to ``A``; returns ``(P, c)`` with the broadcast shapes."""
    k = A.shape[-1]
    if k == 1:
        l2 = L[..., 0, 0] ** 2
        Mi = 1.0 + l2 * A[..., 0, 0]
        return A / Mi[..., None, None], b / Mi[..., None]
    LtA = np.swapaxes(L, -1, -2) @ A
    C = _chol(LtA @ L + np.eye(k))
    G = _fwd(C, LtA)  # C^{-1} L'A
    g = _fwd(C, _tmv(L, b))  # C^{-1} L'b
    return A - np.swapaxes(G, -1, -2) @ G, b - _tmv(G, g)


def group_draw_theta(A: np.ndarray, b: np.ndarray, m: np.ndarray, L: np.ndarray, e: np.ndarray) -> np.ndarray:
    """:func:`block_draw_theta` for groups of blocks with standard normal ``e`` shaped like ``m``."""
    k = A.shape[-1]
    if k == 1:
        l = L[..., 0, 0]
        a = A[..., 0, 0]
        Mi = 1.0 + l * l * a
        r = b[..., 0] - a * m[..., 0]
        return m + (l * (l * r / Mi + e[..., 0] / np.sqrt(Mi)))[..., None]
    r = b - _mv(A, m)
    Lt = np.swapaxes(L, -1, -2)
    C = _chol(Lt @ A @ L + np.eye(k))
    u = _fwd(C, _tmv(L, r))
    z = _bwd(C, u + e)
    return m + _mv(L, z)


def group_tau_terms(A: np.ndarray, b: np.ndarray, m: np.ndarray, L: np.ndarray, j: int):
    """Reduce the collapsed likelihood of ``tau`` at position ``j`` of diagonal blocks to scalars.

    For a diagonal ``Sigma`` of the block, ``Sigma = Sigma_0 + t^2 e_j e_j'``
    with ``Sigma_0`` its other scales. Integrating the other deviations out
    first leaves, per participant, a Gaussian term in the ``j`` direction with
    precision ``k_i = (P_i)_jj`` and linear term ``g_i = (c_i - P_i m_i)_j``,
    where ``(P_i, c_i)`` is :func:`group_mean_precision` under ``Sigma_0``;
    then (up to a constant in ``t``) the collapsed log-likelihood is
    ``sum_i -log(1 + t^2 k_i) / 2 + t^2 g_i^2 / (2 (1 + t^2 k_i))``, exactly
    the scalar-block form. Returns ``(k, g^2)`` with the blocks' leading shape.
    """
    if A.shape[-1] == 1:
        a = A[..., 0, 0]
        return a, (b[..., 0] - a * m[..., 0]) ** 2
    L0 = L.copy()
    L0[..., j, :] = 0.0
    L0[..., :, j] = 0.0
    P, c = group_mean_precision(A, b, L0)
    g = c[..., j] - np.sum(P[..., j, :] * m, axis=-1)
    return P[..., j, j], g * g


def group_sigma_terms(S: np.ndarray, s: np.ndarray, m: np.ndarray, L: np.ndarray):
    """Eigen-terms of the collapsed likelihood of the noise variance for groups of blocks.

    With ``A_i = S_i / s2`` and ``b_i = s_i / s2``, write ``L'S_iL = V
    diag(lam) V'`` and ``w = V'L'(s_i - S_i m_i)``; then the collapsed term of
    :func:`block_collapsed` is ``sum_k -log(1 + lam_k / s2) / 2 + w_k^2 / (2
    s2 (s2 + lam_k))`` for every ``s2``, so each slice evaluation of the noise
    scale costs elementwise work only. Returns ``(lam, w^2)`` shaped like ``m``.
    """
    k = S.shape[-1]
    if k == 1:
        l2 = L[..., 0, 0] ** 2
        u = s[..., 0] - S[..., 0, 0] * m[..., 0]
        return (l2 * S[..., 0, 0])[..., None], (l2 * u * u)[..., None]
    u = s - _mv(S, m)
    lam, V = np.linalg.eigh(np.swapaxes(L, -1, -2) @ S @ L)
    w = _tmv(V, _tmv(L, u))
    return np.maximum(lam, 0.0), w * w


# --------------------------------------------------------------------------
# Univariate slice sampling (stepping out and shrinkage), Neal 2003
# --------------------------------------------------------------------------
def slice_step(x0: float, logf: Callable[[float], float], rng: np.random.Generator, *,
               width: float = 1.0, max_steps: int = 32) -> tuple[float, int]:
    """One slice-sampling update of a scalar with log density ``logf``.

    Stepping out with at most ``max_steps`` widths, then shrinkage ([1]_,
    figures 3 and 5). ``logf`` returns ``-inf`` outside the support. Returns
    the new value and the number of density evaluations.
    """
    f0 = logf(x0)
    n_eval = 1
    if not np.isfinite(f0):
        raise FloatingPointError(f"slice sampler started at a point of zero density (x={x0!r})")
    level = f0 - rng.exponential()
    lo = x0 - width * rng.uniform()
    hi = lo + width
    j = int(np.floor(max_steps * rng.uniform()))
    k = max_steps - 1 - j
    while j > 0:
        n_eval += 1
        if not logf(lo) > level:
            break
        lo -= width
        j -= 1
    while k > 0:
        n_eval += 1
        if not logf(hi) > level:
            break
        hi += width
        k -= 1
    for _ in range(200):
        x1 = lo + (hi - lo) * rng.uniform()
        f1 = logf(x1)
        n_eval += 1
        if f1 > level:
            return x1, n_eval
        if x1 < x0:
            lo = x1
        else:
            hi = x1
    return x0, n_eval  # pragma: no cover - shrinkage collapsed numerically


def slice_step_vec(x0: np.ndarray, logf: Callable[[np.ndarray], np.ndarray], rng, *,
                   width=1.0, max_steps: int = 32, ahead: int = 3, spec: int = 4,
                   first: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Independent slice-sampling updates of ``B`` scalars, run in lockstep.

    Each scalar ``x0[b]`` gets the update of :func:`slice_step` (stepping out
    with at most ``max_steps`` widths, then shrinkage; Neal [1]_) on its own
    log density, so the scalars must be conditionally independent. ``logf``
    maps points shaped ``(m, B)`` to log densities ``(m, B)``: column ``b`` is
    evaluated under the density of scalar ``b``. Several points go into each
    call of ``logf`` to cut call overhead: the first call evaluates the start,
    the two ends of the first interval, ``ahead`` further stepping-out
    positions on each side, and the ``first`` (default ``spec``) shrinkage
    candidates of the first round as they would be if the stepping out stops
    at once (used only when it does); later calls evaluate a round of
    shrinkage candidates each (``first`` in the first round, ``spec`` in the
    others; every candidate assumes the ones before it are rejected). Evaluating a point early never
    changes which point is accepted, and a speculative candidate that is not
    used has not influenced anything (its uniforms then serve the first real
    shrinkage round), so each scalar follows exactly the slice sampler's
    transition. Columns that need no more evaluations are padded with their
    start point. The bookkeeping runs on Python floats: for the few scalars of
    a sweep that is cheaper than array operations.

    ``rng`` is a generator, or a list of generators (independent chains):
    then the scalars are split into that many equal consecutive parts and
    each part draws from its own generator (``3 + first`` uniforms per scalar
    up front, ``spec`` more per scalar of a part whenever one of its scalars
    needs another shrinkage round), so a part's draws never depend on the
    other parts. ``width`` is a number or one per scalar. Returns the new
    values and, per scalar, the number of evaluations :func:`slice_step`
    would have made.
    """
    rngs = rng if isinstance(rng, (list, tuple)) else [rng]
    xa = np.asarray(x0, dtype=float).reshape(-1)
    B = xa.shape[0]
    nr = len(rngs)
    per = B // nr
    first = spec if first is None else first
    rows = 3 + first
    U = np.empty((B, rows))
    for i, r in enumerate(rngs):
        r.random(out=U[i * per:(i + 1) * per])
    if np.ndim(width) == 0:
        wa = float(width)
        ws = [wa] * B
    else:
        wa = np.asarray(width, dtype=float).reshape(B)
        ws = wa.tolist()
    K = ahead + 1
    lo_a = xa - wa * U[:, 1]
    steps = np.arange(K, dtype=float)[:, None] * wa
    xs, Ul, los = xa.tolist(), U.tolist(), lo_a.tolist()
    his = [lo + w for lo, w in zip(los, ws)]
    spec_rows = []  # speculative shrinkage candidates of the first interval
    for x, lo, hi, u in zip(xs, los, his, Ul):
        row = []
        for j in range(3, rows):
            c = lo + (hi - lo) * u[j]
            row.append(c)
            if c < x:
                lo = c
            else:
                hi = c
        spec_rows.append(row)
    F = logf(np.concatenate([xa[None], lo_a - steps, (lo_a + wa) + steps, np.array(spec_rows).T])).T.tolist()
    levels, n, moved = [0.0] * B, [1] * B, [False] * B
    cont = []  # (scalar, side, budget left): stepping out ran past the evaluated points (rare)
    for b in range(B):
        Fb, u = F[b], Ul[b]
        f0 = Fb[0]
        if not math.isfinite(f0):
            raise FloatingPointError(f"slice sampler started at a point of zero density (x={xs[b]!r})")
        level = f0 + math.log1p(-u[0])  # f0 minus a standard exponential (inverse cdf)
        levels[b] = level
        jl = int(max_steps * u[2])  # stepping-out budgets (floor of a non-negative value)
        jr = max_steps - 1 - jl
        w = ws[b]
        lim = K if jl > K else jl
        k = 0
        while k < lim and Fb[1 + k] > level:
            k += 1
        n[b] += k + 1 if k < lim else lim
        if k:
            los[b] -= k * w
            moved[b] = True
            if k == K and jl > K:
                cont.append((b, 0, jl - K))
        lim = K if jr > K else jr
        k = 0
        while k < lim and Fb[K + 1 + k] > level:
            k += 1
        n[b] += k + 1 if k < lim else lim
        if k:
            his[b] += k * w
            moved[b] = True
            if k == K and jr > K:
                cont.append((b, 1, jr - K))
    while cont:  # evaluate K more stepping-out positions for each continuing side
        pts = np.repeat(xa[None], K, axis=0)
        pts = [pts.copy(), pts.copy()]
        for b, side, _ in cont:
            w = ws[b]
            pts[side][:, b] = [his[b] + s * w for s in range(K)] if side else [los[b] - s * w for s in range(K)]
        G = logf(np.concatenate(pts)).T.tolist()
        nxt = []
        for b, side, j in cont:
            g, level, w = G[b][side * K:(side + 1) * K], levels[b], ws[b]
            lim = K if j > K else j
            k = 0
            while k < lim and g[k] > level:
                k += 1
            n[b] += k + 1 if k < lim else lim
            if side:
                his[b] += k * w
            else:
                los[b] -= k * w
            if k == K and j > K:
                nxt.append((b, side, j - K))
        cont = nxt
    out = list(xs)
    cands = [None if moved[b] else spec_rows[b] for b in range(B)]
    vals = [None if moved[b] else F[b][2 * K + 1:] for b in range(B)]
    us = [u[3:] for u in Ul]
    active = range(B)
    while True:
        need = [b for b in active if cands[b] is None]
        if need:
            size = len(us[need[0]])  # first in the first round, spec afterwards
            pad = [[x] * size for x in xs]
            for b in need:
                x, lo, hi, u = xs[b], los[b], his[b], us[b]
                row = pad[b]
                for j in range(size):  # candidate j assumes candidates 0..j-1 are rejected
                    c = lo + (hi - lo) * u[j]
                    row[j] = c
                    if c < x:
                        lo = c
                    else:
                        hi = c
                cands[b] = row
            G = logf(np.array(pad).T).T.tolist()
            for b in need:
                vals[b] = G[b]
        still = []
        for b in active:
            level, row, g, x = levels[b], cands[b], vals[b], xs[b]
            for j in range(len(row)):
                if g[j] > level:
                    out[b] = row[j]
                    n[b] += j + 1
                    break
            else:
                n[b] += len(row)
                lo, hi = los[b], his[b]
                for c in row:
                    if c < x:
                        lo = c
                    else:
                        hi = c
                los[b], his[b] = lo, hi
                if hi - lo > 1e-12 * (1.0 + abs(x)):
                    still.append(b)
                    cands[b] = None
                # pragma: no cover - else shrinkage collapsed numerically: keep x0
        if not still:
            return np.array(out), np.array(n, dtype=np.int64)
        active = still
        for i, r in enumerate(rngs):
            lo_b, hi_b = i * per, (i + 1) * per
            if any(lo_b <= b < hi_b for b in still):
                us[lo_b:hi_b] = r.random((per, spec)).tolist()


# --------------------------------------------------------------------------
# Correlation matrices through canonical partial correlations (LKJ 2009)
# --------------------------------------------------------------------------
def cpc_to_cholesky(z: np.ndarray, d: int) -> np.ndarray:
    """Cholesky factor (lower) of a correlation matrix from its ``d(d-1)/2`` CPCs.

    CPCs fill the strictly lower triangle row by row; ``C[i, j] = z_ij
    sqrt(1 - sum_{k<j} C[i, k]^2)`` and ``C[i, i]`` closes the row to unit length.
    """
    C = np.zeros((d, d))
    C[0, 0] = 1.0
    idx = 0
    for i in range(1, d):
        rest = 1.0
        for j in range(i):
            C[i, j] = z[idx] * np.sqrt(rest)
            rest -= C[i, j] ** 2
            idx += 1
        C[i, i] = np.sqrt(max(rest, 0.0))
    return C


def cholesky_to_cpc(C: np.ndarray) -> np.ndarray:
    """Inverse of :func:`cpc_to_cholesky`."""
    d = C.shape[0]
    out = []
    for i in range(1, d):
        rest = 1.0
        for j in range(i):
            out.append(C[i, j] / np.sqrt(rest))
            rest -= C[i, j] ** 2
    return np.array(out)


def lkj_log_density_unconstrained(y: np.ndarray, d: int, eta: float) -> tuple[float, np.ndarray]:
    """Log density of ``y = atanh(CPC)`` under ``R ~ LKJ(eta)``, and the Cholesky factor.

    ``log p(C) = sum_{i>=1} (d - i - 1 + 2 eta - 2) log C_ii`` (the density of
    the Cholesky factor of an LKJ matrix, 0-based rows), plus the Jacobians of
    ``z -> C`` (``prod sqrt(1 - sum_{k<j} C_ik^2)``) and ``y -> z``
    (``prod (1 - z^2)``); see [2]_.
    """
    z = np.tanh(y)
    C = cpc_to_cholesky(z, d)
    lp = 0.0
    for i in range(1, d):
        lp += (d - i - 1 + 2.0 * eta - 2.0) * np.log(C[i, i])
        rest = 1.0
        for j in range(i):
            lp += 0.5 * np.log(rest)
            rest -= C[i, j] ** 2
    lp += float(np.sum(np.log1p(-z * z)))
    return lp, C
