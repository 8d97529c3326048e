"""Replaying design policies on a log.

Common practice (micro-randomised trials): the logged propensity is the exact
probability used. Replaying the logging policy on its own log, driven through
the same steps with the same delayed feedback, must therefore give back the
logged probability table exactly; its importance weights are then all 1.
"""

import numpy as np
import pytest

from poolbandit import simulate
from poolbandit.analysis import replay_probabilities


@pytest.mark.parametrize("policy", ["solo", "control", "ucb", "explore"])
def test_replaying_the_logging_policy_reproduces_its_table(design, policy):
    """Deterministic probability rules (quadrature for Thompson, no Monte Carlo): exact up to rounding."""
    log = simulate(design, policy, 21, size=25).log
    table = replay_probabilities(log, design, policy, rng=0)
    logged = log[[f"prob_{a}" for a in design.arms]].to_numpy()
    assert np.allclose(table, logged, atol=1e-12, rtol=0)


def test_replay_without_step_column_uses_decisions(design):
    """With one enrolment wave the decision index is the step, so dropping ``step`` changes nothing."""
    log = simulate(design, "solo", 22, size=15).log
    a = replay_probabilities(log, design, "solo")
    b = replay_probabilities(log.drop(columns=["step"]), design, "solo")
    assert np.array_equal(a, b)


def test_simulation_only_policy_is_refused(design):
    log = simulate(design, "solo", 23, size=5).log
    with pytest.raises(ValueError, match="reads the simulated truth"):
        replay_probabilities(log, design, "oracle")
