"""Assignment policies, one module per family, behind one interface (:mod:`.base`)."""

from .base import Assignment, Batch, Policy
from .registry import make_policy, policy_class

__all__ = ["Assignment", "Batch", "Policy", "make_policy", "policy_class"]
