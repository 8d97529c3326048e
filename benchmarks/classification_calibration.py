"""Calibration of participant categories in simulation, pooled against unpooled posteriors.

Scenario: N = 80 participants, K = 3 arms (drill, story, roleplay), horizon
28, four latent types in equal shares (three "arm k best" types with that
arm 0.8 above the others, and one with no clear preference), heterogeneity
0.25 per arm, noise sd 0.8, adherence 0.85. Data are collected by pooled
Thompson sampling (policy kind ``pooled-thompson``). Each replicate then

1. fits the hierarchical model (``--engine full``: PyMC NUTS, the default;
   ``fast``: the Gibbs sampler) and classifies every participant;
2. classifies the same participants from unpooled conjugate posteriors on the
   same data (each participant alone, normal model with known noise sd, the
   posteriors the unpooled Thompson policy keeps);
3. scores both against the true categories (the design's rules applied to
   the true effects): Brier score with Murphy's decomposition, coverage of
   the 90% effect intervals, share and accuracy of labels.

``--population normal`` replaces the types by normal heterogeneity (arm
means 2.5, 2.4, 2.4; sd 0.3), the population the hierarchical model assumes.
``--population-model mixture`` fits a mixture of four normal populations
(``[priors] population = "mixture"``, ``components = 4``), ``normal`` the
normal population model; the data are the same (pooled Thompson sampling
keeps the normal model either way). Default: ``mixture`` with the fast
engine (it meets the targets there: see DEFAULT_POPULATION_MODEL),
``normal`` with the full engine (the mixture's centred NUTS takes about
three minutes per fit here, too slow for the default 20 replicates).

Printed: the pooled-over-replicates scores of both, the paired difference of
Brier scores (unpooled minus pooled) with its standard error over
replicates, and the targets: reliability <= 0.02, coverage in [0.85, 0.95],
pooled Brier below unpooled.

Run: ``.venv/bin/python benchmarks/classification_calibration.py [--replicates 20] [--engine full|fast]
[--population-model normal|mixture] [--out DIR]`` (``--out`` also writes replicates.csv, reliability.csv and a report.html).
"""

from __future__ import annotations

import argparse
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from poolbandit._random import spawn
from poolbandit.classify import Calibration, calibrate, classify, true_effects, unpooled_effects
from poolbandit.models.effects import arm_effects
from poolbandit.models.fit import fit
from poolbandit.simulation import simulate
from poolbandit.simulation.scenarios import latent_types_scenario

warnings.filterwarnings("ignore", message=".*ArviZ is undergoing a major refactor.*")

__all__ = ["scenario_design", "replicate", "main", "DEFAULT_POPULATION_MODEL"]

#: The fitted population model per engine when --population-model is not given. Fast engine, 20
#: replicates: normal reliability 0.0355, Brier unpooled - pooled -0.0103 (SE 0.0030); mixture 0.0187,
#: +0.0050 (SE 0.0034), coverage 0.908.
DEFAULT_POPULATION_MODEL = {"fast": "mixture", "full": "normal"}

def scenario_design(*, size: int | None = None, population: str = "types", population_model: str = "normal"):
    """The benchmark design (optionally with another population size): ``scenarios.latent_types_scenario``.

    ``population="types"``: the four latent types (the hierarchical model's
    normal population is then misspecified); ``"normal"``: no types, arm means
    (2.5, 2.4, 2.4) with normal heterogeneity 0.3 per arm, which the model
    describes exactly. ``population_model``: the fitted population model,
    ``"normal"`` or ``"mixture"`` (four components).
    """
    return latent_types_scenario(size=80 if size is None else size, population=population,
                                 population_model=population_model,
                                 title="Calibration scenario: four latent types", seed=20261202,
                                 source=f"<classification calibration scenario: {population}>")


def replicate(design, rng, *, engine: str = "full", chains: int = 4, draws: int = 1000, tune: int | None = None):
    """One simulated study scored both ways: returns (pooled Calibration, unpooled Calibration, seconds)."""
    g_sim, g_fit, g_un = spawn(rng, 3)
    result = simulate(design, "pooled", g_sim)
    t0 = time.perf_counter()
    idata = fit(result.log, design, engine=engine, chains=chains, draws=draws, tune=tune, rng=g_fit)
    seconds = time.perf_counter() - t0
    truth = true_effects(result.population)
    pooled = calibrate(classify(arm_effects(idata, design.arms, design.features), design.categories), truth)
    un = unpooled_effects(result.log, design, draws=chains * draws, params=dict(design.policy("solo").params),
                          rng=g_un)
    unpooled = calibrate(classify(un, design.categories), truth)
    return pooled, unpooled, seconds


def _row(name: str, s: dict) -> dict:
    return {"posterior": name, **{k: s[k] for k in ("brier", "reliability", "reliability_chance", "resolution",
                                                    "uncertainty", "coverage", "coverage_se",
                                                    "contrast_coverage", "labelled_share",
                                                    "labelled_accuracy")}}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--replicates", type=int, default=20)
    parser.add_argument("--engine", choices=("full", "fast"), default="full")
    parser.add_argument("--chains", type=int, default=4)
    parser.add_argument("--draws", type=int, default=1000)
    parser.add_argument("--tune", type=int, default=None)
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--population", choices=("types", "normal"), default="types",
                        help="types: four latent types (default); normal: normal heterogeneity, no types")
    parser.add_argument("--population-model", choices=("normal", "mixture"), default=None,
                        help="fitted population: normal or a mixture of four normal populations (default: "
                             + ", ".join(f"{m} with the {e} engine" for e, m in DEFAULT_POPULATION_MODEL.items())
                             + ")")
    parser.add_argument("--out", default=None, help="folder for replicates.csv, reliability.csv, report.html")
    args = parser.parse_args(argv)
    population_model = args.population_model or DEFAULT_POPULATION_MODEL[args.engine]
    defaults = ", ".join(f"{m} with the {e} engine" for e, m in DEFAULT_POPULATION_MODEL.items())
    how = "given" if args.population_model else "default"
    print(f"population model: {population_model} ({how}; defaults: {defaults})", flush=True)
    design = scenario_design(population=args.population, population_model=population_model)
    pooled, unpooled, rows = [], [], []
    for r, g in enumerate(spawn(args.seed, args.replicates)):
        cp, cu, sec = replicate(design, g, engine=args.engine, chains=args.chains, draws=args.draws, tune=args.tune)
        pooled.append(cp)
        unpooled.append(cu)
        sp, su = cp.summary(), cu.summary()
        rows.append({"replicate": r, "fit_seconds": sec, "brier_pooled": sp["brier"], "brier_unpooled": su["brier"],
                     "coverage_pooled": sp["coverage"], "coverage_unpooled": su["coverage"]})
        print(f"replicate {r + 1}/{args.replicates}: fit {sec:.1f}s; Brier pooled {sp['brier']:.4f}, unpooled "
              f"{su['brier']:.4f}; coverage pooled {sp['coverage']:.3f}", flush=True)
    reps = pd.DataFrame(rows)
    all_p, all_u = Calibration.combine(pooled), Calibration.combine(unpooled)
    sp, su = all_p.summary(), all_u.summary()
    table = pd.DataFrame([_row(f"pooled ({args.engine} engine, {design.priors.population})", sp),
                          _row("unpooled (conjugate, alone)", su)])
    pd.set_option("display.width", 160)
    print()
    model = design.priors.population + (f" ({design.priors.components} components)"
                                        if design.priors.population == "mixture" else "")
    print(f"{args.replicates} replicates x {design.population.size} participants ({args.population} population); "
          f"{args.engine} engine, {model} population model, "
          f"{args.chains} chains x {args.draws} draws")
    print(table.round(4).to_string(index=False))
    d = reps["brier_unpooled"] - reps["brier_pooled"]
    se = d.std(ddof=1) / np.sqrt(len(d)) if len(d) > 1 else float("nan")
    print(f"\nBrier unpooled - pooled (paired over replicates): {d.mean():+.4f} (SE {se:.4f}, "
          f"z = {d.mean() / se:+.2f})")
    print("\ntargets:")
    print(f"  pooled reliability {sp['reliability']:.4f} <= 0.02: {'met' if sp['reliability'] <= 0.02 else 'NOT met'}"
          f" (expected from chance alone: {sp['reliability_chance']:.4f})")
    cov_ok = 0.85 <= sp["coverage"] <= 0.95
    print(f"  pooled 90% interval coverage {sp['coverage']:.3f} (SE {sp['coverage_se']:.3f}) in [0.85, 0.95]: "
          f"{'met' if cov_ok else 'NOT met'}")
    print(f"  pooled Brier below unpooled: {'met' if d.mean() > 0 else 'NOT met'} "
          f"(difference {d.mean():+.4f} +- {se:.4f})")
    if args.out:
        from poolbandit.report import Page, reliability_diagram

        out = Path(args.out)
        out.mkdir(parents=True, exist_ok=True)
        reps.to_csv(out / "replicates.csv", index=False)
        rel = pd.concat([all_p.reliability().assign(posterior="pooled"),
                         all_u.reliability().assign(posterior="unpooled")])
        rel.to_csv(out / "reliability.csv", index=False)
        (Page("Calibration of participant categories")
         .paragraph(__doc__.split("\n\n")[1].replace("\n", " "))
         .heading("Scores").table(table)
         .paragraph(f"Brier unpooled - pooled: {d.mean():+.4f} (SE {se:.4f}) over {len(d)} paired replicates.")
         .heading("Reliability").figure(reliability_diagram(all_p.reliability(), title="pooled"))
         .figure(reliability_diagram(all_u.reliability(), title="unpooled"))
         .heading("Replicates").table(reps)
         .write(out / "report.html"))
        print(f"wrote {out / 'replicates.csv'}, {out / 'reliability.csv'}, {out / 'report.html'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
