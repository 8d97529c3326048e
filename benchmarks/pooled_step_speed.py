"""Speed and memory of one decision step of pooled Thompson sampling.

One step = the newly arrived rewards enter the model (warm-started
``set_data``), ``sweeps`` Gibbs sweeps, and the exact assignment
probabilities of every participant (quadrature over ``population_draws``
population draws), then the arms are drawn. Measured for N = 10,000 and
N = 100,000 participants, K = 4 arms, after a few days of data, with the
kind's default parameters; the first fit (burn-in) is reported separately.
Targets: under 0.5 s and under 5 s (median wall time of a few steps; the
process CPU time is printed too, since a shared machine inflates wall time). Peak memory allocated during a step (tracemalloc, one
more step) should grow linearly in N.

Also checks, on 2,000 rows, the Gaussian quadrature against the generic
``prob_best`` with scipy.stats.norm (same nodes: identical up to rounding)
and times both side by side.

Usage: ``python benchmarks/pooled_step_speed.py [--sizes 10000,100000] [--days 3]``
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np
from scipy import stats

from poolbandit._random import spawn
from poolbandit.policies._gaussian import prob_best_normal
from poolbandit.policies._probability import prob_best
from poolbandit.policies.base import Batch
from poolbandit.policies.registry import make_policy
from poolbandit.spec import parse_design

__all__: list[str] = []

TARGETS = {10_000: 0.5, 100_000: 5.0}


def _design(n: int, burn_in: int):
    return parse_design(f"""
[study]
arms = ["a", "b", "c", "d"]
horizon = 28
[population]
size = {n}
arm_means = [0.0, 0.2, 0.1, -0.1]
arm_sd = [0.4, 0.4, 0.4, 0.4]
[policies.pooled]
kind = "pooled-thompson"
burn_in = {burn_in}
""")


def _prepared_policy(n: int, days: int, burn_in: int, seed: int):
    """A policy after ``days`` days of rewards and a first fit; returns it with the next day's rewards."""
    design = _design(n, burn_in)
    g_data, g_pol = spawn(seed, 2)
    policy = make_policy(design.policy("pooled"), design)
    policy.start(np.zeros((n, 0)))
    who = np.arange(n)
    ctx = np.zeros((n, 0))
    means = np.array([0.0, 0.2, 0.1, -0.1])

    def day_rewards():
        arm = g_data.integers(0, 4, n)
        return who, arm, ctx, means[arm] + 0.4 * g_data.standard_normal(n) + g_data.standard_normal(n)

    for d in range(days):
        policy.observe(*day_rewards())
    t = time.perf_counter()
    policy.assign(Batch(who, np.full(n, days + 1), ctx, days), g_pol)
    first = time.perf_counter() - t
    return policy, day_rewards(), g_pol, first


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="10000,100000")
    ap.add_argument("--days", type=int, default=3)
    ap.add_argument("--burn-in", type=int, default=30, help="sweeps of the (untimed) first fit")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--repeats", type=int, default=3, help="timed warm steps (the median is reported)")
    args = ap.parse_args(argv)

    # quadrature check, side by side
    rng = np.random.default_rng(1)
    mean, sd = rng.normal(0, 0.5, (2000, 4)), np.exp(rng.uniform(np.log(0.05), 0.0, (2000, 4)))
    t = time.perf_counter()
    fast = prob_best_normal(mean, sd, nodes=16, placement="uniform")
    t_fast = time.perf_counter() - t
    t = time.perf_counter()
    ref = prob_best(stats.norm(mean, sd), points_per_arm=16)
    t_ref = time.perf_counter() - t
    print(f"Gaussian quadrature (prob_best's node levels) vs prob_best(scipy.stats.norm), 2000 x 4, 16 nodes: "
          f"max |diff| "
          f"{np.abs(fast - ref).max():.1e}, time {t_fast * 1e3:.1f} ms vs {t_ref * 1e3:.1f} ms "
          f"(speed-up x{t_ref / t_fast:.1f})")

    rows = []
    for n in [int(s) for s in args.sizes.split(",")]:
        policy, rewards, g, first = _prepared_policy(n, args.days, args.burn_in, args.seed)
        who, ctx = np.arange(n), np.zeros((n, 0))
        means = np.array([0.0, 0.2, 0.1, -0.1])
        fits, probs, steps, cpus = [], [], [], []
        for r in range(args.repeats + 1):
            day = args.days + 2 + r
            if r == args.repeats:  # one more step under tracemalloc for the peak memory
                tracemalloc.start()
            t0, c0 = time.perf_counter(), time.process_time()
            policy.observe(*rewards)
            policy._fit(g)  # the posterior update (normally done lazily inside assign)
            t1 = time.perf_counter()
            policy.assign(Batch(who, np.full(n, day), ctx, day), g)
            t2, c2 = time.perf_counter(), time.process_time()
            if r == args.repeats:
                _, peak = tracemalloc.get_traced_memory()
                tracemalloc.stop()
            else:
                fits.append(t1 - t0)
                probs.append(t2 - t1)
                steps.append(t2 - t0)
                cpus.append(c2 - c0)
            arm = g.integers(0, 4, n)
            rewards = (who, arm, ctx, means[arm] + 0.4 * g.standard_normal(n) + g.standard_normal(n))
        step = float(np.median(steps))
        target = TARGETS.get(n)
        verdict = "" if target is None else f"  target < {target} s: {'met' if step < target else 'NOT met'}"
        print(f"N = {n:>7}: first fit ({args.burn_in} sweeps) {first:6.2f} s; warm step median of {args.repeats} "
              f"{step:6.3f} s (posterior update {np.median(fits):.3f} s, probabilities and draw "
              f"{np.median(probs):.3f} s; all: {', '.join(f'{x:.2f}' for x in steps)}; CPU time of the process "
              f"{np.median(cpus):.3f} s); peak memory allocated "
              f"during a step {peak / 2**20:7.1f} MiB ({peak / n:.0f} bytes per participant){verdict}")
        rows.append((n, step, peak))
    if len(rows) > 1:
        (n0, s0, m0), (n1, s1, m1) = rows[0], rows[-1]
        print(f"x{n1 / n0:.0f} participants: time x{s1 / s0:.1f}, peak memory x{m1 / m0:.1f} (linear = x{n1 / n0:.0f})")


if __name__ == "__main__":
    main()
