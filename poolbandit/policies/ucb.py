"""UCB1 on each participant's observed arm means."""

from __future__ import annotations

import numpy as np

from ._probability import argmax_ties
from ._stats import ArmStats
from .base import Batch, Policy

__all__ = ["UCB1Policy", "ucb1_index"]


def ucb1_index(n: np.ndarray, total: np.ndarray, c: float = 1.0) -> np.ndarray:
    """The UCB1 index ``mean_j + c * sqrt(2 ln n / n_j)``; untried arms get +inf.

    Parameters
    ----------
    n, total : ndarray of shape (m, K)
        Observations and reward sums per arm.
    c : float, default=1.0
        Exploration constant (1 is the published rule).

    References
    ----------
    .. [1] Auer, P., Cesa-Bianchi, N. and Fischer, P. (2002). Finite-time
       analysis of the multiarmed bandit problem. *Machine Learning* 47,
       235-256. doi:10.1023/A:1013689704352
    """
    n = np.asarray(n, dtype=float)
    total_n = n.sum(axis=1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        bonus = c * np.sqrt(2.0 * np.log(np.maximum(total_n, 1.0)) / n)
        index = total / n + bonus
    return np.where(n > 0, index, np.inf)


class UCB1Policy(Policy):
    """Deterministic UCB1 (Auer, Cesa-Bianchi and Fischer 2002); ties split evenly."""

    kind = "ucb1"

    def _start(self) -> None:
        self.stats = ArmStats(self.n_participants, self.n_arms)

    def _update(self, participant, arm, context, reward) -> None:
        self.stats.add(participant, arm, reward)

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        p = batch.participant
        return argmax_ties(ucb1_index(self.stats.n[p], self.stats.total[p], float(self.params["c"])))

    def _exploit_index(self, participant, context) -> np.ndarray:
        return self.stats.means(participant)
