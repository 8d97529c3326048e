"""``poolbandit compare DESIGN [--replicates R] [--seed S] [--workers W] [--scheduler ADDRESS] [--out DIR]``.

Every policy of the design (and every point of its ``[[sweeps]]``) on the
same simulated populations; writes replicates.csv, summary.csv,
differences.csv, curves.csv, frontier.csv, sweep.csv, power.csv and
report.html.
"""

from __future__ import annotations

import argparse
import warnings

import pandas as pd

from ..compare import RANK_METRICS, compare
from ..compare.scoring import ClassificationScorer
from ..errors import InputError
from ._common import design_from, show_progress

__all__ = ["register", "run", "add_compare_options", "parse_sizes"]


def parse_sizes(text: str | None) -> list[int] | None:
    """``"20,40,80"`` -> ``[20, 40, 80]`` (InputError naming the bad item)."""
    if text is None:
        return None
    out = []
    for item in text.split(","):
        try:
            out.append(int(item.strip()))
        except ValueError:
            raise InputError(f"--power-sizes: expected integers separated by commas, got {item.strip()!r}") from None
    return out


def add_compare_options(p: argparse.ArgumentParser, *, replicates: int) -> None:
    """The options shared by ``compare`` and ``demo``."""
    p.add_argument("--replicates", type=int, default=replicates,
                   help=f"simulated studies, each with its own population (default: {replicates})")
    p.add_argument("--seed", type=int, default=None, help="root seed (default: the design's study.seed)")
    p.add_argument("--workers", type=int, default=None, help="local worker processes (default: the CPU count)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="run on a Dask cluster at tcp://HOST:PORT instead of local processes")
    p.add_argument("--participants", type=int, default=None, help="override population.size")
    p.add_argument("--rank-by", default="regret", choices=RANK_METRICS, help="score that ranks sweep points")
    p.add_argument("--weight", type=float, default=0.5,
                   help="weight of regret against classification quality when picking a design (0..1, default 0.5)")
    p.add_argument("--power-sizes", default=None, metavar="N,N,...",
                   help="study sizes (both groups together) for the power of adaptive against random control")
    p.add_argument("--power-policy", default=None, help="the adaptive condition (default: the reference policy)")
    p.add_argument("--power-replicates", type=int, default=None,
                   help="simulated studies per size (default: --replicates)")
    p.add_argument("--classify-fit", default="unpooled", choices=["unpooled", "fast", "none"],
                   help="analysis of logs from policies without a posterior of their own (default: unpooled)")


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("compare", help="compare the design's policies on the same simulated populations",
                       description="Run every policy of the design, and every point of its [[sweeps]], on the "
                                   "same simulated populations and outcomes (common random numbers); write "
                                   "tables and report.html.")
    p.add_argument("design", help="design file (TOML)")
    p.add_argument("--policies", default=None, help="comma-separated policy names (default: all)")
    p.add_argument("--reference", default=None, help="policy for paired differences (default: the pooled one)")
    p.add_argument("--no-sweeps", action="store_true", help="skip the design's [[sweeps]]")
    add_compare_options(p, replicates=50)
    p.add_argument("--out", default="comparison", help="output folder (default: ./comparison)")
    p.set_defaults(run=run)


def run_comparison(design, args: argparse.Namespace, *, policies=None, reference=None, sweeps=True):
    """Run :func:`poolbandit.compare.compare` from parsed options (shared with ``demo``)."""
    seed = args.seed if args.seed is not None else design.study.seed
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", UserWarning)
        result = compare(
            design, replicates=args.replicates, rng=seed, policies=policies, sweeps=sweeps,
            size=args.participants, reference=reference, scorer=ClassificationScorer(fit=args.classify_fit),
            rank_by=args.rank_by, weight=args.weight, power_sizes=parse_sizes(args.power_sizes),
            power_policy=args.power_policy, power_replicates=args.power_replicates, workers=args.workers,
            scheduler=args.scheduler, progress=show_progress(),
        )
    for w in caught:
        if issubclass(w.category, UserWarning) and "skipping policies" in str(w.message):
            print(f"note: {w.message}")
    return result


def print_summary(result) -> None:
    """A short console summary of a comparison."""
    pd.set_option("display.width", 140)
    info = result.info
    cols = [c for c in ("policy", "regret", "regret_se", "gain", "gain_se", "brier", "label_share", "pareto")
            if c in result.summary]
    print(f"{info['title'] or 'design'}: {info['replicates']} paired replicates of {info['participants']} "
          f"participants ({info['executor']})")
    print(result.summary[cols].round(3).to_string(index=False))
    if len(result.sweep):
        best = result.sweep[result.sweep["rank"] == 1]
        for _, row in best.iterrows():
            near = result.sweep[(result.sweep["sweep"] == row["sweep"]) & result.sweep["near_best"]]
            print(f"sweep {row['sweep']}: best {row['policy']} by {info['rank_by']}; within 2 SE: "
                  f"{', '.join(near['policy'])}")
    if info.get("chosen"):
        print(f"pick with weight {info['weight']:g} on regret: {info['chosen'][0]}")
    if result.power is not None:
        print(result.power[["size", "power", "power_se", "difference", "difference_se"]].round(3)
              .to_string(index=False))


def run(args: argparse.Namespace) -> int:
    design = design_from(args.design)
    policies = [p.strip() for p in args.policies.split(",") if p.strip()] if args.policies else None
    result = run_comparison(design, args, policies=policies, reference=args.reference, sweeps=not args.no_sweeps)
    written = result.write(args.out)
    print_summary(result)
    print(f"wrote {', '.join(p.name for p in written)} to {written[0].parent}")
    return 0
