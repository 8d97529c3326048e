"""The design row of the hierarchical model and of the regression policies.

Coefficients are ordered arm by arm: for arm ``k`` first its level at the
reference context (all features 0), then its interaction with each feature.
With ``F`` features there are ``P = K (1 + F)`` coefficients, and the row of a
decision on arm ``k`` in context ``c`` is ``onehot(k) (x) [1, c]``. Because the
row of arm ``k`` touches only arm ``k``'s block, ``X_i' X_i`` is block-diagonal
by arm.
"""

from __future__ import annotations

import numpy as np

__all__ = ["coef_names", "design_rows", "arm_rows"]


def coef_names(arms: list[str] | tuple[str, ...], features: list[str] | tuple[str, ...]) -> list[str]:
    """Names of the ``K (1 + F)`` coefficients, e.g. ``drill``, ``drill:weekend``."""
    return [a if j == 0 else f"{a}:{features[j - 1]}" for a in arms for j in range(1 + len(features))]


def design_rows(arm: np.ndarray, context: np.ndarray, n_arms: int) -> np.ndarray:
    """Rows ``onehot(arm) (x) [1, context]`` of shape (n, K (1 + F))."""
    context = np.asarray(context, dtype=float).reshape(len(arm), -1)
    z = np.concatenate([np.ones((len(arm), 1)), context], axis=1)  # (n, 1+F)
    x = np.zeros((len(arm), n_arms, z.shape[1]))
    x[np.arange(len(arm)), arm] = z
    return x.reshape(len(arm), -1)


def arm_rows(context: np.ndarray, n_arms: int) -> np.ndarray:
    """For every row of ``context``, the design row of each arm: shape (n, K, P)."""
    context = np.asarray(context, dtype=float)
    n = len(context)
    return np.stack([design_rows(np.full(n, k), context, n_arms) for k in range(n_arms)], axis=1)
