"""Map policy kinds to their classes and build policies from a design."""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

from ._catalogue import KINDS
from .base import Policy

if TYPE_CHECKING:  # pragma: no cover
    from ..simulation.population import Population
    from ..spec import DesignSpec, PolicySpec

__all__ = ["make_policy", "policy_class", "CLASSES"]

#: kind -> "module:Class" (imported on first use, so heavy kinds cost nothing until asked for)
CLASSES: dict[str, str] = {
    "random": "poolbandit.policies.random:RandomPolicy",
    "epsilon-greedy": "poolbandit.policies.greedy:EpsilonGreedyPolicy",
    "epsilon-decreasing": "poolbandit.policies.greedy:EpsilonDecreasingPolicy",
    "ucb1": "poolbandit.policies.ucb:UCB1Policy",
    "thompson": "poolbandit.policies.thompson:ThompsonPolicy",
    "regression-epsilon-greedy": "poolbandit.policies.regression:RegressionEpsilonGreedyPolicy",
    "regression-epsilon-decreasing": "poolbandit.policies.regression:RegressionEpsilonDecreasingPolicy",
    "oracle": "poolbandit.policies.oracle:OraclePolicy",
    "pooled-thompson": "poolbandit.policies.pooled:PooledThompsonPolicy",
    "complete-pooling-thompson": "poolbandit.policies.pooled:CompletePoolingThompsonPolicy",
    "oracle-prior-thompson": "poolbandit.policies.pooled:OraclePriorThompsonPolicy",
    "pooled-greedy": "poolbandit.policies.horizon:PooledGreedyPolicy",
    "pooled-bayes-ucb": "poolbandit.policies.horizon:PooledBayesUCBPolicy",
    "pooled-tempered-thompson": "poolbandit.policies.horizon:PooledTemperedThompsonPolicy",
    "pooled-knowledge-gradient": "poolbandit.policies.horizon:PooledKnowledgeGradientPolicy",
    "oracle-prior-greedy": "poolbandit.policies.horizon:OraclePriorGreedyPolicy",
    "oracle-prior-bayes-ucb": "poolbandit.policies.horizon:OraclePriorBayesUCBPolicy",
    "oracle-prior-tempered-thompson": "poolbandit.policies.horizon:OraclePriorTemperedThompsonPolicy",
    "oracle-prior-knowledge-gradient": "poolbandit.policies.horizon:OraclePriorKnowledgeGradientPolicy",
    "bayes-optimal": "poolbandit.policies.bayes_optimal:BayesOptimalPolicy",
}


def policy_class(kind: str) -> type[Policy]:
    """The class implementing ``kind``."""
    if kind not in CLASSES:
        known = ", ".join(sorted(CLASSES))
        raise ValueError(f"policy kind {kind!r} is not implemented; implemented kinds: {known}")
    module, name = CLASSES[kind].split(":")
    return getattr(importlib.import_module(module), name)


def make_policy(spec: PolicySpec, design: DesignSpec, *, truth: Population | None = None) -> Policy:
    """Build the policy named by ``spec``; ``truth`` is passed only to simulation-only kinds."""
    cls = policy_class(spec.kind)
    return cls(spec, design, truth=truth if KINDS[spec.kind].simulation_only else None)
