"""Category rules evaluated on arm effects, draw by draw.

A design's ``[[categories]]`` become :class:`~poolbandit.spec.CategorySpec`
rules over one participant's arm effects ``e = (e_1, ..., e_K)``:

* ``best`` A with ``margin`` m: ``e_A - max_{j != A} e_j > m``;
* ``beats`` A ``over`` B with ``delta`` d: ``e_A - e_B > d``;
* ``within`` d: ``max_j e_j - min_j e_j <= d``, i.e. every pairwise
  difference lies inside ``[-d, d]`` (a region of practical equivalence).

The rules are evaluated on whole arrays (any leading dims: chains, draws,
participants), never in a Python loop over participants. Rules need not be
exclusive; :func:`exclusive_codes` assigns every draw to the first rule it
matches, in the design's order, and draws matching none to the remainder,
:data:`UNDETERMINED`.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import xarray as xr

from ..errors import InputError
from ..spec import CategorySpec

__all__ = [
    "UNDETERMINED",
    "category_indicators",
    "exclusive_codes",
    "rule_contrasts",
    "contrast_draws",
    "check_categories",
    "describe_rule",
]

#: Name of the remainder of the exclusive set and of the label of participants
#: whose top probability does not pass the threshold.
UNDETERMINED = "undetermined"


def check_categories(categories: Sequence[CategorySpec], arms: Sequence[str]) -> tuple[CategorySpec, ...]:
    """Check that rules exist and name only known arms (designs are already checked by the parser).

    Raises
    ------
    InputError
        If there are no rules, or a rule names an arm that is not in ``arms``.
    """
    categories = tuple(categories)
    if not categories:
        raise InputError("categories: the design declares no [[categories]]; add at least one rule to classify")
    for i, c in enumerate(categories):
        for key, arm in (("best" if c.form == "best" else "beats", c.arm), ("over", c.other)):
            if arm is not None and arm not in arms:
                raise InputError(f"categories[{i}].{key}: arm {arm!r} is not among the effect's arms {list(arms)}")
    return categories


def describe_rule(rule: CategorySpec) -> str:
    """The rule in words, e.g. ``drill beats every other arm by more than 0.2``."""
    if rule.form == "best":
        return f"{rule.arm} beats every other arm by more than {rule.threshold:g}"
    if rule.form == "beats":
        return f"{rule.arm} beats {rule.other} by more than {rule.threshold:g}"
    return f"every pairwise difference between arms lies within +-{rule.threshold:g}"


def _rule_values(values: np.ndarray, rule: CategorySpec, arms: Sequence[str]) -> np.ndarray:
    """Boolean array (...,) of whether ``rule`` holds for effects ``values`` (..., K)."""
    if rule.form == "best":
        a = arms.index(rule.arm)
        others = np.delete(values, a, axis=-1)
        return values[..., a] - others.max(axis=-1) > rule.threshold
    if rule.form == "beats":
        a, b = arms.index(rule.arm), arms.index(rule.other)
        return values[..., a] - values[..., b] > rule.threshold
    if rule.form == "within":
        return values.max(axis=-1) - values.min(axis=-1) <= rule.threshold
    raise ValueError(f"unknown rule form {rule.form!r}")  # pragma: no cover - the parser allows three forms


def category_indicators(effect: xr.DataArray, categories: Sequence[CategorySpec]) -> xr.DataArray:
    """Whether each rule holds, for every draw (or truth) of every participant.

    Parameters
    ----------
    effect : xarray.DataArray
        Arm effects with an ``arm`` dim (last or not) and any other dims,
        typically (chain, draw, participant, arm).
    categories : sequence of CategorySpec
        The rules, in the design's order.

    Returns
    -------
    xarray.DataArray of bool
        The other dims of ``effect`` followed by ``category``.
    """
    arms = [str(a) for a in effect["arm"].to_numpy()]
    categories = check_categories(categories, arms)
    e = effect.transpose(..., "arm")
    values = e.to_numpy()
    out = np.stack([_rule_values(values, c, arms) for c in categories], axis=-1)
    dims = tuple(d for d in e.dims if d != "arm") + ("category",)
    coords = {d: e[d] for d in dims[:-1] if d in e.coords}
    coords["category"] = [c.name for c in categories]
    return xr.DataArray(out, dims=dims, coords=coords, name="indicator")


def exclusive_codes(indicators: xr.DataArray) -> xr.DataArray:
    """Assign every draw to the first matching rule; ``C`` (the remainder) when none matches.

    Parameters
    ----------
    indicators : xarray.DataArray of bool
        Output of :func:`category_indicators` (``category`` dim of length C).

    Returns
    -------
    xarray.DataArray of int
        The dims of ``indicators`` without ``category``; values in ``0 .. C``,
        ``C`` meaning :data:`UNDETERMINED`.
    """
    ind = indicators.transpose(..., "category")
    v = ind.to_numpy()
    code = np.where(v.any(axis=-1), v.argmax(axis=-1), v.shape[-1]).astype(np.int16)
    return xr.DataArray(code, dims=ind.dims[:-1], coords={d: ind[d] for d in ind.dims[:-1] if d in ind.coords},
                        name="exclusive")


def rule_contrasts(categories: Sequence[CategorySpec], arms: Sequence[str]) -> list[tuple[str, str]]:
    """The pairwise contrasts ``(A, B)`` (meaning ``A - B``) that the rules name.

    ``best`` A names ``A - j`` for every other arm ``j``; ``beats`` A over B
    names ``A - B``; ``within`` names every pair in arm order. Each pair
    appears once, in the orientation first named.
    """
    arms = list(arms)
    out: list[tuple[str, str]] = []
    seen: set[frozenset] = set()

    def add(a: str, b: str) -> None:
        key = frozenset((a, b))
        if key not in seen:
            seen.add(key)
            out.append((a, b))

    for c in categories:
        if c.form == "best":
            for j in arms:
                if j != c.arm:
                    add(c.arm, j)
        elif c.form == "beats":
            add(c.arm, c.other)
        else:
            for i, a in enumerate(arms):
                for b in arms[i + 1:]:
                    add(a, b)
    return out


def contrast_draws(effect: xr.DataArray, pairs: Sequence[tuple[str, str]]) -> xr.DataArray:
    """Draws of the contrasts ``A - B`` with a ``contrast`` dim named ``"A - B"``."""
    if not pairs:
        dims = tuple(d for d in effect.dims if d != "arm") + ("contrast",)
        shape = tuple(effect.sizes[d] for d in dims[:-1]) + (0,)
        return xr.DataArray(np.zeros(shape), dims=dims, coords={"contrast": []}, name="contrast")
    a = effect.sel(arm=[p[0] for p in pairs]).to_numpy()
    b = effect.sel(arm=[p[1] for p in pairs]).to_numpy()
    diff = xr.DataArray(a - b, dims=effect.dims,
                        coords={d: effect[d] for d in effect.dims if d in effect.coords and d != "arm"})
    diff = diff.rename(arm="contrast").assign_coords(contrast=[f"{p[0]} - {p[1]}" for p in pairs])
    return diff.rename("contrast")
