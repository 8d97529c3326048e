"""The oracle: knows every participant's true expected rewards (simulation only)."""

from __future__ import annotations

import numpy as np

from ._probability import argmax_ties
from .base import Batch, Policy

__all__ = ["OraclePolicy"]


class OraclePolicy(Policy):
    """Assigns the true best arm in today's context (ties split evenly); regret 0."""

    kind = "oracle"
    needs_truth = True

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        return argmax_ties(self.truth.expected(batch.participant, batch.context))

    def _exploit_index(self, participant, context) -> np.ndarray:
        return self.truth.expected(participant, context)
