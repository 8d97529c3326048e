"""Named reference scenarios: the simulated designs that tests and benchmarks share.

Each builder writes the TOML of a design and parses it with
:func:`poolbandit.spec.parse_design`, so a scenario is an ordinary validated
:class:`~poolbandit.spec.DesignSpec` (its text is in ``design.source_text``,
for example to write it to a file for the command line). All scenarios are
simulation designs: gaussian rewards unless stated, adherence 1, no dropout
and one wave unless stated.

* :func:`reference_study`: the 60 participants x 21 decisions x 3 arms study
  (arm means (0, 0.3, -0.2), heterogeneity 0.5 on every arm, noise sd 1,
  random assignment) that checks the engines against each other;
* :func:`pooling_scenario`: the pooling-spectrum scenarios A, D, E, F and A2;
* :func:`latent_types_scenario`: four latent types of participant, for the
  calibration of categories;
* :func:`preference_categories`: the "arm k best by more than a margin" and
  "no clear preference" category rules used by the last two.

The paired replicate loop and the ratio of paired means used to compare
policies on these scenarios are :func:`paired_replicates` and
:func:`paired_ratio`.
"""

from __future__ import annotations

import json
from typing import Any, Mapping, Sequence

import numpy as np

from .._random import spawn
from ..spec import DesignSpec, parse_design

__all__ = [
    "ARMS",
    "POOLING_POLICIES",
    "POOLING_SCENARIOS",
    "latent_types_scenario",
    "paired_ratio",
    "paired_replicates",
    "pooling_scenario",
    "preference_categories",
    "reference_study",
]

#: The practice formats of the demo scenario, the arm names of every reference design.
ARMS = ("drill", "story", "roleplay")

#: Policies of the pooling spectrum: hierarchical (pooled), each participant alone
#: (N(0, 1) prior, known noise sd 1), the true population prior, one shared posterior.
POOLING_POLICIES: Mapping[str, Mapping[str, Any]] = {
    "pooled": {"kind": "pooled-thompson"},
    "unpooled": {"kind": "thompson", "model": "normal", "prior_mean": 0.0, "prior_sd": 1.0, "noise_sd": 1.0},
    "oracle-prior": {"kind": "oracle-prior-thompson"},
    "complete": {"kind": "complete-pooling-thompson", "prior_sd": 1.0, "noise_sd": 1.0},
}

#: Parameters of the pooling scenarios (see :func:`pooling_scenario`).
POOLING_SCENARIOS: Mapping[str, Mapping[str, Any]] = {
    "A": {"arms": ARMS, "arm_means": (0.0, 0.3, -0.2), "heterogeneity": 0.5, "size": 60, "horizon": 21},
    "D": {"arms": ARMS, "arm_means": (0.0, 0.3, -0.2), "heterogeneity": 0.15, "size": 60, "horizon": 21},
    "E": {"arms": ARMS, "arm_means": (0.0, 0.3, -0.2), "heterogeneity": 1.0, "size": 60, "horizon": 21},
    "F": {"arms": (*ARMS, "quiz"), "arm_means": (0.0, 0.0, 0.0, 0.0), "heterogeneity": 0.4, "size": 80,
          "horizon": 28},
    "A2": {"arms": ARMS[:2], "arm_means": (0.0, 0.3), "heterogeneity": 0.5, "size": 60, "horizon": 21},
}

_LATENT_TYPES = (
    ("drill-leaning", (3.0, 2.2, 2.2)),
    ("story-leaning", (2.2, 3.0, 2.2)),
    ("roleplay-leaning", (2.2, 2.2, 3.0)),
    ("no-clear-preference", (2.4, 2.4, 2.4)),
)


# --------------------------------------------------------------------------
# TOML writing
# --------------------------------------------------------------------------
def _value(v: Any) -> str:
    """One TOML value: strings quoted, numbers as Python writes them, sequences as arrays."""
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float, np.integer, np.floating)):
        return repr(float(v)) if isinstance(v, (float, np.floating)) else str(int(v))
    if isinstance(v, (list, tuple, np.ndarray)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {v!r} as a TOML value")


def _floats(values: Sequence[float]) -> str:
    return _value([float(x) for x in values])


def _table(header: str, entries: Mapping[str, Any]) -> str:
    return "\n".join([f"[{header}]", *(f"{k} = {_value(v)}" for k, v in entries.items())])


def _policies(policies: Mapping[str, str | Mapping[str, Any]]) -> str:
    """``[policies.NAME]`` tables; a value is either a mapping of keys or the TOML body itself."""
    out = []
    for name, body in policies.items():
        out.append(f"[policies.{name}]\n{body}" if isinstance(body, str) else _table(f"policies.{name}", body))
    return "\n".join(out)


def preference_categories(arms: Sequence[str], *, margin: float, name: str = "{arm}-best") -> str:
    """TOML of the category rules "arm k best by more than ``margin``" (one per arm) and "no clear preference".

    Parameters
    ----------
    arms : sequence of str
        The design's arms, one ``best`` rule each.
    margin : float
        The ``margin`` of every ``best`` rule and the ``within`` of "no-clear-preference".
    name : str
        Name pattern of the ``best`` rules (``{arm}`` is replaced by the arm).

    Returns
    -------
    str
        ``[[categories]]`` tables to append to a design (``categories=`` of the builders).
    """
    m = _value(float(margin))
    rules = [f'[[categories]]\nname = {_value(name.format(arm=a))}\nbest = {_value(a)}\nmargin = {m}' for a in arms]
    rules.append(f'[[categories]]\nname = "no-clear-preference"\nwithin = {m}')
    return "\n".join(rules)


# --------------------------------------------------------------------------
# The builders
# --------------------------------------------------------------------------
def reference_study(
    outcome: str = "gaussian",
    *,
    size: int = 60,
    horizon: int = 21,
    arms: Sequence[str] = ARMS,
    arm_means: Sequence[float] = (0.0, 0.3, -0.2),
    heterogeneity: float = 0.5,
    noise_sd: float = 1.0,
    policies: Mapping[str, str | Mapping[str, Any]] | None = None,
    categories: str = "",
    source: str | None = None,
) -> DesignSpec:
    """The reference study: ``size`` participants x ``horizon`` decisions x K arms.

    By default 60 participants, 21 decisions and the three arms drill, story
    and roleplay with arm means (0, 0.3, -0.2), heterogeneity (the sd of each
    participant's arm coefficient, ``arm_sd``) 0.5 on every arm, noise sd 1 and
    one policy, ``control``, assigning arms at random: the simulated study on
    which the fast engine is held to PyMC's NUTS and timed.

    Parameters
    ----------
    outcome : {"gaussian", "bernoulli"}
        The outcome family (``[study] outcome``).
    size, horizon : int
        Participants and decisions per participant.
    arms : sequence of str
        Arm names; ``arm_means`` has one value per arm.
    arm_means : sequence of float
        Population mean of each arm's coefficient.
    heterogeneity : float
        ``arm_sd`` of every arm.
    noise_sd : float
        Sd of the gaussian noise (ignored for bernoulli rewards).
    policies : mapping, optional
        Policy name -> parameters (a mapping, or the TOML body of the table as a
        string). Default ``{"control": {"kind": "random"}}``.
    categories : str
        ``[[categories]]`` tables to append (see :func:`preference_categories`).
    source : str, optional
        The label of the design in error messages (``DesignSpec.source``).

    Returns
    -------
    DesignSpec
    """
    if len(arm_means) != len(arms):
        raise ValueError(f"arm_means has {len(arm_means)} values for {len(arms)} arms")
    policies = {"control": {"kind": "random"}} if policies is None else policies
    text = "\n".join([
        _table("study", {"arms": list(arms), "horizon": int(horizon), "outcome": outcome}),
        "[population]",
        f"size = {int(size)}",
        f"arm_means = {_floats(arm_means)}",
        f"arm_sd = {_floats([heterogeneity] * len(arms))}",
        f"noise_sd = {_value(float(noise_sd))}",
        _policies(policies),
        categories,
    ]) + "\n"
    return parse_design(text, source=source)


def pooling_scenario(
    name: str,
    *,
    size: int | None = None,
    policies: Mapping[str, str | Mapping[str, Any]] | None = None,
    categories: str = "",
    source: str | None = None,
) -> DesignSpec:
    """A scenario of the pooling spectrum (gaussian rewards, noise sd 1, adherence 1, no dropout, one wave).

    ====  ===  ===  ===  ============================  =============  ===========================
    name   N    K    T   arms                          arm means      heterogeneity (every arm)
    ====  ===  ===  ===  ============================  =============  ===========================
    A      60   3   21   drill, story, roleplay        0, 0.3, -0.2   0.5
    D      60   3   21   drill, story, roleplay        0, 0.3, -0.2   0.15
    E      60   3   21   drill, story, roleplay        0, 0.3, -0.2   1.0
    F      80   4   28   drill, story, roleplay, quiz  0, 0, 0, 0     0.4
    A2     60   2   21   drill, story                  0, 0.3         0.5
    ====  ===  ===  ===  ============================  =============  ===========================

    A is the reference study (:func:`reference_study`) with other policies;
    D and E move the heterogeneity down and up (how much pooling can gain),
    F has no best arm on average, A2 is A with two arms (where the
    Bayes-optimal policy can be computed).

    Parameters
    ----------
    name : {"A", "D", "E", "F", "A2"}
    size : int, optional
        Participants (default: the scenario's N).
    policies : mapping, optional
        As in :func:`reference_study`; default :data:`POOLING_POLICIES`
        (``pooled``, ``unpooled``, ``oracle-prior``, ``complete``).
    categories : str
        ``[[categories]]`` tables to append (see :func:`preference_categories`).
    source : str, optional
        The label of the design in error messages.

    Returns
    -------
    DesignSpec
    """
    if name not in POOLING_SCENARIOS:
        raise ValueError(f"unknown pooling scenario {name!r}; expected one of {', '.join(POOLING_SCENARIOS)}")
    p = POOLING_SCENARIOS[name]
    return reference_study(
        size=p["size"] if size is None else size, horizon=p["horizon"], arms=p["arms"], arm_means=p["arm_means"],
        heterogeneity=p["heterogeneity"], noise_sd=1.0,
        policies=POOLING_POLICIES if policies is None else policies, categories=categories,
        source=source)


def latent_types_scenario(
    *,
    size: int = 80,
    population: str = "types",
    population_model: str = "normal",
    title: str = "",
    seed: int | None = None,
    source: str | None = None,
) -> DesignSpec:
    """The calibration scenario: four latent types of participant, data from pooled Thompson sampling.

    80 participants in 4 weekly waves, the arms drill, story and roleplay,
    horizon 28, gaussian rewards named ``log_minutes`` with noise sd 0.8,
    adherence 0.85. ``population="types"``: four latent types in equal
    shares, three "arm k leaning" types with arm means 3.0 for that arm and
    2.2 for the others and one "no-clear-preference" type (2.4 on every arm),
    heterogeneity 0.25 per arm around the type's means (the hierarchical
    model's normal population is then misspecified). ``"normal"``: no types,
    arm means (2.5, 2.4, 2.4) and heterogeneity 0.3 per arm, which the model
    describes exactly.

    Priors: ``beta_sd = 3`` (other priors at their defaults); with
    ``population_model="mixture"`` also ``population = "mixture"`` and
    ``components = 4`` (the fitted population is a mixture of four normal
    distributions; pooled Thompson sampling keeps the normal model). Policies:
    ``pooled`` (pooled Thompson sampling, clip [0.05, 0.9], 3 forced
    exploration decisions) and ``solo`` (each participant alone: normal
    model, prior N(2.4, 1), known noise sd 0.8). Categories: "drill-leaning",
    "story-leaning", "roleplay-leaning" (that arm best by more than 0.2) and
    "no-clear-preference" (every difference within 0.2).

    Parameters
    ----------
    size : int
        Participants.
    population : {"types", "normal"}
        The simulated truth.
    population_model : {"normal", "mixture"}
        The population model of the fit (``[priors] population``).
    title : str
        ``[study] title``.
    seed : int, optional
        ``[study] seed``.
    source : str, optional
        The label of the design in error messages.

    Returns
    -------
    DesignSpec
    """
    study: dict[str, Any] = {}
    if title:
        study["title"] = title
    study |= {"arms": list(ARMS), "horizon": 28, "outcome": "gaussian", "reward": "log_minutes"}
    if seed is not None:
        study["seed"] = int(seed)
    pop = [f"size = {int(size)}"]
    priors: dict[str, Any] = {"beta_sd": 3.0}
    if population_model == "mixture":
        priors |= {"population": "mixture", "components": 4}
    elif population_model != "normal":
        raise ValueError(f"population_model must be 'normal' or 'mixture', got {population_model!r}")
    if population == "types":
        pop.append("arm_sd = [0.25, 0.25, 0.25]")
    elif population == "normal":
        pop += ["arm_means = [2.5, 2.4, 2.4]", "arm_sd = [0.3, 0.3, 0.3]"]
    else:
        raise ValueError(f"population must be 'types' or 'normal', got {population!r}")
    pop += ["noise_sd = 0.8", "adherence = 0.85", "waves = 4", "wave_gap = 7"]
    types = [] if population == "normal" else [
        f"[[population.types]]\nname = {_value(n)}\nshare = 0.25\narm_means = {_floats(m)}" for n, m in _LATENT_TYPES]
    policies = {
        "pooled": {"kind": "pooled-thompson", "clip": [0.05, 0.9], "explore_first": 3},
        "solo": {"kind": "thompson", "model": "normal", "prior_mean": 2.4, "prior_sd": 1.0, "noise_sd": 0.8},
    }
    text = "\n".join([
        _table("study", study), "[population]", *pop, *types, _table("priors", priors),
        _policies(policies), preference_categories(ARMS, margin=0.2, name="{arm}-leaning"),
    ]) + "\n"
    return parse_design(text, source=source)


# --------------------------------------------------------------------------
# Paired replicates
# --------------------------------------------------------------------------
def paired_replicates(design: DesignSpec, names: Sequence[str], replicates: int, rng,
                      *, metric: str = "regret") -> dict[str, np.ndarray]:
    """One value of ``metric`` per replicate and policy, every policy on the same world.

    Replicate r draws from ``spawn(rng, replicates)[r]`` three streams
    (population, environment, policies); every policy runs on the same
    population and pre-drawn environment (common random numbers), policy j
    with ``spawn(policy stream, len(names))[j]``, so differences between
    policies are paired by replicate.

    Parameters
    ----------
    design : DesignSpec
    names : sequence of str
        Policies of ``design`` to run.
    replicates : int
    rng : Generator, int or None
    metric : str
        A key of :func:`~poolbandit.simulation.replicate_metrics` (mean cumulative
        regret per participant by default).

    Returns
    -------
    dict
        Policy name -> array of ``replicates`` values.
    """
    from .metrics import replicate_metrics
    from .population import draw_population, draw_streams
    from .runner import run_policy

    names = list(names)
    out = {name: np.empty(replicates) for name in names}
    for r, g in enumerate(spawn(rng, replicates)):
        g_pop, g_env, g_pol = spawn(g, 3)
        pop = draw_population(design, g_pop)
        streams = draw_streams(design, pop.size, g_env)
        for j, name in enumerate(names):
            res = run_policy(design, design.policy(name), pop, streams, spawn(g_pol, len(names))[j])
            out[name][r] = replicate_metrics(res)[metric]
    return out


def paired_ratio(num, den) -> tuple[float, float]:
    """Ratio of the means of paired replicates and its delta-method standard error.

    ``r = mean(num) / mean(den)``; its standard error is that of the mean of
    ``num - r * den`` divided by ``mean(den)`` (first-order Taylor expansion of
    a ratio estimator, common practice; Cochran, *Sampling Techniques*, 3rd ed.,
    chapter 6, cited from memory).

    Returns
    -------
    (float, float)
        The ratio and its standard error.
    """
    num, den = np.asarray(num, float), np.asarray(den, float)
    r = num.mean() / den.mean()
    resid = num - r * den
    return float(r), float(resid.std(ddof=1) / np.sqrt(len(num)) / den.mean())
