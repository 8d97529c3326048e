"""Several ``assign`` and ``record`` processes at once: one assignment per participant-decision, no lost row.

The store relies on SQLite's locking (SQLite documentation, "File Locking
And Concurrency" and ``BEGIN IMMEDIATE``): a write command takes the write
lock before it reads what it writes against, and a concurrent one waits
(``busy_timeout``) instead of failing; UNIQUE constraints on
(participant, decision) and (participant, step) back that up. No lock file.
"""

from __future__ import annotations

import os
import sqlite3
import subprocess
import sys

import pandas as pd

from poolbandit.study import enroll, init_study, verify

from .helpers import DESIGN_BERNOULLI, write

N = 40


def _start(*args) -> subprocess.Popen:
    env = dict(os.environ, PYTHONDONTWRITEBYTECODE="1")
    return subprocess.Popen([sys.executable, "-m", "poolbandit.cli.main", "study", *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)


def _finish(procs) -> list[str]:
    outs = []
    for p in procs:
        out, err = p.communicate(timeout=300)
        assert p.returncode == 0, err
        outs.append(out)
    return outs


def test_parallel_assign_and_record(tmp_path):
    db = tmp_path / "study.sqlite"
    init_study(write(tmp_path / "design.toml", DESIGN_BERNOULLI), db, policy="ucb")
    enroll(db, write(tmp_path / "w.csv", "participant,proficiency\n"
                     + "".join(f"p{i:02d},{i / N}\n" for i in range(N))), control_ratio=0.5)
    # four processes race for step 0: one draws, the others read back what it stored
    outs = _finish([_start("assign", "--db", db, "--step", "0") for _ in range(4)])
    assert len(set(outs)) == 1
    table = pd.read_csv(pd.io.common.StringIO(outs[0]))
    assert len(table) == N and table["step"].eq(0).all()
    conn = sqlite3.connect(str(db))
    assert conn.execute("SELECT count(*), count(DISTINCT participant || '#' || decision) FROM decisions"
                        ).fetchone() == (N, N)
    assert conn.execute("SELECT count(*) FROM steps").fetchone()[0] == 1
    conn.close()
    # the same file twice and another file at once, while step 1 is assigned: nothing lost, nothing doubled
    rows = table[["participant", "decision"]].assign(met_goal=(table.index % 2))
    a = tmp_path / "a.csv"
    b = tmp_path / "b.csv"
    rows.iloc[: N // 2].to_csv(a, index=False)
    rows.iloc[N // 2:].to_csv(b, index=False)
    _finish([_start("record", "--db", db, a), _start("record", "--db", db, a), _start("record", "--db", db, b),
             _start("assign", "--db", db, "--step", "1"), _start("assign", "--db", db, "--step", "1")])
    conn = sqlite3.connect(str(db))
    assert conn.execute("SELECT count(*), count(DISTINCT decision) FROM outcomes").fetchone() == (N, N)
    assert conn.execute("SELECT count(*), count(DISTINCT participant || '#' || decision) FROM decisions"
                        ).fetchone() == (2 * N, 2 * N)
    assert conn.execute("SELECT count(*) FROM steps").fetchone()[0] == 2
    conn.close()
    report = verify(db)  # whichever order they ran in, every assignment re-derives exactly
    assert report.ok, report.mismatches
