"""Light array-valued marginal distributions for the probability-best quadrature.

Freezing a scipy.stats distribution costs milliseconds, which dominates a
decision step of a small study; these classes hold array parameters and call
the same scipy.special kernels scipy.stats uses (``ndtr``/``ndtri``,
``betainc``/``betaincinv``, ``stdtr``/``stdtrit``). Tests compare them with
scipy.stats.
"""

from __future__ import annotations

import numpy as np
from scipy import special

__all__ = ["Normal", "Beta", "StudentT"]


class _Marginal:
    _params: tuple[str, ...] = ()

    def expand(self):
        """The same distribution with a trailing axis on every parameter."""
        return type(self)(*[np.asarray(getattr(self, p), dtype=float)[..., None] for p in self._params])


class Normal(_Marginal):
    """Normal(loc, scale) with array parameters."""

    _params = ("loc", "scale")

    def __init__(self, loc, scale):
        self.loc, self.scale = np.asarray(loc, dtype=float), np.asarray(scale, dtype=float)

    def cdf(self, x):
        return special.ndtr((x - self.loc) / self.scale)

    def ppf(self, q):
        return self.loc + self.scale * special.ndtri(q)

    def mean(self):
        return self.loc * np.ones_like(self.scale)

    def std(self):
        return self.scale * np.ones_like(self.loc)


class Beta(_Marginal):
    """Beta(a, b) with array parameters."""

    _params = ("a", "b")

    def __init__(self, a, b):
        self.a, self.b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)

    def cdf(self, x):
        return special.betainc(self.a, self.b, np.clip(x, 0.0, 1.0))

    def ppf(self, q):
        return special.betaincinv(self.a, self.b, q)

    def mean(self):
        return self.a / (self.a + self.b)

    def std(self):
        s = self.a + self.b
        return np.sqrt(self.a * self.b / (s**2 * (s + 1)))


class StudentT(_Marginal):
    """Student t with ``df`` degrees of freedom, location and scale."""

    _params = ("df", "loc", "scale")

    def __init__(self, df, loc, scale):
        self.df = np.asarray(df, dtype=float)
        self.loc, self.scale = np.asarray(loc, dtype=float), np.asarray(scale, dtype=float)

    def cdf(self, x):
        return special.stdtr(self.df, (x - self.loc) / self.scale)

    def ppf(self, q):
        return self.loc + self.scale * special.stdtrit(self.df, q)

    def mean(self):
        return np.where(self.df > 1, self.loc, np.nan) * np.ones_like(self.scale)

    def std(self):
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.df > 2, self.scale * np.sqrt(self.df / (self.df - 2)), np.inf)
