"""A whole live study driven through the command line only, with outcomes from a simulated truth.

The truth comes from :func:`poolbandit.simulation.draw_population` (seeded);
the test plays the participants: each day it writes the decision-time
context, runs ``study assign``, draws each reward from the true expected
reward of the assigned arm plus Gaussian noise (missed sessions with
probability 1 - adherence), and runs ``study record`` (some outcomes a day
late, one corrected). At the end the export must be accepted by
:func:`poolbandit.log.read_log` as is, ``study verify`` must reproduce every
assignment, and every logged propensity must equal its probability table's
entry for the chosen arm, exactly: the rule of micro-randomised trials that
the randomisation probability of every decision is known and logged (common
practice; Liao, Klasnja, Tewari and Murphy 2016, Statistics in Medicine 35,
1944-1971).

Then the downstream commands must take the export as is: ``poolbandit fit``
and ``poolbandit classify``.
"""

from __future__ import annotations

import io
import subprocess

import numpy as np
import pandas as pd
import pytest

from poolbandit import draw_population, parse_design, read_log

from .helpers import DESIGN_GAUSSIAN, cli, db_state, poolbandit, write


def _ok(result: subprocess.CompletedProcess) -> subprocess.CompletedProcess:
    assert result.returncode == 0, f"exit {result.returncode}\n{result.stdout}\n{result.stderr}"
    return result


def _csv(rows: dict) -> str:
    return pd.DataFrame(rows).to_csv(index=False, lineterminator="\n")


def _play(tmp_path, text: str, policy: str, *, days: int, ratio: float | None, seed: int):
    """Run the study day by day through the CLI; return what the test recorded and printed."""
    design = parse_design(text)
    pop = draw_population(design, seed)
    rng = np.random.default_rng(seed + 1)
    db = tmp_path / "study.sqlite"
    _ok(cli("init", write(tmp_path / "design.toml", text), "--db", db, "--policy", policy))
    n, h = pop.size, design.study.horizon
    ids = np.array(pop.ids, dtype=object)
    sim = design.population.features["yesterday"]
    previous = np.full(n, np.nan)
    late: list[dict] = []
    recorded: dict[tuple[str, int], float] = {}
    printed: dict[int, pd.DataFrame] = {}
    for day in range(days):
        wave = np.flatnonzero(pop.enrol_step == day)
        if len(wave):
            path = write(tmp_path / f"wave{day}.csv",
                         _csv({"participant": ids[wave], "proficiency": pop.covariates[wave, 0]}))
            _ok(cli("enroll", "--db", db, path, *(["--control-ratio", str(ratio)] if ratio is not None else [])))
        active = np.flatnonzero((pop.enrol_step <= day) & (day < pop.enrol_step + h))
        weekend = np.full(len(active), float(day % 7 >= 5))
        yesterday = np.where(np.isfinite(previous[active]), (previous[active] - sim.center) / sim.scale, 0.0)
        ctx_path = write(tmp_path / f"context{day}.csv",
                         _csv({"participant": ids[active], "weekend": weekend, "yesterday": yesterday}))
        out = tmp_path / f"arms{day}.csv"
        _ok(cli("assign", "--db", db, "--context", ctx_path, "--out", out))
        table = pd.read_csv(out, dtype={"participant": str})
        printed[day] = table
        assert table["participant"].tolist() == ids[active].tolist()  # everyone due, in enrolment order
        assert (table["decision"].to_numpy() == day - pop.enrol_step[active] + 1).all()
        arm = pd.Categorical(table["arm"], categories=design.arms).codes
        assert (arm >= 0).all()
        expected = pop.expected(active, np.column_stack([weekend, yesterday]))
        reward = expected[np.arange(len(active)), arm] + design.population.noise_sd * rng.standard_normal(len(active))
        reward = np.where(rng.random(len(active)) < design.population.adherence, np.round(reward, 6), np.nan)
        previous[active] = reward
        delay = rng.random(len(active)) < 0.1
        today = {"participant": ids[active][~delay], "decision": table["decision"].to_numpy()[~delay],
                 "log_minutes": reward[~delay]}
        rows = pd.concat([pd.DataFrame(late), pd.DataFrame(today)], ignore_index=True) if late else \
            pd.DataFrame(today)
        late = [{"participant": ids[active][j], "decision": int(table["decision"].iat[j]),
                 "log_minutes": reward[j]} for j in np.flatnonzero(delay)]
        extra = []
        if day == days // 2 and recorded:
            key = sorted(recorded)[0]  # a data-entry error found later: corrected, the old value kept
            rows = pd.concat([rows, pd.DataFrame([{"participant": key[0], "decision": key[1],
                                                  "log_minutes": 1.25}])], ignore_index=True)
            extra = ["--correct"]
        path = write(tmp_path / f"outcomes{day}.csv", rows.to_csv(index=False, lineterminator="\n"))
        _ok(cli("record", "--db", db, path, *extra))
        for r in rows.itertuples(index=False):
            recorded[(r.participant, int(r.decision))] = r.log_minutes
    if late:
        path = write(tmp_path / "outcomes-last.csv", pd.DataFrame(late).to_csv(index=False, lineterminator="\n"))
        _ok(cli("record", "--db", db, path))
        for r in late:
            recorded[(r["participant"], r["decision"])] = r["log_minutes"]
    return design, pop, db, recorded, printed


def _check_export(tmp_path, design, db, recorded, printed):
    log_path, design_path = tmp_path / "log.csv", tmp_path / "design-out.toml"
    _ok(cli("export", "--db", db, "--out", log_path, "--design-out", design_path))
    assert design_path.read_text() == design.source_text
    log = read_log(log_path, design)  # accepted as is
    # every propensity is exactly the table's entry for the chosen arm
    table = log[[f"prob_{a}" for a in design.arms]].to_numpy()
    code = pd.Categorical(log["arm"], categories=design.arms).codes
    assert (table[np.arange(len(log)), code] == log["propensity"].to_numpy()).all()
    # what assign printed each day is what was stored and exported
    shown = pd.concat(printed.values(), ignore_index=True)
    merged = log.merge(shown, on=["participant", "decision"], suffixes=("", "_printed"), validate="one_to_one")
    assert len(merged) == len(log) == len(shown)
    assert (merged["arm"] == merged["arm_printed"]).all()
    assert (merged["propensity"] == merged["propensity_printed"]).all()
    # the exported reward is the latest value recorded (NaN = missed session)
    want = np.array([recorded[(p, d)] for p, d in zip(log["participant"], log["decision"])], dtype=float)
    got = log["log_minutes"].to_numpy()
    assert np.array_equal(np.isnan(want), np.isnan(got)) and (want[~np.isnan(want)] == got[~np.isnan(got)]).all()
    verify = _ok(cli("verify", "--db", db))
    assert f"verified {len(log)} decisions" in verify.stdout
    return log, log_path, design_path


def test_28_day_study_with_waves_and_a_control_arm(tmp_path):
    """30 simulated learners in three weekly waves, 14 decisions each, half of each wave on uniform control."""
    design, pop, db, recorded, printed = _play(tmp_path, DESIGN_GAUSSIAN, "ucb", days=28, ratio=0.5, seed=2026)
    log, log_path, design_path = _check_export(tmp_path, design, db, recorded, printed)
    assert len(log) == 30 * 14 and log["step"].max() == 27
    assert (log.groupby("condition")["participant"].nunique() == 15).all()
    assert set(log.loc[log["condition"] == "control", "policy"]) == {"control"}
    assert (log.loc[log["condition"] == "control", "propensity"] == 1 / 3).all()
    # asking again for a past step returns exactly what was printed that day and writes nothing
    before = db_state(db)
    again = _ok(cli("assign", "--db", db, "--step", "5"))
    pd.testing.assert_frame_equal(pd.read_csv(io.StringIO(again.stdout), dtype={"participant": str}), printed[5])
    assert db_state(db) == before
    st = _ok(cli("status", "--db", db))
    assert "finished: 30" in st.stdout and "missing an outcome: 0" in st.stdout
    # downstream: the export feeds fitting and classification as is
    fitted = tmp_path / "fit"
    _ok(poolbandit("fit", log_path, "--design", design_path, "--engine", "fast", "--chains", "1", "--draws", "200",
                   "--out", fitted))
    assert (fitted / "posterior.nc").exists() and (fitted / "diagnostics.csv").exists()
    out = tmp_path / "classification"
    _ok(poolbandit("classify", log_path, "--design", design_path, "--chains", "1", "--draws", "200", "--out", out))
    categories = pd.read_csv(out / "categories.csv")
    assert set(pop.ids) <= set(categories["participant"].astype(str))


@pytest.mark.slow
def test_pooled_thompson_study(tmp_path):
    """The pooled policy runs a live study too: a short one (8 learners, two waves, 4 decisions, 6 days)."""
    text = (DESIGN_GAUSSIAN.replace("horizon = 14", "horizon = 4").replace("size = 30", "size = 8")
            .replace("waves = 3", "waves = 2").replace("wave_gap = 7", "wave_gap = 2")
            .replace("explore_first = 3", "explore_first = 1"))
    design, pop, db, recorded, printed = _play(tmp_path, text, "pooled", days=6, ratio=None, seed=7)
    log, _, _ = _check_export(tmp_path, design, db, recorded, printed)
    assert len(log) == 8 * 4 and set(log["policy"]) == {"pooled"}
    adaptive = log[log["decision"] > 1]  # after forced exploration the pooled posterior decides
    assert ((adaptive["propensity"] >= 0.05) & (adaptive["propensity"] <= 0.9)).all()  # the design's clip band
    st = _ok(cli("status", "--db", db))
    assert "posterior summary" in st.stdout and "beta" in st.stdout
