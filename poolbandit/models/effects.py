"""Participant arm effects from a posterior, in a chosen context.

Both engines return an :class:`arviz.InferenceData` whose posterior holds
``theta`` with dims ``(chain, draw, participant, coef)``: every participant's
coefficients (population part plus own deviation). The arm effect of arm
``k`` in context ``c`` is ``theta_i . (onehot(k) (x) [1, c])``; this module
turns ``theta`` into an ``effect`` array with dims
``(chain, draw, participant, arm)``, the common currency of classification,
whichever design (pooled, unpooled) produced it.
"""

from __future__ import annotations

from typing import Literal, Mapping

import numpy as np
import xarray as xr
from scipy.special import expit

from .design_matrix import arm_rows

__all__ = ["arm_effects", "context_vector"]


def context_vector(features: tuple[str, ...] | list[str], context: Mapping[str, float] | None) -> np.ndarray:
    """A context as a vector in the design's feature order (missing features are 0)."""
    context = dict(context or {})
    unknown = set(context) - set(features)
    if unknown:
        raise ValueError(f"unknown context feature(s) {sorted(unknown)}; features: {list(features)}")
    return np.array([float(context.get(f, 0.0)) for f in features])


def arm_effects(
    idata,
    arms: tuple[str, ...] | list[str],
    features: tuple[str, ...] | list[str] = (),
    *,
    context: Mapping[str, float] | None = None,
    scale: Literal["linear", "probability"] = "linear",
) -> xr.DataArray:
    """Posterior draws of every participant's arm effects in one context.

    Parameters
    ----------
    idata : arviz.InferenceData or xarray.Dataset
        A posterior with ``theta`` (chain, draw, participant, coef).
    arms, features : sequence of str
        The design's arms and context features (coefficient order).
    context : mapping, optional
        Feature values (default: every feature 0, the reference context).
    scale : {"linear", "probability"}, default="linear"
        ``probability`` applies the logistic function (bernoulli outcomes).

    Returns
    -------
    xarray.DataArray
        ``effect`` with dims (chain, draw, participant, arm).
    """
    post = idata.posterior if hasattr(idata, "posterior") else idata
    theta = post["theta"]
    c = context_vector(features, context)
    rows = arm_rows(c[None, :], len(arms))[0]  # (K, P)
    values = np.einsum("cdip,kp->cdik", theta.to_numpy(), rows)
    if scale == "probability":
        values = expit(values)
    return xr.DataArray(
        values, dims=("chain", "draw", "participant", "arm"),
        coords={"chain": theta["chain"].to_numpy(), "draw": theta["draw"].to_numpy(),
                "participant": theta["participant"].to_numpy(), "arm": list(arms)},
        name="effect",
    )
