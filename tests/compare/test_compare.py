"""Design comparison: identical results on every engine, common random numbers, power, sweeps.

Outside references: ``statsmodels.stats.power.TTestIndPower`` (closed-form
power of the two-sample t-test, checks.md 13) and the textbook variance
reduction of common random numbers (Law, *Simulation Modeling and Analysis*,
5th ed., section 11.2: a paired difference has variance
``var(a) + var(b) - 2 cov(a, b)``, smaller than the unpaired one when the
two policies' scores are positively correlated across replicates).
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from poolbandit import load_design, parse_design
from poolbandit.compare import compare
from poolbandit.compare.engine import LocalExecutor, child_seed
from poolbandit.compare.scoring import pareto_mask, tradeoff_table

HERE = Path(__file__).parent
DESIGN = HERE / "small.toml"


@pytest.fixture(scope="module")
def design():
    return load_design(DESIGN)


@pytest.fixture(scope="module")
def one_worker(design):
    """The reference run: every replicate in this process (seeded)."""
    return compare(design, replicates=6, rng=11, workers=1)


def _same(a, b):
    pd.testing.assert_frame_equal(a.summary, b.summary, check_exact=True)
    pd.testing.assert_frame_equal(a.replicates, b.replicates, check_exact=True)
    pd.testing.assert_frame_equal(a.curves, b.curves, check_exact=True)
    pd.testing.assert_frame_equal(a.sweep, b.sweep, check_exact=True)


def test_two_processes_give_identical_results(design, one_worker):
    """Same seed, 2 worker processes (spawn start method): byte-identical tables (SeedSequence.spawn per replicate)."""
    two = compare(design, replicates=6, rng=11, workers=2)
    assert two.info["executor"] == "local, 2 processes"
    _same(one_worker, two)


def test_dask_cluster_gives_identical_results(design, one_worker):
    """Same seed on a Dask LocalCluster with 2 workers on loopback (threads): identical tables."""
    distributed = pytest.importorskip("dask.distributed")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, protocol="tcp://",
                                      host="127.0.0.1",
                                      dashboard_address=None) as cluster:
            res = compare(design, replicates=6, rng=11, scheduler=cluster.scheduler_address)
    assert res.info["executor"].startswith("Dask cluster at tcp://127.0.0.1")
    _same(one_worker, res)


def test_batching_and_order_do_not_matter(design, one_worker):
    """Different batch layouts (1 unit per batch vs everything in one) give the same numbers."""
    ex = LocalExecutor(1)
    ex.batches_per_worker = 1
    res = compare(design, replicates=6, rng=11, executor=ex)
    _same(one_worker, res)
    other = compare(design, replicates=6, rng=12, workers=1)
    assert not np.allclose(other.replicates["regret"], one_worker.replicates["regret"])


def test_replicate_seed_is_spawn_child():
    """child_seed(root, r) is exactly SeedSequence(root).spawn(R)[r] (numpy's documented spawn keys)."""
    root = np.random.SeedSequence(123)
    kids = np.random.SeedSequence(123).spawn(5)
    for r in range(5):
        a = np.random.default_rng(child_seed(root, r)).random(3)
        b = np.random.default_rng(kids[r]).random(3)
        np.testing.assert_array_equal(a, b)


def test_common_random_numbers_shrink_every_standard_error(design):
    """Every paired SE of regret and mean reward is below the unpaired one (Law 2015, section 11.2).

    The test design's latent types make populations differ strongly between
    replicates, so all policies' scores move together; with 30 replicates
    the correlation is estimated well enough that the inequality holds for
    every pair (it is not a tolerance: paired < unpaired exactly).
    """
    res = compare(design, replicates=30, rng=5, workers=1, sweeps=False, scorer=None)
    d = res.differences[res.differences["metric"].isin(["regret", "mean_expected_reward", "mean_reward"])]
    assert len(d) == 3 * 3  # 3 non-reference policies x 3 scores
    assert (d["se"] < d["se_unpaired"]).all(), d[["policy", "metric", "se", "se_unpaired"]]
    # and the paired SE is the SD of replicate-wise differences over sqrt(R), recomputed here by hand
    wide = res.replicates.pivot(index="replicate", columns="policy", values="regret")
    ref = res.info["reference"]
    for name in ["solo", "ucb", "greedy"]:
        if name == ref:
            continue
        diff = wide[name] - wide[ref]
        row = d[(d["policy"] == name) & (d["metric"] == "regret")].iloc[0]
        assert row["se"] == pytest.approx(diff.std(ddof=1) / np.sqrt(30), rel=1e-12)


POWER_DESIGN = """
[study]
arms = ["low", "high"]
horizon = 20
[population]
size = 20
arm_means = [0.0, 0.5]
arm_sd = [0.0, 0.0]
noise_sd = 1.0
adherence = 1.0
[policies.control]
kind = "random"
[policies.fixed]
kind = "oracle"
"""


def test_power_matches_statsmodels_for_fixed_effect_and_fixed_allocation():
    """Simulated power agrees with statsmodels' TTestIndPower (checks.md 13).

    Fixed effect (no heterogeneity), non-adaptive allocation: the "adaptive"
    condition always gives the better arm (mean 0.5), the control draws
    each arm with probability 1/2. With T = 20 decisions and noise sd 1, a
    participant's mean reward has variance 1/T in the first group and
    (1 + 0.5^2/4)/T in the control (the coin flip adds mu^2/4 per decision);
    the mean difference is 0.25. Effect size d = 0.25 / sqrt of the average
    variance (closed form, computed here). Tolerance: 3 binomial Monte Carlo
    SEs of the simulated power plus 0.02 for Welch's test against the
    equal-variance closed form (the two variances differ by 6%).
    """
    from statsmodels.stats.power import TTestIndPower

    design = parse_design(POWER_DESIGN)
    reps = 300
    res = compare(design, replicates=2, rng=2024, workers=2, sweeps=False, scorer=None, power_sizes=[12, 24],
                  power_policy="fixed", power_replicates=reps)
    t = 20
    var_fixed, var_control = 1.0 / t, (1.0 + 0.5**2 / 4) / t
    d = 0.25 / np.sqrt((var_fixed + var_control) / 2)
    for _, row in res.power.iterrows():
        n = int(row["size"]) // 2
        expected = TTestIndPower().power(effect_size=d, nobs1=n, alpha=0.05, ratio=1.0)
        se = np.sqrt(expected * (1 - expected) / reps)
        assert abs(row["power"] - expected) < 3 * se + 0.02, (row["size"], row["power"], expected)
        # the expected difference is the closed-form 0.25 within 4 Monte Carlo SEs
        assert abs(row["difference"] - 0.25) < 4 * row["difference_se"]


def test_sweep_ranking_and_near_best(one_worker):
    """Ranks follow the means; near_best means within 2 paired SEs of the best (recomputed by hand)."""
    sw = one_worker.sweep
    assert list(sw["policy"]) == ["ucb-c[c=0.25]", "ucb-c[c=1]"]
    best = sw.loc[sw["regret"].idxmin()]
    assert best["rank"] == 1 and best["near_best"]
    wide = one_worker.replicates.pivot(index="replicate", columns="policy", values="regret")
    other = sw.loc[sw["rank"] == 2].iloc[0]
    diff = wide[other["policy"]] - wide[best["policy"]]
    se = diff.std(ddof=1) / np.sqrt(len(diff))
    assert other["difference_se"] == pytest.approx(se, rel=1e-12)
    assert bool(other["near_best"]) == bool(abs(diff.mean()) <= 2 * se)


def test_pareto_front_by_brute_force():
    """pareto_mask agrees with a direct pairwise dominance check on random points (seeded)."""
    rng = np.random.default_rng(3)
    x, y = rng.random(40), rng.random(40)
    x[5] = np.nan
    expected = []
    for i in range(40):
        dom = any(x[j] <= x[i] and y[j] <= y[i] and (x[j] < x[i] or y[j] < y[i])
                  for j in range(40) if np.isfinite(x[j]))
        expected.append(np.isfinite(x[i]) and not dom)
    np.testing.assert_array_equal(pareto_mask(x, y), expected)


def test_weight_moves_the_pick(one_worker):
    """Weight 1 picks the least regret, weight 0 the best Brier score."""
    f = one_worker.frontier[["policy", "group", "regret", "brier", "label_share"]]
    assert tradeoff_table(f, weight=1.0).loc[lambda t: t["chosen"], "policy"].item() == \
        f.loc[f["regret"].idxmin(), "policy"]
    assert tradeoff_table(f, weight=0.0).loc[lambda t: t["chosen"], "policy"].item() == \
        f.loc[f["brier"].idxmin(), "policy"]


def test_scores_are_sane(one_worker):
    """Control has the largest regret; classification scores lie in their ranges; gain of control is 0."""
    s = one_worker.summary.set_index("policy")
    assert s["regret"].idxmax() == "control"
    assert s.loc["control", "gain"] == 0.0
    assert ((s["brier"] >= 0) & (s["brier"] <= 2)).all()
    assert ((s["label_share"] >= 0) & (s["label_share"] <= 1)).all()
    curves = one_worker.curves
    last = curves[curves["decision"] == 10].set_index("policy")["cumulative_regret"]
    # the curve's end equals the replicate regret averaged (regret counts every decision)
    for name in s.index:
        assert last[name] == pytest.approx(s.loc[name, "regret"], rel=1e-9)


def test_fast_classification_fit_follows_the_design_population_model(monkeypatch):
    """The comparison's classification fit (fit="fast") uses the design's population model: with
    population = "mixture" it is the mixture sampler (poolbandit.models.mixture), whose posterior
    carries the mixture weights; with the default normal population, the normal model's sampler."""
    from poolbandit.compare import scoring
    from poolbandit.models import mixture
    from poolbandit.simulation import simulate

    text = (Path(__file__).with_name("small.toml").read_text(encoding="utf-8")
            + '\n[priors]\npopulation = "mixture"\ncomponents = 3\n')
    calls = []
    real = mixture.sample_mixture

    def spy(*args, **kwargs):
        idata = real(*args, **kwargs)
        calls.append(idata)
        return idata

    monkeypatch.setattr(mixture, "sample_mixture", spy)
    for design, expect in ((parse_design(text), 1), (load_design(Path(__file__).with_name("small.toml")), 1)):
        result = simulate(design, "control", 3)
        effect = scoring._fast_fit_effects(result, 20, np.random.default_rng(4))
        assert effect.sizes["participant"] == design.population.size
        assert len(calls) == expect
    assert "weight" in calls[0].posterior
