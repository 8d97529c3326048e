"""Fit the hierarchical model with either engine.

:func:`fit` is the one entry point that the command line, classification and
analysis call: it turns a StudyLog and its design into :class:`ModelData`
(or takes ready model data), picks the priors of the design, and dispatches
to the fast Gibbs engine (:func:`poolbandit.models.gibbs.sample_fast`) or to
the full PyMC NUTS engine (:func:`poolbandit.models.pymc_engine.sample_full`).
Both return an :class:`arviz.InferenceData` with the same posterior variables
(``beta``, ``gamma``, ``tau``, ``sigma``, ``theta``; see DEVELOPERS.md).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Literal

import pandas as pd

from .._random import RngLike, as_generator
from ..errors import InputError
from ..spec import PriorSpec
from .data import ModelData

if TYPE_CHECKING:  # pragma: no cover
    from ..spec import DesignSpec

__all__ = ["fit", "ENGINES"]

#: Engine names and what they run.
ENGINES = {"fast": "partially collapsed Gibbs sampler (poolbandit.models.gibbs; mixture population: "
                   "poolbandit.models.mixture)",
           "full": "PyMC NUTS (poolbandit.models.pymc_engine)"}


def fit(
    data_or_log: ModelData | pd.DataFrame,
    design: DesignSpec | None = None,
    *,
    engine: Literal["fast", "full"] = "fast",
    chains: int = 4,
    draws: int = 1000,
    tune: int | None = None,
    rng: RngLike = None,
    progress: bool = False,
    participants: list[str] | None = None,
    priors: PriorSpec | None = None,
):
    """Posterior of the hierarchical model from a StudyLog or from model data.

    Parameters
    ----------
    data_or_log : ModelData or pandas.DataFrame
        Ready model data, or a StudyLog (validated against ``design``; rows
        with a missing reward are dropped).
    design : DesignSpec, optional
        Required with a StudyLog (arms, features, covariates, reward column,
        outcome). Its ``priors`` are used unless ``priors`` is given.
    engine : {"fast", "full"}, default="fast"
        ``fast``: the vectorised Gibbs sampler; ``full``: PyMC's NUTS.
    chains : int, default=4
        Independent chains.
    draws : int, default=1000
        Kept draws per chain.
    tune : int, optional
        Warm-up iterations per chain. ``None`` resolves to the engine's own
        default: 500 sweeps for ``fast`` (the Gibbs sampler mixes in a few
        sweeps), 1000 iterations for ``full`` (NUTS step size and mass matrix
        adaptation).
    rng : numpy.random.Generator, int or None
        Source of randomness; the same seed gives the same posterior.
    progress : bool, default=False
        Show a progress bar.
    participants : list of str, optional
        The roster, in order, with a StudyLog: may add participants without
        observations yet (they get draws from the population distribution).
    priors : PriorSpec, optional
        Override the design's priors (default: ``design.priors``, or
        ``PriorSpec()`` for model data without a design).

    Returns
    -------
    arviz.InferenceData
        ``posterior`` with ``beta (coef)``, ``gamma (coef, covariate)`` when
        there are covariates, ``tau (coef)``, ``sigma ()`` for a gaussian
        outcome with unknown noise, ``theta (participant, coef)``; the
        engine's name in ``posterior.attrs["engine"]``. With ``priors.population
        = "mixture"`` (a finite mixture of normal populations,
        :mod:`poolbandit.models.mixture`) also ``weight (component)`` and
        ``component_mean (component, coef)``, and ``beta`` is the population
        mean ``sum_c weight_c component_mean_c``.

    Raises
    ------
    InputError
        A StudyLog without a design, a log that fails validation, or an
        unknown engine name.

    See Also
    --------
    poolbandit.models.diagnostics.diagnostics_table : R-hat, ESS and divergences of the result.
    poolbandit.models.effects.arm_effects : participant arm effects from ``theta``.
    """
    if engine not in ENGINES:
        raise InputError(f"engine: expected one of {', '.join(repr(e) for e in ENGINES)}, got {engine!r}")
    if isinstance(data_or_log, ModelData):
        if participants is not None:
            raise ValueError("participants applies to a StudyLog; ModelData already fixes its participants")
        data = data_or_log
    elif isinstance(data_or_log, pd.DataFrame):
        if design is None:
            raise InputError("fitting a StudyLog needs its design (pass design=...)")
        from ..log import validate_log

        log = validate_log(data_or_log, design)
        data = ModelData.from_log(log, design, participants=participants)
    else:
        raise TypeError(f"data_or_log must be a ModelData or a StudyLog DataFrame, got {type(data_or_log).__name__}")
    if priors is None:
        priors = design.priors if design is not None else PriorSpec()
    rng = as_generator(rng)
    if engine == "fast":
        kwargs = {} if tune is None else {"tune": tune}
        if priors.population == "mixture":
            from .mixture import sample_mixture

            return sample_mixture(data, priors, chains=chains, draws=draws, rng=rng, progress=progress, **kwargs)
        from .gibbs import sample_fast

        return sample_fast(data, priors, chains=chains, draws=draws, rng=rng, progress=progress, **kwargs)
    from .pymc_engine import sample_full

    return sample_full(data, priors, chains=chains, draws=draws, tune=1000 if tune is None else tune, rng=rng,
                       progress=progress)
