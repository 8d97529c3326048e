"""Time ``study assign`` and ``study record`` for a study of 10,000 participants.

Target: each command under 5 s for 10,000 participants, including the
process start-up a user pays on the command line. Prints, side by side in one
run, the wall time of each command through the CLI (a subprocess) and of the
library call alone, for a fresh study (step 0) and for a study with two weeks
of history (step 14, where the policy is rebuilt from 140,000 decisions),
and their ratio to the 5 s target.

Usage::

    .venv/bin/python benchmarks/study_speed.py [--participants 10000] [--policy ucb]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from poolbandit.study import assign, enroll, init_study, record

TARGET = 5.0

DESIGN = """
[study]
arms = ["drill", "story", "roleplay"]
horizon = 28
outcome = "gaussian"
reward = "log_minutes"
seed = 5

[context]
features = ["weekend"]

[participants]
covariates = ["proficiency"]

[policies.ucb]
kind = "ucb1"
clip = [0.05, 0.9]

[policies.solo]
kind = "thompson"
clip = [0.05, 0.9]
"""


def _cli(*args) -> float:
    t = time.perf_counter()
    r = subprocess.run([sys.executable, "-m", "poolbandit.cli.main", "study", *map(str, args)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        raise SystemExit(r.stderr)
    return time.perf_counter() - t


def _files(folder: Path, table: pd.DataFrame, step: int, rng) -> tuple[Path, Path]:
    outcomes = folder / f"outcomes{step}.csv"
    pd.DataFrame({"participant": table["participant"], "decision": table["decision"],
                  "log_minutes": np.round(rng.normal(2.4, 0.8, len(table)), 6)}).to_csv(outcomes, index=False)
    return outcomes


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--participants", type=int, default=10_000)
    ap.add_argument("--policy", default="ucb", choices=["ucb", "solo"])
    ap.add_argument("--history", type=int, default=14, help="steps of history before the second timing")
    args = ap.parse_args()
    rng = np.random.default_rng(1)
    n = args.participants
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "design.toml").write_text(DESIGN)
        db = folder / "study.sqlite"
        init_study(folder / "design.toml", db, policy=args.policy)
        ids = [f"p{i:05d}" for i in range(n)]
        pd.DataFrame({"participant": ids, "proficiency": rng.standard_normal(n)}).to_csv(folder / "w.csv",
                                                                                          index=False)
        enroll(db, folder / "w.csv")
        rows = []

        def context(step: int) -> Path:
            path = folder / f"context{step}.csv"
            pd.DataFrame({"participant": ids, "weekend": float(step % 7 >= 5)}).to_csv(path, index=False)
            return path

        def measure(step: int) -> None:
            ctx = context(step)
            t_cli_assign = _cli("assign", "--db", db, "--context", ctx, "--out", folder / f"arms{step}.csv")
            table = pd.read_csv(folder / f"arms{step}.csv", dtype={"participant": str})
            t = time.perf_counter()
            again = assign(db, step=step)  # the stored read-back, for scale
            t_lib_read = time.perf_counter() - t
            assert len(again) == n
            outcomes = _files(folder, table, step, rng)
            t_cli_record = _cli("record", "--db", db, outcomes)
            rows.append((step, "assign (CLI, new step)", t_cli_assign))
            rows.append((step, "assign (library, read back)", t_lib_read))
            rows.append((step, "record (CLI)", t_cli_record))

        measure(0)
        t = time.perf_counter()
        for step in range(1, args.history):
            table = assign(db, context=context(step))
            record(db, _files(folder, table, step, rng))
        fill = time.perf_counter() - t
        # library timings of a new step, for the share of process start-up
        ctx = context(args.history)
        t = time.perf_counter()
        table = assign(db, context=ctx)
        t_lib_assign = time.perf_counter() - t
        outcomes = _files(folder, table, args.history, rng)
        t = time.perf_counter()
        record(db, outcomes)
        t_lib_record = time.perf_counter() - t
        rows.append((args.history, "assign (library, new step)", t_lib_assign))
        rows.append((args.history, "record (library)", t_lib_record))
        measure(args.history + 1)
        size = os.path.getsize(db) / 1e6
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", "import poolbandit.study.operations"], check=True)
    startup = time.perf_counter() - t0
    print(f"study_speed: {n} participants, policy {args.policy}; database {size:.1f} MB; "
          f"{args.history - 1} steps of history filled in {fill:.1f} s")
    print(f"process start-up with imports: {startup:.2f} s")
    print(f"{'step':>5}  {'command':<30} {'seconds':>8} {'ratio to 5 s':>13}")
    for step, what, sec in rows:
        print(f"{step:>5}  {what:<30} {sec:>8.2f} {sec / TARGET:>13.2f}")


if __name__ == "__main__":
    main()
