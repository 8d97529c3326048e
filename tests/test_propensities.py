"""Logged propensities are exact: the frequency of each arm over many replays of one decision
equals the logged probability (check 9 of the guide: binomial test), for every stochastic
classic policy, with forced exploration and with clipping."""

import numpy as np
import pytest
from scipy import stats

from poolbandit import parse_design
from poolbandit.policies import Batch, make_policy
from poolbandit.policies._marginals import Beta, Normal, StudentT
from poolbandit.policies._probability import clip_probabilities, prob_best

DESIGN = """
[study]
arms = ["a", "b", "c"]
horizon = 20
[context]
features = ["x"]
[policies.random]
kind = "random"
[policies.eg]
kind = "epsilon-greedy"
epsilon = 0.3
[policies.ed]
kind = "epsilon-decreasing"
c = 2.0
[policies.ts]
kind = "thompson"
model = "normal"
[policies.tsclip]
kind = "thompson"
model = "normal-inverse-gamma"
clip = [0.1, 0.8]
[policies.reg]
kind = "regression-epsilon-greedy"
epsilon = 0.2
[policies.regall]
kind = "regression-epsilon-decreasing"
c = 1.5
pool = "all"
[policies.forced]
kind = "ucb1"
explore_first = 6
"""

REPLAYS = 6000


@pytest.mark.parametrize("name", ["random", "eg", "ed", "ts", "tsclip", "reg", "regall", "forced"])
def test_replayed_frequencies_match_logged_propensity(name):
    """Replay one participant's decision 6,000 times with the same state; per arm, the count is
    Binomial(6000, p) under exactness: two-sided binomial test (scipy.stats.binomtest) at
    level 0.001 per arm (24 tests in all, so a false alarm has probability about 0.024)."""
    design = parse_design(DESIGN)
    rng = np.random.default_rng(42)
    pol = make_policy(design.policy(name), design)
    pol.start(np.zeros((1, 0)))
    arms = np.array([0, 1, 2, 0, 1, 0])
    pol.observe(np.zeros(6, int), arms, rng.normal(size=(6, 1)), np.array([0.2, 1.0, -0.5, 0.4, 0.7, 0.1]))
    if name == "forced":  # the participant has seen arm 1 in this block: arms 0 and 2 remain
        pol.note_assigned(np.array([0]), np.array([1]), np.array([4]))
        decision = 5
    else:
        decision = 7
    batch = Batch(np.zeros(REPLAYS, int), np.full(REPLAYS, decision), np.full((REPLAYS, 1), 0.3))
    p = pol.probabilities(batch, rng)
    assert np.allclose(p, p[0])  # the same state gives the same table
    from poolbandit.policies._probability import draw_arms
    arm, prop = draw_arms(p, rng)
    assert np.array_equal(prop, p[np.arange(REPLAYS), arm])
    counts = np.bincount(arm, minlength=3)
    for k in range(3):
        if p[0, k] in (0.0, 1.0):
            assert counts[k] == REPLAYS * p[0, k]
        else:
            assert stats.binomtest(int(counts[k]), REPLAYS, p[0, k]).pvalue > 0.001, (k, counts, p[0])
    if name == "tsclip":
        assert p.min() >= 0.1 - 1e-12 and p.max() <= 0.8 + 1e-12
    if name == "forced":
        assert p[0, 1] == 0 and p[0, 0] == pytest.approx(0.5)


def test_thompson_assign_logs_table_entry():
    """Policy.assign returns, for every row, the table entry of the arm it drew."""
    design = parse_design(DESIGN)
    pol = make_policy(design.policy("ts"), design)
    pol.start(np.zeros((50, 0)))
    rng = np.random.default_rng(3)
    pol.observe(rng.integers(0, 50, 200), rng.integers(0, 3, 200), np.zeros((200, 1)), rng.normal(size=200))
    a = pol.assign(Batch(np.arange(50), np.full(50, 9), np.zeros((50, 1))), rng)
    assert np.array_equal(a.propensity, a.probabilities[np.arange(50), a.arm])
    assert np.allclose(a.probabilities.sum(axis=1), 1)


def test_prob_best_matches_monte_carlo():
    """prob_best (quadrature) against 400,000 scipy.stats draws per arm: agreement within
    4.5 Monte Carlo standard errors (sd of a frequency <= 0.5 / sqrt(400,000) = 0.0008)."""
    rng = np.random.default_rng(0)
    m = rng.normal(0, 1, (6, 3))
    s = rng.uniform(0.05, 1.5, (6, 3))
    p = prob_best(Normal(m, s))
    x = stats.norm(m[..., None], s[..., None]).rvs(size=(6, 3, 400_000), random_state=rng)
    ref = np.stack([(x.argmax(axis=1) == k).mean(axis=-1) for k in range(3)], axis=1)
    assert np.abs(p - ref).max() < 4.5 * 0.0008


@pytest.mark.parametrize("ours, ref", [
    (Normal([0.3, -1.0], [0.5, 2.0]), stats.norm([0.3, -1.0], [0.5, 2.0])),
    (Beta([2.0, 30.0], [5.0, 1.5]), stats.beta([2.0, 30.0], [5.0, 1.5])),
    (StudentT([3.0, 12.0], [0.1, 1.0], [0.7, 0.2]), stats.t([3.0, 12.0], [0.1, 1.0], [0.7, 0.2])),
])
def test_marginals_equal_scipy_stats(ours, ref):
    """The light marginals equal scipy.stats (the reference library) to 1e-10."""
    q = np.array([[1e-6], [0.2], [0.5], [0.97]])
    assert np.allclose(ours.ppf(q), ref.ppf(q), rtol=1e-10, atol=1e-12)
    x = ref.ppf(q)
    assert np.allclose(ours.cdf(x), ref.cdf(x), rtol=1e-10, atol=1e-12)
    assert np.allclose(ours.mean(), ref.mean()) and np.allclose(ours.std(), ref.std())


def test_clipping_stays_in_band_and_sums_to_one():
    """clip_probabilities keeps every entry in the band, rows summing to 1, order preserved."""
    rng = np.random.default_rng(1)
    p = rng.dirichlet(np.full(4, 0.3), size=500)
    q = clip_probabilities(p, 0.05, 0.7)
    assert q.min() >= 0.05 - 1e-12 and q.max() <= 0.7 + 1e-12
    assert np.allclose(q.sum(axis=1), 1, atol=1e-12)
    assert (np.argsort(p, axis=1, kind="stable")[:, -1] == np.argsort(q, axis=1, kind="stable")[:, -1]).mean() > 0.99
