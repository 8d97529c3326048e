"""A ``record`` killed at random points leaves the database as before or as after, never between.

SQLite's atomic commit (SQLite documentation, "Atomic Commit In SQLite" and
"Write-Ahead Logging": a transaction is durable exactly when its commit
frame is in the WAL) is what the store relies on; this test checks that the
store really uses it: one ``BEGIN IMMEDIATE`` transaction per command, no
writes outside it. A large import (6,000 outcome rows) is started in a
subprocess and killed with SIGKILL many times, half at uniformly random
times over the command's lifetime and half just after the WAL file starts
growing (the write itself). Every time, ``PRAGMA integrity_check`` must say
``ok`` and the database must be byte for byte the old one or hold the whole
import. The kill times come from a seeded generator.
"""

from __future__ import annotations

import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest

from poolbandit.study import assign, enroll, init_study

from .helpers import DESIGN_BERNOULLI, db_state, write

N = 6000


@pytest.fixture(scope="module")
def prepared(tmp_path_factory):
    root = tmp_path_factory.mktemp("crash")
    db = root / "base.sqlite"
    init_study(write(root / "design.toml", DESIGN_BERNOULLI), db, policy="ucb")
    ids = [f"p{i:05d}" for i in range(N)]
    pd.DataFrame({"participant": ids, "proficiency": np.linspace(-1, 1, N)}).to_csv(root / "w.csv", index=False)
    enroll(db, root / "w.csv")
    table = assign(db)
    outcomes = root / "outcomes.csv"
    pd.DataFrame({"participant": table["participant"], "decision": table["decision"],
                  "met_goal": np.arange(N) % 2}).to_csv(outcomes, index=False)
    return db, outcomes


def _start(db, outcomes) -> subprocess.Popen:
    env = dict(os.environ, PYTHONDONTWRITEBYTECODE="1")
    return subprocess.Popen([sys.executable, "-m", "poolbandit.cli.main", "study", "record", "--db", str(db),
                             str(outcomes)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)


def _state(db) -> str:
    conn = sqlite3.connect(str(db))
    try:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert conn.execute("PRAGMA foreign_key_check").fetchall() == []
        n = conn.execute("SELECT count(*) FROM outcomes").fetchone()[0]
        batches = conn.execute("SELECT count(*) FROM batches WHERE command = 'record'").fetchone()[0]
    finally:
        conn.close()
    if n == 0 and batches == 0:
        return "before"
    assert (n, batches) == (N, 1), f"a partial import: {n} outcome rows, {batches} record batches"
    return "after"


def test_killed_record_leaves_the_database_before_or_after(prepared, tmp_path):
    base, outcomes = prepared
    before = db_state(base)
    # one uninterrupted run: its duration spans the kill times, its result is "after"
    db = tmp_path / "full.sqlite"
    shutil.copyfile(base, db)
    t = time.perf_counter()
    assert _start(db, outcomes).wait(timeout=300) == 0
    duration = time.perf_counter() - t
    assert _state(db) == "after"
    after_rewards = sqlite3.connect(str(db)).execute("SELECT decision, reward FROM outcomes ORDER BY id").fetchall()

    rng = np.random.default_rng(20261202)
    seen = {"before": 0, "after": 0}
    killed_running = 0
    for trial in range(6):
        db = tmp_path / f"trial{trial}.sqlite"
        shutil.copyfile(base, db)
        wal = f"{db}-wal"
        proc = _start(db, outcomes)
        if trial % 2 == 0:
            time.sleep(rng.uniform(0.2, 1.1) * duration)
        else:  # wait for the write to begin, then kill within a few milliseconds
            deadline = time.perf_counter() + 3 * duration + 10
            while proc.poll() is None and time.perf_counter() < deadline:
                if os.path.exists(wal) and os.path.getsize(wal) > 0:
                    break
                time.sleep(0.0005)
            time.sleep(rng.uniform(0, 0.02))
        if proc.poll() is None:
            killed_running += 1
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=60)
        state = _state(db)
        seen[state] += 1
        if state == "before":
            assert db_state(db) == before  # byte for byte the old database
        else:
            rows = sqlite3.connect(str(db)).execute("SELECT decision, reward FROM outcomes ORDER BY id").fetchall()
            assert rows == after_rewards
    print(f"kills: {seen}, {killed_running} while running; uninterrupted run {duration:.2f} s")
    assert killed_running >= 3  # the test must actually interrupt the command, not watch it finish
    assert seen["before"] >= 1
