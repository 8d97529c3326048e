"""``poolbandit classify LOG --design DESIGN``: each participant's likely category, with uncertainty.

Fits the hierarchical model to the study log (fast or full engine), turns the
posterior into every participant's arm effects in the chosen context, applies
the design's ``[[categories]]`` and writes

* ``categories.csv``: participant, category, probability, mc_se,
  exclusive_probability, exclusive_mc_se, label, overlap_probability;
* ``effects.csv``: participant, quantity (arm or contrast ``A - B``), kind,
  mean, sd, mc_se, hdi_low, hdi_high;
* ``prevalence.csv``: source, set, category, share, mc_se, low, high;
* ``agreement.csv`` (with ``--intake``): the confusion table;
* ``report.html``: forest plot, probability bars, population shares.

For a bernoulli outcome effects are on the probability scale, so margins are
in reward units either way.
"""

from __future__ import annotations

import argparse
import math
import sys

from .._random import spawn
from ..classify import agreement as agreement_of
from ..classify import classify, population_effects, read_intake
from ..errors import InputError, format_value
from ..log import read_log
from ..models.data import ModelData
from ..models.fit import fit
from ..models.effects import arm_effects
from ._common import atomic_path, design_from, output_dir, show_progress

__all__ = ["register", "run", "parse_context"]


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "classify", help="category probabilities per participant; writes categories.csv, effects.csv, "
                         "prevalence.csv, report.html",
        description="Fit the hierarchical model to a study log and report each participant's posterior "
                    "probability of every category of the design, with Monte Carlo errors, effect intervals, "
                    "labels and population shares.")
    p.add_argument("log", help="study log (CSV)")
    p.add_argument("--design", required=True, help="design file (TOML) with [[categories]]")
    p.add_argument("--engine", choices=("fast", "full"), default="fast",
                   help="fast: vectorised Gibbs sampler; full: PyMC NUTS (default: fast)")
    p.add_argument("--context", nargs="+", action="extend", default=[], metavar="NAME=VALUE",
                   help="context in which effects are compared (default: every feature 0)")
    p.add_argument("--mass", type=float, default=0.9, help="credible mass of intervals (default: 0.9)")
    p.add_argument("--threshold", type=float, default=0.8,
                   help="minimum top probability for a label (default: 0.8)")
    p.add_argument("--intake", default=None, metavar="FILE.csv",
                   help="intake measure: a CSV with a participant column and a category column")
    p.add_argument("--intake-column", default=None, metavar="C", help="the intake file's category column")
    p.add_argument("--chains", type=int, default=4, help="chains (default: 4)")
    p.add_argument("--draws", type=int, default=1000, help="kept draws per chain (default: 1000)")
    p.add_argument("--tune", type=int, default=None,
                   help="warm-up iterations per chain (default: the engine's own, 500 fast, 1000 full)")
    p.add_argument("--seed", type=int, default=None, help="root seed (default: the design's study.seed)")
    p.add_argument("--out", default="classification", help="output folder (default: ./classification)")
    p.set_defaults(run=run)


def parse_context(items: list[str], features: tuple[str, ...]) -> dict[str, float]:
    """Parse ``NAME=VALUE`` items into a context (unknown names and bad numbers raise InputError)."""
    out: dict[str, float] = {}
    for item in items:
        name, sep, value = item.partition("=")
        name = name.strip()
        if not sep or not name:
            raise InputError(f"--context: expected NAME=VALUE, got {format_value(item)}")
        if name not in features:
            known = ", ".join(features) or "(the design has no context features)"
            raise InputError(f"--context: unknown feature {format_value(name)}; features: {known}")
        try:
            v = float(value)
        except ValueError:
            v = math.nan
        if not math.isfinite(v):
            raise InputError(f"--context {name}: expected a finite number, got {format_value(value)}")
        out[name] = v
    return out


def _diagnostics(idata) -> list[str]:
    import arviz as az

    theta = idata.posterior[["theta"]]
    lines = []
    if theta.sizes["chain"] > 1:
        rhat = float(az.rhat(theta)["theta"].max())
        ess = float(az.ess(theta, method="bulk")["theta"].min())
        lines.append(f"participant coefficients: largest R-hat {rhat:.3f}, smallest bulk ESS {ess:.0f}")
        if rhat > 1.01:
            warning = f"largest R-hat of theta is {rhat:.3f} > 1.01: run more draws (--draws, --tune)"
            print(f"poolbandit classify: warning: {warning}", file=sys.stderr)
            lines.append(f"WARNING: {warning}")
    if "sample_stats" in idata and "diverging" in idata.sample_stats:
        n_div = int(idata.sample_stats["diverging"].sum())
        lines.append(f"divergent transitions: {n_div}")
    return lines


def run(args: argparse.Namespace) -> int:
    design = design_from(args.design)
    if not design.categories:
        raise InputError(f"{args.design}: categories: the design declares no [[categories]]")
    for name, v, low in (("--chains", args.chains, 1), ("--draws", args.draws, 4), ("--tune", args.tune, 0)):
        if v is not None and v < low:
            raise InputError(f"{name}: expected an integer >= {low}, got {v}")
    if not 0 < args.mass < 1:
        raise InputError(f"--mass: expected a number in (0, 1), got {args.mass!r}")
    if not 0 < args.threshold <= 1:
        raise InputError(f"--threshold: expected a number in (0, 1], got {args.threshold!r}")
    if (args.intake is None) != (args.intake_column is None):
        raise InputError("--intake and --intake-column go together: give both or neither")
    context = parse_context(args.context, design.features)
    log = read_log(args.log, design)
    names = [c.name for c in design.categories]
    intake = read_intake(args.intake, args.intake_column, names) if args.intake else None

    seed = args.seed if args.seed is not None else design.study.seed
    g_fit, g_pop = spawn(seed, 2)
    idata = fit(log, design, engine=args.engine, chains=args.chains, draws=args.draws, tune=args.tune, rng=g_fit,
                progress=show_progress())
    scale = "probability" if design.study.outcome == "bernoulli" else "linear"
    effect = arm_effects(idata, design.arms, design.features, context=context, scale=scale)
    covariates = ModelData.from_log(log, design).W if design.covariates else None
    pop = population_effects(idata, design.arms, design.features, context=context, covariates=covariates,
                             scale=scale, rng=g_pop)
    result = classify(effect, design.categories, mass=args.mass, threshold=args.threshold,
                      population_effect=pop, context=context)
    agree = agreement_of(result, intake) if intake is not None else None

    from ..report import classification_page

    notes = [f"study log {args.log}; design {args.design}",
             f"{args.engine} engine, {args.chains} chains x {args.draws} draws, seed {seed}"] + _diagnostics(idata)
    page = classification_page(result, agreement=agree, notes=notes,
                               title=f"Participant categories: {design.study.title or 'study'}")
    html = page.render()

    out = output_dir(args.out)
    with atomic_path(out / "categories.csv") as tmp:
        result.table().to_csv(tmp, index=False, lineterminator="\n")
    with atomic_path(out / "effects.csv") as tmp:
        result.effects.to_csv(tmp, index=False, lineterminator="\n")
    with atomic_path(out / "prevalence.csv") as tmp:
        result.prevalence.assign(mass=result.mass).to_csv(tmp, index=False, lineterminator="\n")
    if agree is not None:
        with atomic_path(out / "agreement.csv") as tmp:
            agree.table.to_csv(tmp, lineterminator="\n")
    with atomic_path(out / "report.html") as tmp:
        tmp.write_text(html, encoding="utf-8")

    for line in result.summary_lines():
        print(line)
    if agree is not None:
        k = agree.kappa
        pk = agree.posterior_kappa
        labels_kappa = f"{k.kappa:.3f} [{k.low:.3f}, {k.high:.3f}]" if k.kappa == k.kappa else "undefined"
        print(f"agreement with intake: kappa of labels {labels_kappa} over {k.n} labelled participants; "
              f"draw by draw {pk['mean']:.3f} [{pk['low']:.3f}, {pk['high']:.3f}] over {pk['n']}")
    written = ["categories.csv", "effects.csv", "prevalence.csv"] + (["agreement.csv"] if agree else []) \
        + ["report.html"]
    print("wrote " + ", ".join(str(out / w) for w in written))
    return 0
