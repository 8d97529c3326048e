"""Polya-Gamma variates and their closed-form moments.

The bernoulli engine augments every observation with ``omega ~ PG(1, x' theta)``
(Polson, Scott and Windle 2013); the variates come from the ``polyagamma``
package, driven by our own :class:`numpy.random.Generator` so that a seed fixes
every draw. The moments are used by the tests to check those variates.

References
----------
.. [1] Polson, N. G., Scott, J. G. and Windle, J. (2013). Bayesian inference for
   logistic models using Polya-Gamma latent variables. *Journal of the American
   Statistical Association* 108(504), 1339-1349. doi:10.1080/01621459.2013.829001
"""

from __future__ import annotations

import numpy as np
from polyagamma import random_polyagamma

__all__ = ["draw_pg", "draw_pg_counts", "pg_mean", "pg_var"]


def draw_pg(h: np.ndarray | float, c: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Draw ``PG(h, c)`` variates elementwise (``h`` > 0 broadcast against ``c``)."""
    c = np.asarray(c, dtype=float)
    if c.size == 0:
        return np.zeros(c.shape)
    hh = np.asarray(h, dtype=float)
    if np.all(hh == np.round(hh)):
        # Devroye's exact sampler; an integer h draws the sum of h PG(1, c) variables, so the cost is that of
        # the per-observation draws it replaces, less the per-variate overhead
        out = random_polyagamma(hh, c, method="devroye", random_state=rng)
    else:
        out = random_polyagamma(hh, c, random_state=rng)
    return np.asarray(out, dtype=float).reshape(np.broadcast(hh, c).shape)


def draw_pg_counts(h: np.ndarray, c: np.ndarray, rng: np.random.Generator, out: np.ndarray) -> np.ndarray:
    """Draw ``PG(h, c)`` into ``out`` for positive integer counts ``h`` (arrays of one shape; no checks).

    The hot path of the bernoulli engine: Devroye's exact sampler as in
    :func:`draw_pg`, the same variates for the same generator state, without
    the argument handling.
    """
    random_polyagamma(h, c, method="devroye", random_state=rng, out=out)
    return out


def pg_mean(h: np.ndarray | float, c: np.ndarray | float) -> np.ndarray:
    """``E[PG(h, c)] = h / (2c) tanh(c / 2)`` ([1]_), ``h / 4`` at ``c = 0``."""
    c = np.abs(np.asarray(c, dtype=float))
    small = c < 1e-4
    cs = np.where(small, 1.0, c)
    # series of tanh(c/2)/(2c) = 1/4 - c^2/48 + ... near 0
    return np.asarray(h) * np.where(small, 0.25 - c**2 / 48.0, np.tanh(cs / 2.0) / (2.0 * cs))


def pg_var(h: np.ndarray | float, c: np.ndarray | float) -> np.ndarray:
    """``Var[PG(h, c)] = h / (4 c^3) (sinh c - c) sech^2(c / 2)`` ([1]_), ``h / 24`` at ``c = 0``."""
    c = np.abs(np.asarray(c, dtype=float))
    small = c < 1e-2
    cs = np.where(small, 1.0, c)
    exact = (np.sinh(cs) - cs) / (4.0 * cs**3) / np.cosh(cs / 2.0) ** 2
    # series near 0: 1/24 - c^2/120 (from expanding the closed form)
    return np.asarray(h) * np.where(small, 1.0 / 24.0 - c**2 / 120.0, exact)
