"""Does pooling pay? Regret of Thompson sampling across the pooling spectrum.

Every policy of a scenario runs on the same simulated populations and the
same pre-drawn environment streams (common random numbers), so differences
between policies are paired by replicate. Ratios of mean cumulative regret
per participant are printed with delta-method standard errors over the
paired replicates.

Scenarios (N participants, K arms, horizon T, gaussian rewards, noise sd 1):

* A: N = 60, K = 3, T = 21, arm means (0, 0.3, -0.2), heterogeneity 0.5 on
  every arm. Targets: pooled <= 0.95 x unpooled, pooled <= 1.06 x oracle prior.
* D: as A with heterogeneity 0.15. Target: pooled <= 0.55 x unpooled.
  (A and D are ``poolbandit.simulation.scenarios.pooling_scenario``; its
  default policies are these four: pooled, unpooled, oracle-prior, complete.)
* B (context): the best arm flips on weekends; pooled with the weekend
  feature against pooled with ``context = false``.
* C (covariate): a participant covariate shifts the arm effects; a second
  wave enrols two weeks after the first. Share of wave-2 participants whose
  posterior-best arm (at the reference context) is their true best after
  their first 3 decisions, with and without the covariate in the model.

Usage: ``python benchmarks/pooling_regret.py [--replicates R] [--seed S] [--only A,D,B,C]``
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from poolbandit._random import spawn
from poolbandit.policies.base import Batch
from poolbandit.policies.registry import make_policy
from poolbandit.simulation import draw_population, draw_streams
from poolbandit.simulation.runner import context_for
from poolbandit.simulation.scenarios import paired_ratio, paired_replicates, pooling_scenario
from poolbandit.spec import parse_design

__all__: list[str] = []

def context_design(*, size: int = 60, horizon: int = 21):
    """Scenario B: story best on weekdays (0.3 vs 0), roleplay on weekends (0.8 vs 0)."""
    return parse_design(f"""
[study]
arms = ["drill", "story", "roleplay"]
horizon = {horizon}
[context]
features = ["weekend"]
[population]
size = {size}
arm_means = [0.0, 0.3, -0.2]
arm_sd = [0.3, 0.3, 0.3]
noise_sd = 1.0
context_effects = [[0.0], [-0.3], [1.0]]
[population.features.weekend]
kind = "weekend"
[policies.contextual]
kind = "pooled-thompson"
[policies.context-blind]
kind = "pooled-thompson"
context = false
""")


def covariate_design(*, size: int = 120, horizon: int = 21):
    """Scenario C: proficiency moves drill down and roleplay up; two waves two weeks apart."""
    return parse_design(f"""
[study]
arms = ["drill", "story", "roleplay"]
horizon = {horizon}
[participants]
covariates = ["proficiency"]
[population]
size = {size}
arm_means = [0.0, 0.1, 0.0]
arm_sd = [0.2, 0.2, 0.2]
noise_sd = 1.0
waves = 2
wave_gap = 14
covariate_effects = [[-0.5], [0.0], [0.5]]
[policies.with-covariate]
kind = "pooled-thompson"
[policies.without-covariate]
kind = "pooled-thompson"
covariates = false
""")


def _regret(design, replicates: int, seed: int) -> dict[str, np.ndarray]:
    """Mean cumulative regret per participant of every policy, one value per paired replicate."""
    return paired_replicates(design, list(design.policies), replicates, seed)


def early_classification(design, name: str, population, streams, rng, *, wave_step: int, after: int) -> float:
    """Share of participants enrolling at ``wave_step`` whose exploit arm is their true best after ``after`` decisions.

    Plays the study as :func:`~poolbandit.simulation.run_policy` does (same
    context, rewards and delayed feedback) up to the step at which the wave's
    rewards of its first ``after`` decisions have been observed.
    """
    policy = make_policy(design.policy(name), design, truth=population)
    policy.start(population.covariates)
    n = population.size
    enrol, last = population.enrol_step, population.enrol_step + streams.n_decisions - 1
    previous = np.full(n, np.nan)
    pending = None
    stop = wave_step + after
    for step in range(stop + 1):
        if pending is not None:
            policy.observe(*pending)
        if step == stop:
            break
        who = np.flatnonzero((enrol <= step) & (step <= last))
        decision = step - enrol[who] + 1
        ctx = context_for(design, population, streams, who, decision, previous)
        a = policy.assign(Batch(who, decision, ctx, step), rng)
        chosen = population.expected(who, ctx)[np.arange(len(who)), a.arm]
        reward = chosen + design.population.noise_sd * streams.noise[who, decision - 1, a.arm]
        reward = np.where(streams.attend[who, decision - 1] < design.population.adherence, reward, np.nan)
        previous[who] = reward
        pending = (who, a.arm, ctx, reward)
    wave = np.flatnonzero(enrol == wave_step)
    ref = np.zeros((len(wave), len(design.features)))
    truth = population.expected(wave, ref)
    chosen = policy.exploit(wave, ref)
    return float(np.mean(truth[np.arange(len(wave)), chosen] >= truth.max(axis=1) - 1e-12))


def run_classification(design, replicates: int, seed: int, *, after: int = 3) -> dict[str, np.ndarray]:
    names = list(design.policies)
    out = {name: np.empty(replicates) for name in names}
    wave_step = design.population.wave_gap
    for r, g in enumerate(spawn(seed, replicates)):
        g_pop, g_env, g_pol = spawn(g, 3)
        pop = draw_population(design, g_pop)
        streams = draw_streams(design, pop.size, g_env)
        for j, name in enumerate(names):
            out[name][r] = early_classification(design, name, pop, streams, spawn(g_pol, len(names))[j],
                                                wave_step=wave_step, after=after)
    return out


def _report(title: str, res: dict[str, np.ndarray], base: str, targets: dict[str, float]) -> None:
    print(f"\n== {title} ({len(res[base])} replicates) ==")
    for name, v in res.items():
        print(f"  {name:<18} mean regret {v.mean():7.3f}  (se {v.std(ddof=1) / np.sqrt(len(v)):.3f})")
    for name, v in res.items():
        if name == base:
            continue
        r, se = paired_ratio(res[base], v)
        target = targets.get(name)
        note = f"  target <= {target}: {'met' if r <= target else 'NOT met'}" if target else ""
        print(f"  {base} / {name:<14} = {r:.3f} (se {se:.3f}){note}")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--replicates", type=int, default=40)
    ap.add_argument("--seed", type=int, default=20261202)
    ap.add_argument("--only", default="A,D,B,C")
    args = ap.parse_args(argv)
    parts = set(args.only.split(","))
    t0 = time.perf_counter()
    if "A" in parts:
        res = _regret(pooling_scenario("A"), args.replicates, args.seed)
        _report("Scenario A: heterogeneity 0.5", res, "pooled", {"unpooled": 0.95, "oracle-prior": 1.06})
    if "D" in parts:
        res = _regret(pooling_scenario("D"), args.replicates, args.seed + 1)
        _report("Scenario D: heterogeneity 0.15", res, "pooled", {"unpooled": 0.55})
    if "B" in parts:
        res = _regret(context_design(), args.replicates, args.seed + 2)
        _report("Scenario B: best arm flips on weekends", res, "contextual", {"context-blind": 1.0})
    if "C" in parts:
        res = run_classification(covariate_design(), args.replicates, args.seed + 3)
        print(f"\n== Scenario C: covariate shifts arm effects ({args.replicates} replicates) ==")
        for name, v in res.items():
            print(f"  {name:<18} share of wave 2 with correct posterior-best arm after 3 decisions "
                  f"{v.mean():.3f} (se {v.std(ddof=1) / np.sqrt(len(v)):.3f})")
        r, se = paired_ratio(res["with-covariate"], res["without-covariate"])
        print(f"  with / without = {r:.3f} (se {se:.3f})")
    print(f"\n(total {time.perf_counter() - t0:.0f} s)")


if __name__ == "__main__":
    main()
