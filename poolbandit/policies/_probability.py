"""Vectorised helpers for randomisation probabilities.

* :func:`prob_best`: the probability that each arm is best when each arm's
  value has an independent marginal distribution (one-dimensional
  quadrature, no Monte Carlo noise);
* :func:`clip_probabilities`: keep every probability inside a band and
  renormalise;
* :func:`floor_and_split`: an index rule's winners with a randomisation floor;
* :func:`draw_arms`: draw one arm per row, returning the exact propensity.
"""

from __future__ import annotations

import numpy as np

__all__ = ["prob_best", "clip_probabilities", "argmax_ties", "floor_and_split", "draw_arms"]


def prob_best(dist, *, points_per_arm: int = 48, tail: float = 1e-9) -> np.ndarray:
    """Probability that each arm has the largest value, for independent arms.

    Parameters
    ----------
    dist : scipy.stats frozen distribution or a :mod:`._marginals` distribution
        Continuous, with parameters broadcasting to shape ``(n, K)``: arm
        ``k`` of row ``i`` has marginal ``dist`` at ``[i, k]``.
    points_per_arm : int, default=48
        Quadrature nodes placed at evenly spaced quantiles of every arm, so
        the merged grid follows narrow and wide marginals alike.
    tail : float, default=1e-9
        Probability left out in each tail of every arm.

    Returns
    -------
    ndarray of shape (n, K)
        Rows sum to 1.

    Notes
    -----
    With values :math:`V_k` independent,
    :math:`P(k\\ \\text{best}) = \\int \\prod_{j \\ne k} F_j(x)\\, dF_k(x)`,
    a Stieltjes integral computed by the trapezoid rule in :math:`F_k` on a
    merged grid of every arm's quantiles:
    :math:`\\sum_g [F_k(x_{g+1}) - F_k(x_g)]\\,\\tfrac12 [G_k(x_g) + G_k(x_{g+1})]`
    with :math:`G_k = \\prod_{j\\ne k} F_j`. Every arm's quantiles are nodes, so
    each interval moves any cdf by at most about ``1 / points_per_arm`` and the
    error is of second order in that. The small remaining quadrature error is
    removed by renormalising, so the returned table is exactly the
    distribution later used to draw an arm.
    """
    dist = _with_trailing_axis(dist)
    levels = np.linspace(tail, 1 - tail, points_per_arm)
    q = dist.ppf(levels)  # (n, K, G)
    n, k, _ = q.shape
    grid = np.sort(q.reshape(n, 1, -1), axis=-1)  # (n, 1, K*G)
    cdf = dist.cdf(grid)  # (n, K, M)
    dF = np.diff(cdf, axis=-1)  # (n, K, M-1)
    out = np.empty((n, k))
    for j in range(k):  # a loop over arms, not participants
        others = np.prod(np.delete(cdf, j, axis=1), axis=1)  # (n, M): prod over i != j of F_i
        out[:, j] = np.sum(dF[:, j, :] * (others[:, 1:] + others[:, :-1]), axis=-1) * 0.5
    out = np.clip(out, 0.0, None)
    return out / out.sum(axis=1, keepdims=True)


def _with_trailing_axis(dist):
    """The same distribution with parameters of shape (n, K, 1)."""
    if hasattr(dist, "expand"):
        return dist.expand()
    args = [np.asarray(a, dtype=float)[..., None] for a in dist.args]
    kwds = {key: np.asarray(v, dtype=float)[..., None] for key, v in dist.kwds.items()}
    return dist.dist(*args, **kwds)


def clip_probabilities(p: np.ndarray, low: float, high: float, *, iterations: int = 100) -> np.ndarray:
    """Clip each row of ``p`` into ``[low, high]`` and renormalise.

    Finds, row by row, the scale ``c`` with ``sum(clip(c p, low, high)) = 1``
    by bisection (the sum grows with ``c``), so the result lies inside the
    band, sums to one, and keeps the order of the input probabilities. The
    band must contain ``1/K``.
    """
    p = np.asarray(p, dtype=float)
    k = p.shape[1]
    if low * k > 1 + 1e-12 or high * k < 1 - 1e-12:
        raise ValueError(f"clip band [{low}, {high}] must contain 1/K = {1 / k}")
    lo = np.zeros((p.shape[0], 1))
    hi = np.full((p.shape[0], 1), 1e12)
    for _ in range(iterations):
        c = 0.5 * (lo + hi)
        s = np.clip(c * p, low, high).sum(axis=1, keepdims=True)
        lo = np.where(s < 1, c, lo)
        hi = np.where(s >= 1, c, hi)
    out = np.clip(hi * p, low, high)
    # remove the bisection's last rounding: spread the residual over interior arms
    resid = 1 - out.sum(axis=1, keepdims=True)
    free = (out > low) & (out < high)
    nfree = np.maximum(free.sum(axis=1, keepdims=True), 1)
    out = out + np.where(free, resid / nfree, 0.0)
    return out


def argmax_ties(index: np.ndarray, *, atol: float = 1e-12) -> np.ndarray:
    """One-hot rows marking the maximal entries, ties split evenly (rows sum to 1)."""
    index = np.asarray(index, dtype=float)
    top = np.max(index, axis=1, keepdims=True)
    win = (index >= top - atol) | (np.isinf(top) & np.isinf(index) & (index > 0))
    return win / win.sum(axis=1, keepdims=True)


def floor_and_split(index: np.ndarray, p_min: float = 0.0) -> np.ndarray:
    """Winners of an index take all but a floor ``p_min`` per arm; ties split evenly."""
    k = index.shape[1]
    if not 0 <= p_min * k <= 1:
        raise ValueError(f"p_min = {p_min} is too large for {k} arms")
    return p_min + (1 - k * p_min) * argmax_ties(index)


def draw_arms(p: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Draw one arm per row of ``p`` by inversion of one uniform per row.

    Returns the arm indices and their exact propensities ``p[i, arm_i]``.
    """
    u = rng.random(p.shape[0])
    cum = np.cumsum(p, axis=1)
    cum[:, -1] = np.inf  # guard against rounding: the last arm takes what is left
    arms = np.argmax(cum > u[:, None], axis=1)
    # an arm of probability zero is never drawn (argmax picks the first cum > u)
    return arms, p[np.arange(p.shape[0]), arms]
