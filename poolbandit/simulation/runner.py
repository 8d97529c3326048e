"""Run a policy on a simulated population for the whole study.

Time runs in study days (steps). On each step every enrolled participant who
has decisions left and has not dropped out gets one decision; all of them
decide together, and the rewards of a step reach the policy only at the next
step (delayed feedback). Sessions are missed with probability
``1 - adherence``: the decision is logged, its reward is missing.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from scipy.special import ndtri

from .._random import RngLike, as_generator, spawn
from ..log import log_columns
from ..policies.base import Batch, Policy
from ..policies.registry import make_policy
from .population import Population, Streams, draw_population, draw_streams

if TYPE_CHECKING:  # pragma: no cover
    from ..spec import DesignSpec, PolicySpec

__all__ = ["SimulationResult", "run_policy", "simulate", "context_for"]


@dataclass(frozen=True)
class SimulationResult:
    """A simulated study.

    Attributes
    ----------
    log : DataFrame
        The StudyLog, with ``expected_reward`` and ``best_expected_reward``.
    population : Population
        The truth.
    final_arm : ndarray of int, shape (N,)
        The arm the policy would exploit at the end, at the reference context.
    policy : Policy
        The policy in its final state.
    """

    log: pd.DataFrame
    population: Population
    final_arm: np.ndarray
    policy: Policy

    @property
    def truth(self) -> pd.DataFrame:
        return self.population.truth_table()


def context_for(design: DesignSpec, population: Population, streams: Streams, participant: np.ndarray,
                decision: np.ndarray, previous_reward: np.ndarray) -> np.ndarray:
    """Decision-time context features, shape (n, F) (see :class:`~poolbandit.spec.FeatureSim`)."""
    ctx = np.zeros((len(participant), len(design.features)))
    for j, name in enumerate(design.features):
        sim = design.population.features.get(name)
        kind = sim.kind if sim else "normal"
        u = streams.feature[participant, decision - 1, j]
        if kind == "weekend":
            weekday = (population.enrol_step[participant] + decision - 1) % 7
            ctx[:, j] = weekday >= 5
        elif kind == "bernoulli":
            ctx[:, j] = u < sim.p
        elif kind == "normal":
            ctx[:, j] = ndtri(np.clip(u, 1e-12, 1 - 1e-12))
        else:  # previous-reward
            prev = previous_reward[participant]
            ctx[:, j] = np.where(np.isfinite(prev), (prev - sim.center) / sim.scale, 0.0)
    return ctx


def run_policy(design: DesignSpec, spec: PolicySpec, population: Population, streams: Streams,
               rng: RngLike = None, *, policy: Policy | None = None) -> SimulationResult:
    """Run one policy on one population with the given environment streams.

    The policy's own randomness comes from ``rng``; everything about the
    participants and their rewards comes from ``population`` and ``streams``,
    so two policies run on the same pair see the same world (common random
    numbers). ``policy`` may supply a ready-made (not yet started) policy
    object instead of building one from ``spec``.
    """
    rng = as_generator(rng)
    if policy is None:
        policy = make_policy(spec, design, truth=population)
    policy.start(population.covariates)
    n = population.size
    enrol, last = population.enrol_step, population.enrol_step + streams.n_decisions - 1
    outcome = design.study.outcome
    noise_sd = design.population.noise_sd
    adherence = design.population.adherence
    previous = np.full(n, np.nan)
    pending = None
    parts: list[dict[str, np.ndarray]] = []
    for step in range(int(last.max()) + 1):
        if pending is not None:
            policy.observe(*pending)
        who = np.flatnonzero((enrol <= step) & (step <= last))
        if len(who) == 0:
            pending = None
            continue
        decision = step - enrol[who] + 1
        ctx = context_for(design, population, streams, who, decision, previous)
        a = policy.assign(Batch(who, decision, ctx, step), rng)
        expected = population.expected(who, ctx)
        chosen = expected[np.arange(len(who)), a.arm]
        noise = streams.noise[who, decision - 1, a.arm]
        if outcome == "bernoulli":
            reward = (noise < chosen).astype(float)
        else:
            reward = chosen + noise_sd * noise
        reward = np.where(streams.attend[who, decision - 1] < adherence, reward, np.nan)
        previous[who] = reward
        pending = (who, a.arm, ctx, reward)
        parts.append({"who": who, "decision": decision, "step": np.full(len(who), step), "arm": a.arm,
                      "propensity": a.propensity, "prob": a.probabilities, "reward": reward, "context": ctx,
                      "expected": chosen, "best": expected.max(axis=1)})
    log = _assemble(design, spec.name, population, parts)
    final = policy.exploit(np.arange(n), np.zeros((n, len(design.features))))
    return SimulationResult(log, population, final, policy)


def _assemble(design: DesignSpec, policy_name: str, population: Population, parts: list[dict]) -> pd.DataFrame:
    cat = {key: np.concatenate([p[key] for p in parts]) for key in parts[0]}
    who = cat["who"]
    ids = np.asarray(population.ids, dtype=object)
    data: dict[str, object] = {
        "participant": ids[who],
        "decision": cat["decision"].astype(np.int64),
        "arm": np.asarray(design.arms, dtype=object)[cat["arm"]],
        "propensity": cat["propensity"],
        design.study.reward: cat["reward"],
        "policy": np.full(len(who), policy_name, dtype=object),
        "step": cat["step"].astype(np.int64),
    }
    for k, arm in enumerate(design.arms):
        data[f"prob_{arm}"] = cat["prob"][:, k]
    for j, name in enumerate(design.features):
        data[name] = cat["context"][:, j]
    for j, name in enumerate(design.covariates):
        data[name] = population.covariates[who, j]
    data["expected_reward"] = cat["expected"]
    data["best_expected_reward"] = cat["best"]
    df = pd.DataFrame(data)
    order = np.lexsort((df["decision"].to_numpy(), who))
    df = df.iloc[order].reset_index(drop=True)
    return df[log_columns(design, simulated=True)]


def simulate(design: DesignSpec, policy: str, rng: RngLike = None, *, size: int | None = None) -> SimulationResult:
    """Draw a population and its streams from ``rng`` and run the named policy.

    The population, the environment and the policy each get their own stream
    spawned from ``rng``, so the same seed gives the same log byte for byte.
    """
    g_pop, g_env, g_policy = spawn(rng, 3)
    population = draw_population(design, g_pop, size=size)
    streams = draw_streams(design, population.size, g_env)
    return run_policy(design, design.policy(policy), population, streams, g_policy)
