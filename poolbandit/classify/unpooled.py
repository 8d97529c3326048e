"""Unpooled posteriors of a study log: every participant alone, conjugate per arm.

The comparison "did pooling help?" classifies the same participants twice:
from the hierarchical posterior and from each participant's own conjugate
posterior, the one the unpooled Thompson policy keeps
(:class:`~poolbandit.policies.thompson.ThompsonPolicy`). This module replays
a log into that policy's sufficient statistics and draws from its posteriors.
"""

from __future__ import annotations

from types import MappingProxyType
from typing import Any, Mapping

import numpy as np
import pandas as pd
import xarray as xr

from .._random import RngLike, as_generator
from ..policies._catalogue import COMMON, KINDS
from ..policies.thompson import ThompsonPolicy
from ..spec import DesignSpec, PolicySpec

__all__ = ["unpooled_effects"]


def _thompson_spec(design: DesignSpec, params: Mapping[str, Any] | None) -> PolicySpec:
    if params is None:
        for spec in design.policies.values():
            if spec.kind == "thompson":
                return spec
        params = {}
    allowed = {**COMMON, **KINDS["thompson"].params}
    unknown = set(params) - set(allowed)
    if unknown:
        raise ValueError(f"unknown thompson parameter(s) {sorted(unknown)}; allowed: {sorted(allowed)}")
    full = {k: params.get(k, default) for k, (_, default) in allowed.items()}
    return PolicySpec("unpooled", "thompson", MappingProxyType(full))


def unpooled_effects(log: pd.DataFrame, design: DesignSpec, *, draws: int = 1000, params: Mapping | None = None,
                     rng: RngLike = None) -> xr.DataArray:
    """Draws of every participant's arm means from unpooled conjugate posteriors.

    Parameters
    ----------
    log : DataFrame
        A validated StudyLog; rows with a missing reward are skipped.
    design : DesignSpec
    draws : int, default=1000
        Independent posterior draws (one chain).
    params : mapping, optional
        Parameters of the conjugate model (those of policy kind ``thompson``:
        ``model``, ``prior_mean``, ``prior_sd``, ``noise_sd``, ...). Default:
        the design's first ``thompson`` policy, else that kind's defaults.
    rng : Generator, int or None

    Returns
    -------
    xarray.DataArray
        ``effect`` (chain, draw, participant, arm), participants in the order
        they first appear in the log. The conjugate models ignore context, so
        these are each arm's mean over the contexts the participant met.
    """
    rng = as_generator(rng)
    ids = list(pd.unique(log["participant"]))
    policy = ThompsonPolicy(_thompson_spec(design, params), design)
    policy.start(np.zeros((len(ids), 0)))
    who = pd.Index(ids).get_indexer(log["participant"])
    arm = pd.Categorical(log["arm"], categories=design.arms).codes
    ctx = log[list(design.features)].to_numpy(dtype=float) if design.features else np.zeros((len(log), 0))
    policy.observe(who, arm, ctx, log[design.study.reward].to_numpy(dtype=float))
    return policy.effect_draws(ids, draws, rng)
