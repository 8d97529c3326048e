"""``poolbandit demo [--out DIR]``: the whole tour on the embedded practice-formats design.

1. **Design comparison**: every policy of the design (and its tuning sweep)
   on the same simulated learners, common random numbers, a modest number
   of replicates; the power of a two-group study (pooled against random).
2. **One simulated study** with the pooled policy: ``log.csv`` and ``truth.csv``.
3. **Fit and classification**: the hierarchical model fitted to that log with
   the fast engine; every learner's category probabilities and labels,
   scored against the simulated truth.
4. **One report**: ``report.html`` with every table and figure.
"""

from __future__ import annotations

import argparse

from .._random import spawn
from ..errors import InputError
from ..log import write_log
from ._common import atomic_path, design_from, output_dir
from .compare import add_compare_options, print_summary, run_comparison

__all__ = ["register", "run"]


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help="run the whole tour on the embedded practice-formats scenario",
                       description="Compare the embedded design's policies by simulation, simulate one study "
                                   "with the pooled policy, fit and classify it, and write one report.")
    p.add_argument("--out", default="demo-output", help="output folder (default: ./demo-output)")
    add_compare_options(p, replicates=12)
    p.add_argument("--draws", type=int, default=500, help="kept draws per chain of the fit (default: 500)")
    p.set_defaults(run=run, power_sizes="40,80")
    p.add_argument("--study-policy", default=None,
                   help="policy of the one simulated study (default: the design's pooled policy)")


def run(args: argparse.Namespace) -> int:
    design = design_from(None)
    if args.draws < 20:
        raise InputError(f"--draws: expected an integer >= 20, got {args.draws}")
    seed = args.seed if args.seed is not None else design.study.seed
    out = output_dir(args.out)

    print("1/3 design comparison ...", flush=True)
    comparison = run_comparison(design, args)
    written = comparison.write(out, report=False)
    print_summary(comparison)

    study = _study_policy(design, args.study_policy, comparison.info["policies"])
    print(f"2/3 one simulated study with policy {study!r}, fit and classification ...", flush=True)
    g_sim, g_fit, g_pop = spawn(seed, 3)
    from ..simulation import replicate_metrics, simulate

    result = simulate(design, study, g_sim, size=args.participants)
    with atomic_path(out / "log.csv") as tmp:
        write_log(result.log, tmp)
    with atomic_path(out / "truth.csv") as tmp:
        result.truth.to_csv(tmp, index=False, lineterminator="\n")
    m = replicate_metrics(result)
    classification, calibration, fit_note = _classify(design, result, args.draws, g_fit, g_pop)
    for name, table in (("categories", classification.table()), ("effects", classification.effects),
                        ("prevalence", classification.prevalence)):
        with atomic_path(out / f"{name}.csv") as tmp:
            table.to_csv(tmp, index=False, lineterminator="\n")
    scores = calibration.summary()
    print(f"   {result.population.size} learners, regret per learner {m['regret']:.2f}; labelled "
          f"{scores['labelled_share']:.0%}, of which correct {scores['labelled_accuracy']:.0%}; "
          f"Brier score {scores['brier']:.3f}")

    print("3/3 report ...", flush=True)
    page = _report(design, comparison, classification, calibration, study, m, fit_note)
    with atomic_path(out / "report.html") as tmp:
        tmp.write_text(page.render(), encoding="utf-8")
    files = [p.name for p in written] + ["log.csv", "truth.csv", "categories.csv", "effects.csv", "prevalence.csv",
                                         "report.html"]
    print(f"wrote {', '.join(files)} to {out}")
    return 0


def _study_policy(design, wanted: str | None, runnable: list[str]) -> str:
    if wanted is not None:
        design.policy(wanted)
        if wanted not in runnable:
            raise InputError(f"--study-policy: policy {wanted!r} cannot run in this version")
        return wanted
    for name in runnable:  # the design's first pooled policy (the recommended default comes first)
        if design.policies[name].kind.startswith("pooled-"):
            return name
    return next((n for n in runnable if design.policies[n].kind != "random"), runnable[0])


def _classify(design, result, draws: int, g_fit, g_pop):
    """Fit the fast engine to the simulated log, classify, and score against the truth."""
    from ..classify import calibrate, classify, population_effects, true_effects
    from ..models.data import ModelData
    from ..models.effects import arm_effects
    from ..models.fit import fit

    chains, tune = 2, max(200, draws // 2)
    idata = fit(result.log, design, engine="fast", chains=chains, draws=draws, tune=tune, rng=g_fit)
    scale = "probability" if design.study.outcome == "bernoulli" else "linear"
    effect = arm_effects(idata, design.arms, design.features, scale=scale)
    covariates = ModelData.from_log(result.log, design).W if design.covariates else None
    pop = population_effects(idata, design.arms, design.features, covariates=covariates, scale=scale, rng=g_pop)
    classification = classify(effect, design.categories, population_effect=pop)
    calibration = calibrate(classification, true_effects(result.population))
    return classification, calibration, f"fast engine, {chains} chains x {draws} draws after {tune} warm-up sweeps"


def _report(design, comparison, classification, calibration, study: str, metrics: dict, fit_note: str):
    from ..compare.report import add_comparison_sections
    from ..report import Page, prevalence_plot, probability_bars

    page = Page(f"poolbandit demo: {design.study.title}",
                subtitle="An invented scenario: three practice formats (drill, story, roleplay) for adult "
                         "language learners. All numbers are simulated.")
    page.paragraph(
        "The tour: first every candidate assignment policy is compared by simulation on the same simulated "
        "learners; then one study is simulated with the pooled policy, the hierarchical model is fitted to its "
        "log, and every learner is classified by their likely best practice format, with honest uncertainty.")
    add_comparison_sections(page, comparison)

    page.heading(f"One simulated study with {study}")
    scores = calibration.summary()
    page.paragraph(
        f"{len(classification.participants)} learners; regret per learner {metrics['regret']:.2f}, share of "
        f"decisions on each learner's best format {metrics['best_arm_share']:.0%}. Model: {fit_note}.")
    counts = classification.label_counts().rename("learners").rename_axis("label").reset_index()
    page.table(counts, caption=f"Labels (threshold {classification.threshold:g} on the top category's "
                               "posterior probability)")
    page.bullets([
        f"labelled: {scores['labelled_share']:.0%} of learners; correct among them: "
        f"{scores['labelled_accuracy']:.0%} (against the simulated truth)",
        f"Brier score {scores['brier']:.3f} (reliability {scores['reliability']:.3f}, resolution "
        f"{scores['resolution']:.3f})",
        f"{classification.mass:.0%} intervals of arm effects cover the truth for {scores['coverage']:.0%} of "
        "learner-format pairs",
    ])
    page.figure(probability_bars(classification), caption="Each learner's category probabilities.",
                alt="category probabilities")
    page.figure(prevalence_plot(classification.prevalence, mass=classification.mass),
                caption="Expected share of each category in the study and in the population.", alt="prevalence")
    return page
