"""Per-participant, per-arm running sums shared by the unpooled policies."""

from __future__ import annotations

import numpy as np

__all__ = ["ArmStats"]


class ArmStats:
    """Counts, sums and sums of squares of observed rewards, shape (N, K)."""

    def __init__(self, n_participants: int, n_arms: int):
        self.n = np.zeros((n_participants, n_arms))
        self.total = np.zeros((n_participants, n_arms))
        self.squares = np.zeros((n_participants, n_arms))

    def add(self, participant: np.ndarray, arm: np.ndarray, reward: np.ndarray) -> None:
        np.add.at(self.n, (participant, arm), 1.0)
        np.add.at(self.total, (participant, arm), reward)
        np.add.at(self.squares, (participant, arm), reward**2)

    def means(self, participant: np.ndarray, *, untried: float = np.inf) -> np.ndarray:
        """Observed means; arms never observed get ``untried`` (default +inf: try each once)."""
        n = self.n[participant]
        with np.errstate(invalid="ignore", divide="ignore"):
            m = self.total[participant] / n
        return np.where(n > 0, m, untried)
