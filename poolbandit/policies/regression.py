"""Regression-based epsilon-greedy and epsilon-decreasing.

A ridge regression of reward on arm indicators and arm-by-context
interactions (the design row ``x = onehot(arm) (x) [1, context]``) replaces
the per-arm mean: fitted per person (``pool = "person"``) or over everyone's
data (``pool = "all"``, the complete-pooling end of the spectrum). Arms never
observed (for the person, or for anyone with ``pool = "all"``) get an index of
+inf, as in the plain greedy rules.
"""

from __future__ import annotations

import numpy as np

from ..models.design_matrix import arm_rows, design_rows
from .greedy import EpsilonDecreasingPolicy, EpsilonGreedyPolicy

__all__ = ["RegressionEpsilonGreedyPolicy", "RegressionEpsilonDecreasingPolicy"]


class _RegressionIndex:
    """Mixin: ridge-regression predictions as the greedy index."""

    def _start(self) -> None:
        super()._start()
        p = self.n_arms * (1 + self.n_features)
        groups = 1 if self.params["pool"] == "all" else self.n_participants
        self._xtx = np.zeros((groups, p, p))
        self._xty = np.zeros((groups, p))

    def _group(self, participant: np.ndarray) -> np.ndarray:
        return np.zeros_like(participant) if self.params["pool"] == "all" else participant

    def _update(self, participant, arm, context, reward) -> None:
        super()._update(participant, arm, context, reward)
        x = design_rows(arm, context, self.n_arms)
        g = self._group(participant)
        np.add.at(self._xtx, g, x[:, :, None] * x[:, None, :])
        np.add.at(self._xty, g, x * reward[:, None])

    def _index(self, participant: np.ndarray, context: np.ndarray) -> np.ndarray:
        g = self._group(participant)
        p = self._xtx.shape[1]
        coef = np.linalg.solve(self._xtx[g] + float(self.params["ridge"]) * np.eye(p), self._xty[g][..., None])[..., 0]
        pred = np.einsum("nkp,np->nk", arm_rows(context, self.n_arms), coef)
        seen = self.stats.n.sum(axis=0, keepdims=True) > 0 if self.params["pool"] == "all" else self.stats.n[participant] > 0
        return np.where(np.broadcast_to(seen, pred.shape), pred, np.inf)


class RegressionEpsilonGreedyPolicy(_RegressionIndex, EpsilonGreedyPolicy):
    """Epsilon-greedy on ridge-regression predictions in today's context."""

    kind = "regression-epsilon-greedy"


class RegressionEpsilonDecreasingPolicy(_RegressionIndex, EpsilonDecreasingPolicy):
    """Epsilon-decreasing on ridge-regression predictions in today's context."""

    kind = "regression-epsilon-decreasing"
