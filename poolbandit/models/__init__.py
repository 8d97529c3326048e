"""The hierarchical model: data, coefficient layout, the two engines, fitting and arm effects.

``sample_full`` (PyMC NUTS) and ``diagnostics_table`` are imported lazily, so importing
this package does not import PyMC; ``fit`` (the one way to fit) imports PyMC only when the
full engine runs. ``fit`` is bound eagerly: bound lazily, the submodule ``models.fit``
would shadow the function once imported.
"""

from importlib import import_module

from .data import ModelData
from .effects import arm_effects, context_vector
from .fit import fit
from .gibbs import GibbsSampler, GibbsState, sample_fast
from .mixture import MixtureGibbsSampler, sample_mixture

__all__ = [
    "ModelData", "GibbsSampler", "GibbsState", "sample_fast", "MixtureGibbsSampler", "sample_mixture", "sample_full",
    "fit", "diagnostics_table",
    "arm_effects", "context_vector",
]

_LAZY = {"sample_full": ".pymc_engine", "diagnostics_table": ".diagnostics"}


def __getattr__(name: str):
    if name in _LAZY:
        return getattr(import_module(_LAZY[name], __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
