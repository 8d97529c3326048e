"""Uniform random assignment: the control condition of most studies."""

from __future__ import annotations

import numpy as np

from .base import Batch, Policy

__all__ = ["RandomPolicy"]


class RandomPolicy(Policy):
    """Every arm with probability 1/K at every decision."""

    kind = "random"

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        return np.full((len(batch), self.n_arms), 1.0 / self.n_arms)
