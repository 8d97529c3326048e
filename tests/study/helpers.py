"""Helpers shared by the study tests: designs, CLI runs, database snapshots."""

from __future__ import annotations

import os
import sqlite3
import subprocess
import sys
from pathlib import Path

from poolbandit.simulation.scenarios import ARMS, preference_categories

__all__ = ["DESIGN_GAUSSIAN", "DESIGN_BERNOULLI", "write", "cli", "poolbandit", "cli_in_process", "db_state"]

#: A small gaussian design in the demo scenario's shape (three practice formats), with the
#: calibration scenario's categories (scenarios.preference_categories, "arm-leaning" by 0.2).
DESIGN_GAUSSIAN = """
[study]
title = "Practice formats, live-study test"
arms = ["drill", "story", "roleplay"]
horizon = 14
outcome = "gaussian"
reward = "log_minutes"
seed = 20261201

[context]
features = ["weekend", "yesterday"]

[participants]
covariates = ["proficiency"]

[population]
size = 30
arm_means = [2.3, 2.6, 2.45]
arm_sd = [0.25, 0.25, 0.25]
noise_sd = 0.8
adherence = 0.85
waves = 3
wave_gap = 7
context_effects = [[-0.15, 0.0], [0.0, 0.0], [0.15, 0.0]]
covariate_effects = [[-0.1], [0.0], [0.1]]

[population.features.weekend]
kind = "weekend"

[population.features.yesterday]
kind = "previous-reward"
center = 2.3
scale = 0.9

[priors]
beta_sd = 3.0

[policies.control]
kind = "random"

[policies.ucb]
kind = "ucb1"
c = 0.5
clip = [0.05, 0.9]

[policies.pooled]
kind = "pooled-thompson"
clip = [0.05, 0.9]
explore_first = 3
burn_in = 40

[policies.oracle]
kind = "oracle"

""" + preference_categories(ARMS, margin=0.2, name="{arm}-leaning") + "\n"

#: A bernoulli design without context: "met the daily goal".
DESIGN_BERNOULLI = """
[study]
arms = ["drill", "story", "roleplay"]
horizon = 6
outcome = "bernoulli"
reward = "met_goal"
seed = 424242

[participants]
covariates = ["proficiency"]

[policies.solo]
kind = "thompson"
clip = [0.05, 0.9]

[policies.ucb]
kind = "ucb1"
"""


def write(path: Path, text: str) -> Path:
    path = Path(path)
    path.write_text(text, encoding="utf-8")
    return path


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env.pop("CI", None)
    env["PYTHONDONTWRITEBYTECODE"] = "1"
    return env


def poolbandit(*args: str | os.PathLike, timeout: float = 300) -> subprocess.CompletedProcess:
    """Run ``python -m poolbandit.cli.main ARGS`` in a subprocess."""
    return subprocess.run([sys.executable, "-m", "poolbandit.cli.main", *map(str, args)],
                          capture_output=True, text=True, env=_env(), timeout=timeout)


def cli(*args: str | os.PathLike, timeout: float = 120) -> subprocess.CompletedProcess:
    """Run ``python -m poolbandit.cli.main study ARGS`` in a subprocess."""
    return poolbandit("study", *args, timeout=timeout)


def cli_in_process(capsys, *args: str | os.PathLike) -> tuple[int, str, str]:
    """Run ``poolbandit study ARGS`` through ``main`` in this process (exit status, stdout, stderr)."""
    from poolbandit.cli.main import main

    capsys.readouterr()
    status = main(["study", *map(str, args)])
    out = capsys.readouterr()
    return status, out.out, out.err


def db_state(path: Path) -> tuple[bytes, list[str]]:
    """The database file's bytes (after a checkpoint) and its SQL dump."""
    conn = sqlite3.connect(str(path))
    try:
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        dump = list(conn.iterdump())
    finally:
        conn.close()
    return Path(path).read_bytes(), dump
