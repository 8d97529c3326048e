"""``poolbandit demo [--out DIR]``: the main job on the embedded practice-formats design.

For now: a small simulated comparison of the classic policies on the demo
scenario, with paired replicates. Later work grows it into the full tour.
"""

from __future__ import annotations

import argparse

import pandas as pd

from .._random import spawn
from ..policies._catalogue import KINDS
from ..policies.registry import CLASSES
from ..simulation import draw_population, draw_streams, replicate_metrics, run_policy, summarise
from ._common import atomic_path, design_from, output_dir

__all__ = ["register", "run"]


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help="run the demo on the embedded practice-formats scenario",
                       description="Simulate the embedded practice-formats design and compare its policies.")
    p.add_argument("--out", default="demo-output", help="output folder (default: ./demo-output)")
    p.add_argument("--replicates", type=int, default=8, help="simulated studies per policy (default: 8)")
    p.add_argument("--seed", type=int, default=None, help="root seed (default: the design's study.seed)")
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    design = design_from(None)
    seed = args.seed if args.seed is not None else design.study.seed
    names = [n for n, s in design.policies.items() if s.kind in CLASSES and not KINDS[s.kind].simulation_only]
    rows = []
    for r, g in enumerate(spawn(seed, args.replicates)):
        g_pop, g_env, g_pol = [*g.spawn(3)]
        population = draw_population(design, g_pop)
        streams = draw_streams(design, population.size, g_env)
        for name, gp in zip(names, g_pol.spawn(len(names))):
            res = run_policy(design, design.policy(name), population, streams, gp)
            rows.append({"policy": name, "replicate": r, **replicate_metrics(res)})
    table = summarise(pd.DataFrame(rows))
    out = output_dir(args.out)
    with atomic_path(out / "summary.csv") as tmp:
        table.to_csv(tmp, index=False)
    pd.set_option("display.width", 120)
    print(f"{design.study.title}: {args.replicates} paired replicates of {design.population.size} participants")
    print(table[["policy", "regret", "regret_se", "best_arm_share", "best_arm_identified"]].round(3).to_string(index=False))
    print(f"wrote {out / 'summary.csv'}")
    return 0
