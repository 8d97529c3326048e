"""``poolbandit analyse LOG --design DESIGN [--out DIR] ...``: end-of-study analysis of a log.

Writes ``arm_values.csv``, ``policy_values.csv``, ``conditions.csv`` and
``report.html``. A log without propensities, or with propensities of 0 or 1
where overlap is needed, still gives exit status 0: the estimates that cannot
be made are rows with ``status = refused`` and a note saying why.
"""

from __future__ import annotations

import argparse
import warnings

import pandas as pd

from ..errors import InputError, LogError, OverlapWarning
from ._common import atomic_path, output_dir, show_progress

__all__ = ["register", "run"]


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "analyse", help="end-of-study analysis: arm values, policy values, adaptive vs control",
        description="Estimate every arm's value (naive, inverse-propensity weighted, self-normalised, doubly "
                    "robust, outcome model), the value of other policies on the same log, and the difference "
                    "between adaptive and control conditions. Writes arm_values.csv, policy_values.csv, "
                    "conditions.csv and report.html.")
    p.add_argument("log", help="study log (CSV)")
    p.add_argument("--design", required=True, help="design file (TOML)")
    p.add_argument("--out", default="analysis", help="output folder (default: ./analysis)")
    p.add_argument("--categories", default=None,
                   help="CSV with participant and category (or label) columns, e.g. categories.csv of classify")
    p.add_argument("--outcome-model", choices=("fast", "none"), default="fast",
                   help="outcome model for the doubly robust and model-based estimates: the hierarchical model's "
                        "fast engine, or none (default: fast)")
    p.add_argument("--participant-outcomes", default=None,
                   help="CSV with participant and numeric outcome columns (one row per participant), compared "
                        "between conditions")
    p.add_argument("--se", choices=("sandwich", "bootstrap"), default="sandwich",
                   help="standard errors clustered by participant: sandwich or participant bootstrap "
                        "(default: sandwich)")
    p.add_argument("--level", type=float, default=0.95, help="interval coverage (default: 0.95)")
    p.add_argument("--seed", type=int, default=None, help="seed of the bootstrap, replays and sampler "
                                                           "(default: the design's study.seed)")
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    from .._random import spawn
    from ..analysis import analyse, category_map, read_analysis_log, read_participant_outcomes
    from ..analysis.outcome_models import default_outcome_model
    from ..analysis.report import analysis_page
    from ._common import design_from

    if not 0 < args.level < 1:
        raise InputError(f"--level: expected a number in (0, 1), got {args.level}")
    design = design_from(args.design)
    log = read_analysis_log(args.log, design)
    categories = None
    if args.categories:
        categories = category_map(_read_csv(args.categories), source=args.categories)
    outcomes = None
    if args.participant_outcomes:
        outcomes = read_participant_outcomes(args.participant_outcomes, list(pd.unique(log["participant"])))
    seed = args.seed if args.seed is not None else design.study.seed
    g_model, g_rest = spawn(seed, 2)
    model, note = (None, "no outcome model (--outcome-model none): doubly robust and model-based rows are "
                         "unavailable") if args.outcome_model == "none" else default_outcome_model(g_model)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OverlapWarning)  # reported below and in the page
        result = analyse(log, design, outcome_model=model, outcome_note=note, categories=categories,
                         participant_outcomes=outcomes, level=args.level, se=args.se, rng=g_rest,
                         progress=show_progress())
    out = output_dir(args.out)
    html = analysis_page(result, level=args.level).render()  # everything computed before any file is written
    for name, table in (("arm_values.csv", result.arm_values), ("policy_values.csv", result.policy_values),
                        ("conditions.csv", result.conditions)):
        with atomic_path(out / name) as tmp:
            table.to_csv(tmp, index=False, lineterminator="\n")
    with atomic_path(out / "report.html") as tmp:
        tmp.write_text(html, encoding="utf-8")
    av = result.arm_values
    main = av[(av["group"] == "all")].pivot(index="arm", columns="estimator", values="estimate")
    pd.set_option("display.width", 120)
    print(f"arm values ({len(log)} decisions):")
    print(main.reindex(index=list(design.arms), columns=[c for c in ("naive", "ipw", "hajek", "dr", "model") if c in main.columns])
          .round(3).to_string())
    refused = av[av["status"] == "refused"]
    for note_text in pd.unique(refused["note"]):
        print(f"refused: {note_text}")
    for w in result.warnings:
        print(f"warning: {w}")
    for n in result.notes:
        print(f"note: {n}")
    print(f"wrote {out / 'arm_values.csv'}, {out / 'policy_values.csv'}, {out / 'conditions.csv'} and "
          f"{out / 'report.html'}")
    return 0


def _read_csv(path: str) -> pd.DataFrame:
    try:
        return pd.read_csv(path, dtype=str, keep_default_na=False, na_values=[""])
    except FileNotFoundError:
        raise LogError(["file not found"], source=path) from None
    except (pd.errors.EmptyDataError, pd.errors.ParserError, UnicodeDecodeError) as err:
        raise LogError([f"cannot parse CSV ({err})"], source=path) from None
