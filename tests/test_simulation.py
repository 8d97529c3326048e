"""The participant simulator and the runner: seeds, staggered waves, adherence, delayed feedback."""

import subprocess
import sys

import numpy as np
import pytest
from scipy import stats

from poolbandit import parse_design, simulate, write_log
from poolbandit.policies.base import Policy
from poolbandit.simulation import draw_population, participant_metrics, regret_curve, summarise


def test_same_seed_same_log_bytes(demo_design, tmp_path):
    """The same seed gives the same log byte for byte; a different seed a different log."""
    paths = []
    for i, seed in enumerate([5, 5, 6]):
        res = simulate(demo_design, "solo", seed, size=20)
        paths.append(tmp_path / f"log{i}.csv")
        write_log(res.log, paths[-1])
    assert paths[0].read_bytes() == paths[1].read_bytes()
    assert paths[0].read_bytes() != paths[2].read_bytes()


def test_cli_simulate_is_reproducible(tmp_path, demo_design):
    """`poolbandit simulate` with one seed twice writes identical log.csv and truth.csv."""
    from poolbandit.spec import DEFAULT_DESIGN_NAME
    design_path = tmp_path / DEFAULT_DESIGN_NAME
    design_path.write_text(demo_design.source_text)
    outs = []
    for run in ("a", "b"):
        out = tmp_path / run
        r = subprocess.run([sys.executable, "-m", "poolbandit.cli.main", "simulate", str(design_path),
                            "--policy", "greedy", "--seed", "3", "--participants", "15", "--out", str(out)],
                           capture_output=True, text=True)
        assert r.returncode == 0, r.stderr
        outs.append(out)
    for name in ("log.csv", "truth.csv"):
        assert (outs[0] / name).read_bytes() == (outs[1] / name).read_bytes()


def test_waves_adherence_and_types(demo_design):
    """Staggered waves start a week apart; missed sessions occur at 1 - adherence (binomial
    test at level 0.001); latent types appear in their declared shares (chi-square, 0.001)."""
    res = simulate(demo_design, "control", 8, size=400)
    log, pop = res.log, res.population
    assert sorted(set(pop.enrol_step)) == [0, 7, 14, 21]
    first = log[log.decision == 1].set_index("participant")["step"]
    assert (first.to_numpy() == pop.enrol_step).all()
    missed = int(log["log_minutes"].isna().sum())
    assert stats.binomtest(missed, len(log), 1 - demo_design.population.adherence).pvalue > 0.001
    counts = np.array([(pop.types == t.name).sum() for t in demo_design.population.types])
    assert stats.chisquare(counts).pvalue > 0.001
    # dropout (0.5% per decision) leaves some participants short of the horizon, none beyond it
    per = log.groupby("participant")["decision"].max()
    assert per.max() == demo_design.study.horizon and (per < demo_design.study.horizon).any()


def test_rewards_follow_the_model(demo_design):
    """Observed rewards minus expected rewards are N(0, noise_sd^2): KS test at level 0.001
    against scipy.stats.norm(0, 0.8)."""
    res = simulate(demo_design, "control", 9, size=200)
    log = res.log.dropna(subset=["log_minutes"])
    resid = log["log_minutes"] - log["expected_reward"]
    assert stats.kstest(resid, stats.norm(0, 0.8).cdf).pvalue > 0.001


class _Spy(Policy):
    """Records when rewards reach it."""

    kind = "spy"

    def _start(self):
        self.seen = []

    def _update(self, participant, arm, context, reward):
        self.seen.append((self.current_step, len(reward)))

    def _probabilities(self, batch, rng):
        self.current_step = batch.step
        return np.full((len(batch), self.n_arms), 1 / self.n_arms)


def test_feedback_is_delayed_one_step(demo_design, monkeypatch):
    """Rewards of step s reach the policy only when it is asked at step s + 1."""
    from poolbandit.simulation import draw_streams, run_policy, runner

    monkeypatch.setattr(runner, "make_policy", lambda spec, design, truth=None: _Spy(spec, design))
    pop = draw_population(demo_design, 1, size=10)
    res = run_policy(demo_design, demo_design.policy("control"), pop, draw_streams(demo_design, 10, 2), 3)
    seen = res.policy.seen
    # observe() runs before the step's probabilities, so the step recorded is the previous one
    steps = [s for s, _ in seen]
    assert steps == sorted(steps) and len(set(steps)) == len(steps)
    per_step = res.log.dropna(subset=["log_minutes"]).groupby("step").size()
    assert [n for _, n in seen] == per_step.loc[steps].tolist()


def test_bernoulli_outcome(demo_design):
    """A bernoulli design gives 0/1 rewards with frequency equal to the expected reward
    (binomial test at level 0.001)."""
    text = demo_design.source_text.replace('outcome = "gaussian"', 'outcome = "bernoulli"').replace(
        'reward = "log_minutes"', 'reward = "met_goal"')
    text = text.replace("arm_means = [3.2, 2.2, 2.2]", "arm_means = [0.8, -0.2, -0.2]").replace(
        "arm_means = [2.2, 3.2, 2.2]", "arm_means = [-0.2, 0.8, -0.2]").replace(
        "arm_means = [2.2, 2.2, 3.2]", "arm_means = [-0.2, -0.2, 0.8]").replace(
        "arm_means = [2.4, 2.4, 2.4]", "arm_means = [0.0, 0.0, 0.0]")
    design = parse_design(text)
    res = simulate(design, "solo", 4, size=150)
    log = res.log.dropna(subset=["met_goal"])
    assert set(log["met_goal"].unique()) <= {0.0, 1.0}
    assert stats.binomtest(int(log["met_goal"].sum()), len(log), log["expected_reward"].mean()).pvalue > 0.001


def test_metrics_and_curves(demo_design):
    """Regret curves end at the per-participant regret; summaries carry Monte Carlo errors."""
    import pandas as pd
    from poolbandit.simulation import replicate_metrics

    rows = []
    for seed in range(4):
        res = simulate(demo_design, "ucb", seed, size=30)
        rows.append({"policy": "ucb", **replicate_metrics(res)})
    curve = regret_curve(res)
    assert curve["cumulative_regret"].iloc[-1] == pytest.approx(participant_metrics(res)["regret"].mean())
    table = summarise(pd.DataFrame(rows))
    r = pd.DataFrame(rows)["regret"]
    assert table.loc[0, "regret_se"] == pytest.approx(r.std(ddof=1) / 2)
