"""``poolbandit study init|enroll|assign|record|status|export|verify --db PATH``: a live study in SQLite.

The library work is in :mod:`poolbandit.study`; this module only parses
arguments and prints. It imports the study package lazily so that
``poolbandit --help`` and the other commands do not pay for it.
"""

from __future__ import annotations

import argparse
import sys

__all__ = ["register"]

_LIST_LIMIT = 20


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "study", help="run a live study day by day from one SQLite file",
        description="Run a live study: every command reads and writes one SQLite database (--db). Each write "
                    "command validates all its input first and writes in one transaction, so bad input or a "
                    "killed process leaves the database unchanged.")
    ops = p.add_subparsers(dest="study_command", metavar="STUDY_COMMAND")
    ops.required = True

    def add(name: str, help_text: str, description: str) -> argparse.ArgumentParser:
        q = ops.add_parser(name, help=help_text, description=description)
        q.add_argument("--db", required=True, help="the study database (SQLite file)")
        return q

    q = add("init", "create a study database from a design",
            "Store the design as submitted (with its sha256), the policy that runs the adaptive condition and "
            "the study seed (the design's study.seed, or a fresh one printed here). Refuses to overwrite a file.")
    q.add_argument("design", help="design file (TOML)")
    q.add_argument("--policy", default=None,
                   help="name of the design policy for the adaptive condition (default: the design's only live "
                        "policy that is not random); simulation-only kinds are refused")
    q.set_defaults(run=_init)

    q = add("enroll", "enrol participants from a CSV file",
            "Enrol the participants of a CSV file with columns participant and one per design covariate. They "
            "start at the next step. With --control-ratio R, exactly round(R n) of them, chosen at random "
            "(seeded, logged), get uniform random assignment as the control condition.")
    q.add_argument("participants", help="CSV: participant, <covariates...>")
    q.add_argument("--control-ratio", type=float, default=None, metavar="R",
                   help="share of this file's participants randomised to control, in [0, 1] (default: none)")
    q.set_defaults(run=_enroll)

    q = add("assign", "assign arms to everyone due a decision at the next step",
            "Assign an arm to every participant due a decision and print the assignments as CSV (participant, "
            "decision, step, arm, propensity, condition). Asking again for a step already assigned prints the "
            "stored assignments and draws nothing.")
    q.add_argument("--step", type=int, default=None, help="step to assign or read back (default: the next one)")
    q.add_argument("--context", default=None, metavar="FILE",
                   help="CSV: participant, <features...> with the decision-time context of every due "
                        "participant; required when the design has context features")
    q.add_argument("--out", default=None, metavar="FILE", help="write the CSV here instead of standard output")
    q.set_defaults(run=_assign)

    q = add("record", "record outcomes from a CSV file",
            "Record outcomes: columns participant, decision and the design's reward column (empty = the session "
            "did not happen); optional step and arm must match the stored decision. Any bad row rejects the "
            "whole file.")
    q.add_argument("outcomes", help="CSV: participant, decision, <reward> [, step, arm]")
    q.add_argument("--correct", action="store_true",
                   help="let rows with a new value supersede outcomes already recorded (both are kept)")
    q.set_defaults(run=_record)

    q = add("status", "who is due, who is missing outcomes, decisions per arm",
            "Show the study's state: steps assigned, participants due next, decisions without an outcome, "
            "decisions per condition and arm, and the latest posterior summary of a pooled policy.")
    q.add_argument("--all", action="store_true", help="list every due participant and missing outcome")
    q.set_defaults(run=_status)

    q = add("export", "write the study log (a StudyLog CSV)",
            "Write one row per decision with the latest outcome, in the StudyLog format that fit and classify "
            "read.")
    q.add_argument("--out", required=True, metavar="LOG", help="the StudyLog CSV to write")
    q.add_argument("--design-out", default=None, metavar="FILE", help="also write the stored design text here")
    q.set_defaults(run=_export)

    q = add("verify", "re-derive every assignment and compare it exactly",
            "Re-run every step's assignment from the data recorded before it and the study seed, and check that "
            "each stored arm, propensity and probability table is reproduced bit for bit. Exit status 1 when "
            "anything differs.")
    q.set_defaults(run=_verify)


def _init(args: argparse.Namespace) -> int:
    from ..study import init_study

    info = init_study(args.design, args.db, policy=args.policy)
    print(f"created {info.path}: policy {info.policy} ({info.kind}), seed {info.seed}, "
          f"design sha256 {info.design_sha256[:12]}")
    return 0


def _enroll(args: argparse.Namespace) -> int:
    from ..study import enroll

    r = enroll(args.db, args.participants, control_ratio=args.control_ratio)
    split = f" ({r.n_adaptive} adaptive, {r.n_control} control)" if args.control_ratio is not None else ""
    print(f"enrolled {r.enrolled} participants{split}, starting at step {r.enrol_step}")
    return 0


def _assign(args: argparse.Namespace) -> int:
    from ..study import assign

    table = assign(args.db, step=args.step, context=args.context)
    if args.out is not None:
        from ._common import atomic_path

        with atomic_path(args.out) as tmp:
            table.to_csv(tmp, index=False, lineterminator="\n")
    else:
        table.to_csv(sys.stdout, index=False, lineterminator="\n")
    step = int(table["step"].iat[0]) if len(table) else args.step
    how = "new" if table.attrs.get("new") else "already stored; nothing drawn"
    where = f" to {args.out}" if args.out else ""
    print(f"step {step}: {len(table)} assignments ({how}){where}", file=sys.stderr)
    return 0


def _record(args: argparse.Namespace) -> int:
    from ..study import record

    r = record(args.db, args.outcomes, correct=args.correct)
    print(f"recorded {r.new} new outcomes, {r.corrected} corrections; {r.unchanged} rows were already stored")
    return 0


def _status(args: argparse.Namespace) -> int:
    from ..study import status

    s = status(args.db)
    limit = None if args.all else _LIST_LIMIT
    steps = "none yet" if s.last_step is None else f"0..{s.last_step}"
    print(f"policy: {s.policy} ({s.kind})")
    print(f"steps assigned: {steps}; next step: {s.next_step}")
    print(f"enrolled: {sum(s.enrolled.values())} (adaptive {s.enrolled['adaptive']}, control "
          f"{s.enrolled['control']}); finished: {s.finished}")
    print(f"due at step {s.next_step}: {len(s.due)}" + (f": {_names(s.due, limit)}" if s.due else ""))
    print(f"decisions: {s.decisions}; with an outcome: {s.outcomes}; missing an outcome: {len(s.missing)}")
    if len(s.missing):
        shown = s.missing if limit is None else s.missing.head(limit)
        print("  " + shown.to_csv(index=False, lineterminator="\n  ").rstrip())
        if len(shown) < len(s.missing):
            print(f"  ... and {len(s.missing) - len(shown)} more (--all lists them)")
    if len(s.arm_counts):
        print("decisions per arm:")
        print("  " + s.arm_counts.to_string().replace("\n", "\n  "))
    if s.snapshot is not None:
        import json

        print(f"posterior summary at step {s.last_step}:")
        print("  " + json.dumps(s.snapshot, indent=1, sort_keys=True).replace("\n", "\n  "))
    return 0


def _names(ids: list[str], limit: int | None) -> str:
    if limit is None or len(ids) <= limit:
        return ", ".join(ids)
    return ", ".join(ids[:limit]) + f", ... ({len(ids) - limit} more)"


def _export(args: argparse.Namespace) -> int:
    from ..study import export

    df = export(args.db, args.out, design_out=args.design_out)
    print(f"wrote {args.out}: {len(df)} decisions of {df['participant'].nunique()} participants"
          + (f"; design to {args.design_out}" if args.design_out else ""))
    return 0


def _verify(args: argparse.Namespace) -> int:
    from ..study import verify

    r = verify(args.db)
    if r.ok:
        print(f"verified {r.decisions} decisions over {r.steps} steps and {r.randomisations} randomisations: "
              f"every arm, propensity and probability table re-derived exactly")
        return 0
    print(f"verification FAILED: {len(r.mismatches)} mismatches", file=sys.stderr)
    for line in r.mismatches[:50]:
        print(f"  {line}", file=sys.stderr)
    return 1
