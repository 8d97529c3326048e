"""The catalogue of policy kinds: their parameters and the constraints on them.

This module is pure data so that :mod:`poolbandit.spec` can validate a design
file without importing any policy implementation. Adding a policy kind means
adding one entry to :data:`KINDS` and one class registered in
:mod:`poolbandit.policies.registry`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

__all__ = ["Constraint", "Number", "Choice", "Flag", "Band", "KindInfo", "KINDS", "COMMON"]


class Constraint:
    """A declared constraint on one parameter value."""

    def check(self, value: Any) -> Any:  # pragma: no cover - interface
        raise NotImplementedError

    def describe(self) -> str:  # pragma: no cover - interface
        raise NotImplementedError


@dataclass(frozen=True)
class Number(Constraint):
    """A real (or integer) number inside an interval."""

    low: float = -math.inf
    high: float = math.inf
    low_open: bool = False
    high_open: bool = False
    integer: bool = False

    def describe(self) -> str:
        what = "an integer" if self.integer else "a number"
        lo, hi = self.low, self.high
        if lo == -math.inf and hi == math.inf:
            return what
        if hi == math.inf:
            return f"{what} {'>' if self.low_open else '>='} {_fmt(lo)}"
        if lo == -math.inf:
            return f"{what} {'<' if self.high_open else '<='} {_fmt(hi)}"
        left = "(" if self.low_open else "["
        right = ")" if self.high_open else "]"
        return f"{what} in {left}{_fmt(lo)}, {_fmt(hi)}{right}"

    def check(self, value: Any) -> Any:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ValueError(self.describe())
        if self.integer and not (isinstance(value, int) or float(value).is_integer()):
            raise ValueError(self.describe())
        v = float(value)
        if math.isnan(v):
            raise ValueError(self.describe())
        too_low = v <= self.low if self.low_open else v < self.low
        too_high = v >= self.high if self.high_open else v > self.high
        if too_low or too_high:
            raise ValueError(self.describe())
        return int(v) if self.integer else v


@dataclass(frozen=True)
class Choice(Constraint):
    """One string among a fixed set."""

    options: tuple[str, ...]

    def describe(self) -> str:
        return "one of " + ", ".join(f'"{o}"' for o in self.options)

    def check(self, value: Any) -> Any:
        if not isinstance(value, str) or value not in self.options:
            raise ValueError(self.describe())
        return value


@dataclass(frozen=True)
class Flag(Constraint):
    """A boolean."""

    def describe(self) -> str:
        return "true or false"

    def check(self, value: Any) -> Any:
        if not isinstance(value, bool):
            raise ValueError(self.describe())
        return value


@dataclass(frozen=True)
class Band(Constraint):
    """A pair ``[low, high]`` of probabilities with ``0 <= low <= high <= 1``."""

    def describe(self) -> str:
        return "a pair [low, high] of probabilities with 0 <= low <= high <= 1"

    def check(self, value: Any) -> Any:
        if not isinstance(value, list) or len(value) != 2:
            raise ValueError(self.describe())
        lo, hi = value
        for v in value:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 <= v <= 1:
                raise ValueError(self.describe())
        if lo > hi:
            raise ValueError(self.describe())
        return (float(lo), float(hi))


def _fmt(x: float) -> str:
    return str(int(x)) if float(x).is_integer() else repr(float(x))


@dataclass(frozen=True)
class KindInfo:
    """What a policy kind accepts.

    Attributes
    ----------
    params : dict
        Parameter name -> (constraint, default).
    simulation_only : bool
        True for kinds that read the truth (oracles): refused in a live study.
    summary : str
        One line for ``--help`` and the docs.
    """

    params: dict[str, tuple[Constraint, Any]] = field(default_factory=dict)
    simulation_only: bool = False
    summary: str = ""


#: Parameters every kind accepts.
COMMON: dict[str, tuple[Constraint, Any]] = {
    "explore_first": (Number(0, integer=True), 0),
    "clip": (Band(), None),
}

_NONNEG = Number(0)
_POS = Number(0, low_open=True)
_PROB = Number(0, 1)
_POOL = Choice(("person", "all"))

#: parameters of every kind built on the pooled posterior (pooled-thompson and the index rules)
_POOLED = {
    "sweeps": (Number(1, integer=True), 5),
    "population_draws": (Number(1, integer=True), 4),
    "burn_in": (Number(1, integer=True), 100),
    "context": (Flag(), True),
    "covariates": (Flag(), True),
    "population_mean": (Choice(("integrated", "drawn")), "integrated"),
}

KINDS: dict[str, KindInfo] = {
    "random": KindInfo(summary="uniform random assignment (the control)"),
    "epsilon-greedy": KindInfo(
        {"epsilon": (_PROB, 0.1)},
        summary="best observed mean, uniform exploration with probability epsilon",
    ),
    "epsilon-decreasing": KindInfo(
        {"c": (_POS, 1.0)},
        summary="epsilon-greedy with epsilon_t = min(1, c / t)",
    ),
    "ucb1": KindInfo(
        {"c": (_NONNEG, 1.0)},
        summary="UCB1 index mean + c * sqrt(2 ln n / n_j) (Auer et al. 2002)",
    ),
    "thompson": KindInfo(
        {
            "model": (Choice(("auto", "beta-bernoulli", "normal", "normal-inverse-gamma")), "auto"),
            "prior_mean": (Number(), 0.0),
            "prior_sd": (_POS, 1.0),
            "noise_sd": (_POS, 1.0),
            "prior_alpha": (_POS, 1.0),
            "prior_beta": (_POS, 1.0),
            "prior_shape": (_POS, 1.0),
            "prior_rate": (_POS, 1.0),
        },
        summary="unpooled Thompson sampling, each participant alone (conjugate)",
    ),
    "regression-epsilon-greedy": KindInfo(
        {"epsilon": (_PROB, 0.1), "pool": (_POOL, "person"), "ridge": (_POS, 1.0)},
        summary="epsilon-greedy on a ridge regression of reward on arm and context",
    ),
    "regression-epsilon-decreasing": KindInfo(
        {"c": (_POS, 1.0), "pool": (_POOL, "person"), "ridge": (_POS, 1.0)},
        summary="epsilon-decreasing on a ridge regression of reward on arm and context",
    ),
    "oracle": KindInfo(simulation_only=True, summary="knows the truth (simulation only)"),
    # Pooled (hierarchical) policies: see poolbandit.policies.pooled.
    "pooled-thompson": KindInfo(
        dict(_POOLED),
        summary="Thompson sampling from the partially pooled hierarchical posterior",
    ),
    "complete-pooling-thompson": KindInfo(
        {"prior_mean": (Number(), 0.0), "prior_sd": (_POS, 1.0), "noise_sd": (_POS, 1.0),
         "prior_alpha": (_POS, 1.0), "prior_beta": (_POS, 1.0), "context": (Flag(), True)},
        summary="Thompson sampling with one set of arm effects shared by everyone",
    ),
    "oracle-prior-thompson": KindInfo(
        {"context": (Flag(), True)},
        simulation_only=True,
        summary="each participant alone, given the true population distribution (simulation only)",
    ),
}

# Horizon-aware index rules: see poolbandit.policies.horizon and .bayes_optimal.
_FLOOR = {"p_min": (Number(0, 1), 0.02)}
_RULES = {
    "greedy": ({}, "the arm with the highest posterior mean"),
    "bayes-ucb": ({"c": (_NONNEG, 0.0), "quantile": (Number(0, 1, low_open=True, high_open=True), None)},
                  "the arm with the highest posterior quantile 1 - 1/(t (log T)^c) (Bayes-UCB)"),
    "tempered-thompson": ({"kappa": (Number(0, 1, low_open=True), 0.5)},
                          "probability best with the posterior spread scaled by kappa"),
    "knowledge-gradient": ({"lookahead": (Number(1, integer=True), 1)},
                           "posterior mean plus remaining decisions times the value of information"),
}
for _rule, (_params, _text) in _RULES.items():
    KINDS[f"pooled-{_rule}"] = KindInfo({**_POOLED, **_params, **_FLOOR},
                                        summary=f"{_text}, pooled posterior, floor p_min")
    KINDS[f"oracle-prior-{_rule}"] = KindInfo({"context": (Flag(), True), **_params, **_FLOOR}, simulation_only=True,
                                              summary=f"{_text}, true population prior, floor p_min "
                                                      "(simulation only)")
KINDS["bayes-optimal"] = KindInfo(
    {"grid": (Number(101, integer=True), 2001), "p_min": (Number(0, 1), 0.0)},
    simulation_only=True,
    summary="Bayes-optimal finite-horizon policy by backward induction, two arms, true prior (simulation only)",
)
