"""Speed of ``poolbandit compare``: wall time with 1 and 2 worker processes, measured side by side.

Six classic policies of the demo design, 200 replicates of N = 100
participants, horizon 21, K = 3 arms, classification scores on (unpooled
analysis for policies without a posterior). Targets: the whole comparison
under 2 minutes on 2 cores, and at least 1.7 times faster with 2 workers
than with 1. The two runs must give identical tables (same seed). The
load average is printed beside each run: on a machine shared with other
jobs, the ratio measures the contention as much as the code.

Usage: ``.venv/bin/python benchmarks/compare_speed.py [--replicates R]``
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import resource
import time
import warnings

import pandas as pd

from poolbandit import default_design
from poolbandit.compare import compare

POLICIES = ["control", "solo", "ucb", "greedy", "decreasing", "regression"]


def _cpu() -> float:
    """CPU seconds of this process and its finished children (user + system)."""
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=200)
    args = parser.parse_args()
    base = default_design()
    design = dataclasses.replace(base, study=dataclasses.replace(base.study, horizon=21),
                                 population=dataclasses.replace(base.population, size=100))
    print(f"compare: {len(POLICIES)} policies, {args.replicates} replicates, N = 100, horizon 21, K = 3; "
          f"os.cpu_count() = {os.cpu_count()}, load average {os.getloadavg()[0]:.1f}")
    times, results = {}, {}
    for workers in (1, 2):
        start = time.perf_counter()
        cpu0 = _cpu()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            results[workers] = compare(design, replicates=args.replicates, rng=2026, policies=POLICIES,
                                       sweeps=False, workers=workers)
        times[workers] = time.perf_counter() - start
        cpu = _cpu() - cpu0
        print(f"  {workers} worker{'s' if workers > 1 else ' '}: {times[workers]:7.1f} s wall, {cpu:7.1f} s CPU "
              f"(this process and its children); load average after {os.getloadavg()[0]:.1f}")
    pd.testing.assert_frame_equal(results[1].summary, results[2].summary, check_exact=True)
    print(f"  speed-up 2 workers vs 1: {times[1] / times[2]:.2f}x (target >= 1.7); "
          f"2-worker run {'within' if times[2] < 120 else 'OVER'} the 2-minute target; tables identical")
    cols = ["policy", "regret", "regret_se", "gain", "brier", "label_share"]
    print(results[2].summary[cols].round(3).to_string(index=False))


if __name__ == "__main__":
    main()
