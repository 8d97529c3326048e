"""Bias, coverage and variance of the end-of-study estimators against the simulated truth.

Prints, over many seeded replicates of a small adaptive study (the design of
``tests/analysis/adaptive.toml``: 40 participants, 20 decisions, three arms,
latent types, unpooled Thompson sampling clipped to [0.05, 0.9]):

1. arm values: bias, its Monte Carlo standard error, sampling sd, mean
   reported se, and coverage of the nominal 95 percent interval, for the
   naive mean, IPW (Horvitz-Thompson), Hajek, doubly robust with the
   full-data ridge stand-in, doubly robust with the sequential stand-in, and
   the stand-in model alone;
2. the same for the off-policy values of uniform random and of the oracle;
3. the ratio of each estimator's sd to IPW's, side by side;
4. with ``--pooled R``, sections 1 and 2 again for logs of pooled Thompson
   sampling (clipped to [0.05, 0.9]), R replicates simulated one by one;
5. with ``--hierarchical R``, the doubly robust estimate with the
   hierarchical model (fast engine) as outcome model, on R replicates (each
   needs one Gibbs run, so keep R small).

Run: ``.venv/bin/python benchmarks/analysis_coverage.py [--replicates 500] [--seed 1] [--pooled 100]
[--hierarchical 20]``.
"""

from __future__ import annotations

import argparse
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from poolbandit import load_design
from poolbandit.analysis import arm_values, hierarchical_outcome_model, policy_values, ridge_outcome_model
from poolbandit.analysis._montecarlo import replicate_studies, summarise_replicates
from poolbandit.cli._common import show_progress
from poolbandit.errors import OverlapWarning

warnings.filterwarnings("ignore", message=".*ArviZ is undergoing a major refactor.*")

__all__ = ["estimate_tables", "main"]

DESIGN = Path(__file__).resolve().parent.parent / "tests" / "analysis" / "adaptive.toml"


def estimate_tables(design, reps, models: dict) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Arm and policy estimates of every replicate with their truths, one block per outcome model."""
    arms, pols = [], []
    k = design.n_arms
    for r, rep in enumerate(reps):
        truth = dict(zip(design.arms, rep.arm_truth))
        oracle = rep.oracle_table()
        truths = {"uniform-random": rep.policy_truth(design, np.full((len(rep.log), k), 1.0 / k)),
                  "oracle": rep.policy_truth(design, oracle)}
        for j, (tag, fitter) in enumerate(models.items()):
            pred = fitter(rep.log, design)
            a = arm_values(rep.log, design, outcome_model=pred)
            a = a[a["group"] == "all"]
            if j > 0:
                a = a[a["estimator"].isin(["dr", "model"])]
            a = a.assign(estimator=np.where(a["estimator"].isin(["dr", "model"]), a["estimator"] + "-" + tag,
                                            a["estimator"]), truth=a["arm"].map(truth), replicate=r)
            arms.append(a)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", OverlapWarning)
                p = policy_values(rep.log, design, outcome_model=pred, policies={"oracle": oracle},
                                  design_policies=False)
            p = p[p["policy"].isin(list(truths))]
            if j > 0:
                p = p[p["estimator"].isin(["dr", "model"])]
            p = p.assign(estimator=np.where(p["estimator"].isin(["dr", "model"]), p["estimator"] + "-" + tag,
                                            p["estimator"]), truth=p["policy"].map(truths), replicate=r)
            pols.append(p)
    return pd.concat(arms, ignore_index=True), pd.concat(pols, ignore_index=True)


def _with_ratio(summary: pd.DataFrame, key: str) -> pd.DataFrame:
    ipw = summary[summary["estimator"] == "ipw"].set_index(key)["sd"]
    return summary.assign(sd_over_ipw=summary["sd"] / summary[key].map(ipw).to_numpy())


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=500)
    parser.add_argument("--size", type=int, default=40)
    parser.add_argument("--seed", type=int, default=20261203)
    parser.add_argument("--pooled", type=int, default=0, help="replicates under pooled Thompson sampling")
    parser.add_argument("--hierarchical", type=int, default=0, help="replicates with the hierarchical model")
    args = parser.parse_args(argv)
    pd.set_option("display.width", 160)
    pd.set_option("display.max_columns", 20)
    design = load_design(DESIGN)

    t0 = time.perf_counter()
    reps = replicate_studies(design, "solo", args.replicates, args.size, args.seed)
    t1 = time.perf_counter()
    models = {"full": ridge_outcome_model(), "sequential": ridge_outcome_model(sequential=True)}
    arms, pols = estimate_tables(design, reps, models)
    t2 = time.perf_counter()
    print(f"{args.replicates} replicates of {args.size} participants (unpooled Thompson, clip [0.05, 0.9]); "
          f"simulation {t1 - t0:.1f} s, estimation {t2 - t1:.1f} s")
    print("Nominal interval coverage 0.95; bias_mcse = sd / sqrt(replicates).\n")
    print("Arm values")
    s = _with_ratio(summarise_replicates(arms, by=["arm", "estimator"]), "arm")
    print(s.round(4).to_string(index=False))
    print("\nPolicy values")
    s = _with_ratio(summarise_replicates(pols, by=["policy", "estimator"]), "policy")
    print(s.round(4).to_string(index=False))

    if args.pooled:
        t3 = time.perf_counter()
        preps = replicate_studies(design, "pooled", args.pooled, args.size, args.seed + 1, progress=show_progress())
        arms_p, pols_p = estimate_tables(design, preps, models)
        t4 = time.perf_counter()
        print(f"\nPooled Thompson sampling, {args.pooled} replicates, {t4 - t3:.1f} s")
        print(_with_ratio(summarise_replicates(arms_p, by=["arm", "estimator"]), "arm").round(4).to_string(index=False))
        print(_with_ratio(summarise_replicates(pols_p, by=["policy", "estimator"]), "policy").round(4)
              .to_string(index=False))

    if args.hierarchical:
        sub = reps[: args.hierarchical]
        t3 = time.perf_counter()
        hmodels = {"full": ridge_outcome_model(), "hier": hierarchical_outcome_model(rng=args.seed)}
        arms_h, pols_h = estimate_tables(design, sub, hmodels)
        t4 = time.perf_counter()
        print(f"\nHierarchical outcome model (fast engine), {len(sub)} replicates, {t4 - t3:.1f} s")
        keep = arms_h["estimator"].isin(["ipw", "dr-full", "dr-hier", "model-hier"])
        s = _with_ratio(summarise_replicates(arms_h[keep], by=["arm", "estimator"]), "arm")
        print(s.round(4).to_string(index=False))
        keep = pols_h["estimator"].isin(["ipw", "dr-full", "dr-hier", "model-hier"])
        s = _with_ratio(summarise_replicates(pols_h[keep], by=["policy", "estimator"]), "policy")
        print(s.round(4).to_string(index=False))


if __name__ == "__main__":
    main()
