"""``poolbandit simulate DESIGN --policy NAME [--seed S] [--out DIR]``: one simulated study."""

from __future__ import annotations

import argparse

from ..errors import InputError
from ..log import write_log
from ..simulation import replicate_metrics, simulate
from ._common import atomic_path, design_from, output_dir

__all__ = ["register", "run"]


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("simulate", help="simulate one study with one policy; writes log.csv and truth.csv",
                       description="Draw a population from the design's [population] table, run one policy "
                                   "on it for the whole horizon, and write the study log and the truth.")
    p.add_argument("design", help="design file (TOML)")
    p.add_argument("--policy", required=True, help="name of a policy in the design's [policies]")
    p.add_argument("--seed", type=int, default=None, help="root seed (default: the design's study.seed)")
    p.add_argument("--participants", type=int, default=None, help="override population.size")
    p.add_argument("--out", default="simulation", help="output folder (default: ./simulation)")
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    design = design_from(args.design)
    spec = design.policy(args.policy)
    if args.participants is not None and args.participants < 1:
        raise InputError(f"--participants: expected an integer >= 1, got {args.participants}")
    seed = args.seed if args.seed is not None else design.study.seed
    result = simulate(design, spec.name, seed, size=args.participants)
    out = output_dir(args.out)
    with atomic_path(out / "log.csv") as tmp:
        write_log(result.log, tmp)
    with atomic_path(out / "truth.csv") as tmp:
        result.truth.to_csv(tmp, index=False, lineterminator="\n")
    m = replicate_metrics(result)
    print(f"{spec.name}: {result.population.size} participants, {len(result.log)} decisions; "
          f"regret per participant {m['regret']:.3f}, best-arm share {m['best_arm_share']:.3f}")
    print(f"wrote {out / 'log.csv'} and {out / 'truth.csv'}")
    return 0
