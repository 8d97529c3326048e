"""Wall time of one simulated study per classic policy, vectorised against a per-participant loop.

N = 1,000 participants, K = 4 arms, horizon 28. The loop version runs exactly the
same policy code on the same population and streams, but asks it about one
participant at a time (a plain Python loop over participants inside every
decision step), which is what an unvectorised implementation does. Both runs
give the same log up to the policy's random draws; the script prints the wall
time of each and their ratio (target: vectorised at least 20 times faster).

Run: .venv/bin/python benchmarks/simulate_speed.py
"""

from __future__ import annotations

import platform
import time
import warnings

import numpy as np

warnings.filterwarnings("ignore")

from poolbandit import parse_design  # noqa: E402
from poolbandit.policies import Assignment, Batch, make_policy  # noqa: E402
from poolbandit.simulation import draw_population, draw_streams, run_policy  # noqa: E402

DESIGN = """
[study]
arms = ["a", "b", "c", "d"]
horizon = 28
[context]
features = ["weekend"]
[population]
size = 1000
arm_means = [0.0, 0.2, 0.1, -0.1]
arm_sd = [0.4, 0.4, 0.4, 0.4]
adherence = 0.85
[population.features.weekend]
kind = "weekend"
[policies.random]
kind = "random"
[policies.epsilon-greedy]
kind = "epsilon-greedy"
[policies.epsilon-decreasing]
kind = "epsilon-decreasing"
c = 3.0
[policies.ucb1]
kind = "ucb1"
[policies.thompson]
kind = "thompson"
model = "normal"
[policies.regression]
kind = "regression-epsilon-greedy"
"""


class OneAtATime:
    """Wraps a policy and calls it once per participant (the unvectorised baseline)."""

    def __init__(self, inner):
        self.inner = inner

    def __getattr__(self, name):
        return getattr(self.inner, name)

    def start(self, covariates):
        self.inner.start(covariates)

    def observe(self, participant, arm, context, reward):
        for j in range(len(participant)):
            self.inner.observe(participant[j:j + 1], arm[j:j + 1], context[j:j + 1], reward[j:j + 1])

    def assign(self, batch, rng):
        parts = [self.inner.assign(Batch(batch.participant[j:j + 1], batch.decision[j:j + 1],
                                         batch.context[j:j + 1], batch.step), rng) for j in range(len(batch))]
        return Assignment(np.concatenate([p.arm for p in parts]), np.concatenate([p.propensity for p in parts]),
                          np.concatenate([p.probabilities for p in parts]))

    def exploit(self, participant, context=None):
        return self.inner.exploit(participant, context)


def main() -> None:
    design = parse_design(DESIGN)
    pop = draw_population(design, 1)
    streams = draw_streams(design, pop.size, 2)
    print(f"simulate_speed: N = {pop.size}, K = {design.n_arms}, horizon = {design.study.horizon}; "
          f"{platform.processor() or platform.machine()}, {time.strftime('%Y-%m-%d')}")
    print(f"{'policy':<20}{'vectorised s':>14}{'loop s':>10}{'ratio':>8}")
    ratios = []
    for name, spec in design.policies.items():
        run_policy(design, spec, pop, streams, 3)  # warm-up (imports, caches)
        t0 = time.perf_counter()
        fast = run_policy(design, spec, pop, streams, 3)
        t_fast = time.perf_counter() - t0
        t0 = time.perf_counter()
        slow = run_policy(design, spec, pop, streams, 3, policy=OneAtATime(make_policy(spec, design)))
        t_slow = time.perf_counter() - t0
        assert len(slow.log) == len(fast.log)
        ratios.append(t_slow / t_fast)
        print(f"{name:<20}{t_fast:>14.3f}{t_slow:>10.2f}{t_slow / t_fast:>8.1f}")
    print(f"smallest ratio {min(ratios):.1f} (target >= 20)")


if __name__ == "__main__":
    main()
