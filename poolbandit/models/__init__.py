"""The hierarchical model: data, coefficient layout, the fast Gibbs engine and arm effects."""

from .data import ModelData
from .effects import arm_effects, context_vector
from .gibbs import GibbsSampler, GibbsState, sample_fast

__all__ = ["ModelData", "GibbsSampler", "GibbsState", "sample_fast", "arm_effects", "context_vector"]
