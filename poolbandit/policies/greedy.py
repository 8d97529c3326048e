"""Epsilon-greedy and epsilon-decreasing on each participant's observed arm means.

Arms a participant has never been observed on have an index of +inf, so the
greedy part tries each arm once before it trusts a mean (ties split evenly).
"""

from __future__ import annotations

import numpy as np

from ._probability import argmax_ties
from ._stats import ArmStats
from .base import Batch, Policy

__all__ = ["EpsilonGreedyPolicy", "EpsilonDecreasingPolicy"]


class EpsilonGreedyPolicy(Policy):
    """With probability ``epsilon`` a uniform arm, otherwise the best observed mean.

    The probability of arm k is ``epsilon / K + (1 - epsilon) * g_k`` where
    ``g`` splits 1 evenly over the arms with the highest mean.

    References
    ----------
    .. [1] Sutton, R. S. and Barto, A. G. (2018). *Reinforcement Learning: An
       Introduction*, 2nd ed., section 2.2. MIT Press.
    """

    kind = "epsilon-greedy"

    def _start(self) -> None:
        self.stats = ArmStats(self.n_participants, self.n_arms)

    def _update(self, participant, arm, context, reward) -> None:
        self.stats.add(participant, arm, reward)

    def _epsilon(self, batch: Batch) -> np.ndarray:
        return np.full(len(batch), float(self.params["epsilon"]))

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        eps = self._epsilon(batch)[:, None]
        return eps / self.n_arms + (1 - eps) * argmax_ties(self._index(batch.participant, batch.context))

    def _index(self, participant: np.ndarray, context: np.ndarray) -> np.ndarray:
        return self.stats.means(participant)

    def _exploit_index(self, participant, context) -> np.ndarray:
        return self._index(participant, context)


class EpsilonDecreasingPolicy(EpsilonGreedyPolicy):
    """Epsilon-greedy with ``epsilon_t = min(1, c / t)`` at the participant's decision ``t``.

    References
    ----------
    .. [1] Auer, P., Cesa-Bianchi, N. and Fischer, P. (2002). Finite-time
       analysis of the multiarmed bandit problem. *Machine Learning* 47,
       235-256 (the epsilon_n-greedy rule). doi:10.1023/A:1013689704352
    """

    kind = "epsilon-decreasing"

    def _epsilon(self, batch: Batch) -> np.ndarray:
        return np.minimum(1.0, float(self.params["c"]) / batch.decision)
