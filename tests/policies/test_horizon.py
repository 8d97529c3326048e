"""Horizon-aware index rules and the two-arm Bayes-optimal policy against outside references.

Sources: the knowledge-gradient formula of Ryzhov, Powell and Frazier (2012), "The knowledge
gradient algorithm for a general class of online learning problems", Operations Research
60(1) (checked against scipy numerical integration, the reference library); the Bayes-UCB
quantile schedule of Kaufmann, Cappe and Garivier (2012), AISTATS (checked against
scipy.stats / scipy.optimize); conjugate normal posteriors (BDA3 section 2.5, scipy.stats);
the propensity check 9 of the guide (binomial test, scipy.stats.binomtest); Bellman's
backward induction for the two-arm finite-horizon problem (Bellman 1956, Sankhya 16),
checked against scipy quadrature for T <= 2 and by Monte Carlo simulation of the computed
policy. Scenario targets are the lead's (smaller seeded versions of
benchmarks/horizon_policies.py).
"""

import functools

import numpy as np
import pytest
from scipy import integrate, optimize, stats

from poolbandit import parse_design
from poolbandit.errors import DesignError
from poolbandit.policies import Batch, make_policy
from poolbandit.policies._probability import draw_arms
from poolbandit.policies.bayes_optimal import solve_two_arm
from poolbandit.policies.horizon import (
    bayes_ucb_level,
    kg_factor,
    kg_index,
    knowledge_gradient,
    mixture_quantile,
)
from poolbandit.simulation import draw_population, draw_streams, run_policy
from poolbandit.simulation.scenarios import pooling_scenario, reference_study

#: The reference study's population (arm means (0, 0.3, -0.2), heterogeneity 0.5, noise sd 1;
#: poolbandit.simulation.scenarios.reference_study) with arms a, b, c, 5 participants, horizon 12.
_THREE_POLICIES = {
    "greedy": 'kind = "pooled-greedy"',
    "ucb": 'kind = "pooled-bayes-ucb"',
    "tempered": 'kind = "pooled-tempered-thompson"\nkappa = 0.5',
    "kg": 'kind = "pooled-knowledge-gradient"\nlookahead = 5',
    "ts": 'kind = "pooled-thompson"',
    "o-greedy": 'kind = "oracle-prior-greedy"',
    "o-ucb": 'kind = "oracle-prior-bayes-ucb"',
    "o-ucb-fixed": 'kind = "oracle-prior-bayes-ucb"\nquantile = 0.9\np_min = 0.0',
    "o-tempered1": 'kind = "oracle-prior-tempered-thompson"\nkappa = 1.0\np_min = 0.0',
    "o-ts": 'kind = "oracle-prior-thompson"',
    "o-kg": 'kind = "oracle-prior-knowledge-gradient"',
    "clipped": 'kind = "oracle-prior-greedy"\np_min = 0.02\nclip = [0.1, 0.8]',
}


def _three_design(arm_means=(0.0, 0.3, -0.2)):
    return reference_study(size=5, horizon=12, arms=("a", "b", "c"), arm_means=arm_means, policies=_THREE_POLICIES)


THREE = _three_design().source_text

HISTORY = (np.array([0, 0, 0, 1, 1, 2]), np.array([0, 1, 2, 1, 1, 0]), np.array([0.4, 1.1, -0.3, 0.2, 0.9, -0.5]))


def _started(name, n=3, text=THREE):
    design = parse_design(text)
    pol = make_policy(design.policy(name), design, truth=object())
    pol.start(np.zeros((n, 0)))
    part, arm, reward = HISTORY
    pol.observe(part, arm, np.zeros((len(part), 0)), reward)
    return design, pol


def _batch(participant, decision):
    participant = np.asarray(participant)
    return Batch(participant, np.full(len(participant), decision), np.zeros((len(participant), 0)))


# -- closed forms ---------------------------------------------------------------
def test_kg_factor_is_expected_positive_part():
    """f(z) = z Phi(z) + phi(z) = E[max(z + Z, 0)] (scipy.integrate.quad over the normal density)."""
    for z in (-3.0, -0.7, 0.0, 1.3):
        ref = integrate.quad(lambda x: max(z + x, 0.0) * stats.norm.pdf(x), -12, 12, points=[-z])[0]
        assert kg_factor(z) == pytest.approx(ref, abs=1e-9)


@pytest.mark.parametrize("pulls", [1, 4])
def test_knowledge_gradient_equals_expected_gain_of_the_best_mean(pulls):
    """nu_k = E[max_j mu'_j] - max_j mu_j after `pulls` observations of arm k (Ryzhov, Powell and
    Frazier 2012, section 3; Frazier and Powell 2010 for several pulls). Reference: the predictive
    change of arm k's posterior mean is N(0, v^2 / (v + s^2/m)) (conjugate normal, BDA3 2.5);
    the expectation by scipy.integrate.quad to 1e-8."""
    mean = np.array([0.1, 0.35, -0.4])
    var = np.array([0.2, 0.05, 0.6])
    noise = 1.3
    nu = knowledge_gradient(mean[None], var[None], noise, pulls=pulls)[0]
    for k in range(3):
        sd = np.sqrt(var[k] ** 2 / (var[k] + noise / pulls))
        other = np.max(np.delete(mean, k))

        def gain(x, k=k, sd=sd, other=other):
            return max(mean[k] + sd * x, other) * stats.norm.pdf(x)

        ref = integrate.quad(gain, -12, 12, points=[(other - mean[k]) / sd])[0] - mean.max()
        assert nu[k] == pytest.approx(ref, abs=1e-8)


def test_kg_index_online_form_and_lookahead():
    """Online KG index mu_x + R nu_x (Ryzhov et al. 2012, finite horizon) with R = T - t; with
    lookahead the index is max over m of m mu_x + (1 - m) mu* + (R + 1 - m) nu_x(m) and never
    below the one-pull index; with R = 0 it is the posterior mean (nothing left to learn for)."""
    mean = np.array([[0.1, 0.35, -0.4]])
    var = np.array([[0.2, 0.05, 0.6]])
    remaining = np.array([7])
    one = kg_index(mean, var, 1.0, remaining)
    assert np.allclose(one, mean + 7 * knowledge_gradient(mean, var, 1.0))
    look = kg_index(mean, var, 1.0, remaining, lookahead=8)
    cands = [m * mean + (1 - m) * mean.max() + (8 - m) * knowledge_gradient(mean, var, 1.0, pulls=m)
             for m in range(1, 9)]
    assert np.allclose(look, np.max(cands, axis=0))
    assert np.all(look >= one - 1e-15)
    assert np.allclose(kg_index(mean, var, 1.0, np.array([0]), lookahead=5), mean)


def test_mixture_quantile_matches_scipy():
    """One component: scipy.stats.norm.ppf; a mixture: the root of its cdf by scipy.optimize.brentq
    (to 1e-9, far inside the bisection's precision of about range / 2^60)."""
    rng = np.random.default_rng(0)
    mean = rng.normal(size=(1, 4, 3))
    sd = rng.uniform(0.1, 1.0, size=(1, 4, 3))
    level = np.array([0.05, 0.5, 0.9, 0.999])
    got = mixture_quantile(level, np.ones((1, 4)), mean, sd)
    assert np.allclose(got, stats.norm.ppf(level[:, None], mean[0], sd[0]), atol=1e-9)
    mean = rng.normal(size=(3, 4, 3))
    sd = rng.uniform(0.1, 1.0, size=(3, 4, 3))
    w = rng.dirichlet(np.ones(3), size=4).T  # (S, n)
    got = mixture_quantile(level, w, mean, sd)
    for i in range(4):
        for k in range(3):
            def cdf(x, i=i, k=k):
                return np.sum(w[:, i] * stats.norm.cdf(x, mean[:, i, k], sd[:, i, k])) - level[i]
            assert got[i, k] == pytest.approx(optimize.brentq(cdf, -20, 20, xtol=1e-12), abs=1e-9)
    assert np.all(np.isneginf(mixture_quantile(np.zeros(4), w, mean, sd)))


def test_bayes_ucb_schedule():
    """Kaufmann, Cappe and Garivier (2012): level 1 - 1/(t (log T)^c); c = 0 gives 1 - 1/t."""
    assert np.allclose(bayes_ucb_level(np.array([1, 2, 10]), 21), [0.0, 0.5, 0.9])
    assert bayes_ucb_level(np.array([4]), 21, c=2)[0] == pytest.approx(1 - 1 / (4 * np.log(21) ** 2))


# -- the oracle-prior rules on a hand-worked history ----------------------------------------
def _conjugate(n, total, prior_mean, prior_sd=0.5, noise=1.0):
    """Normal-normal posterior (BDA3 section 2.5), computed here independently."""
    prec = 1 / prior_sd**2 + n / noise**2
    return (prior_mean / prior_sd**2 + total / noise**2) / prec, np.sqrt(1 / prec)


def test_oracle_prior_indices_equal_conjugate_closed_forms():
    """Participant 0 saw a: 0.4, b: 1.1, c: -0.3 under the prior N((0, 0.3, -0.2), 0.5^2), noise 1:
    greedy index = posterior mean; Bayes-UCB index at decision 4 = scipy.stats.norm.ppf(1 - 1/4)
    of the posterior; fixed quantile 0.9 likewise; KG = mean + (T - t) nu (scipy-free formula
    checked above)."""
    mean, sd = _conjugate(np.ones(3), np.array([0.4, 1.1, -0.3]), np.array([0.0, 0.3, -0.2]))
    b = _batch([0], 4)
    _, g = _started("o-greedy")
    assert np.allclose(g.index(b), mean, atol=1e-12)
    _, u = _started("o-ucb")
    assert np.allclose(u.index(b), stats.norm.ppf(0.75, mean, sd), atol=1e-9)
    _, u9 = _started("o-ucb-fixed")
    assert np.allclose(u9.index(b), stats.norm.ppf(0.9, mean, sd), atol=1e-9)
    _, kg = _started("o-kg")
    assert np.allclose(kg.index(b), mean + 8 * knowledge_gradient(mean[None], sd[None] ** 2, 1.0)[0], atol=1e-12)
    winner = np.argmax(mean)
    p = g.probabilities(b, np.random.default_rng(0))[0]
    assert p[winner] == pytest.approx(1 - 2 * 0.02) and np.allclose(np.delete(p, winner), 0.02)


def test_tempered_thompson_with_kappa_one_is_thompson():
    """kappa = 1 is Thompson sampling: the same table as oracle-prior-thompson (exact quadrature)."""
    _, t1 = _started("o-tempered1")
    _, ts = _started("o-ts")
    b = _batch([0, 1, 2], 5)
    rng = np.random.default_rng(1)
    assert np.allclose(t1.probabilities(b, rng), ts.probabilities(b, rng), atol=1e-12)


def test_pooled_rules_share_the_pooled_thompson_posterior():
    """With the same seed the pooled rules see the same Gibbs draws as pooled-thompson: the greedy
    index equals pooled-thompson's exploit index (posterior mean averaged over population draws),
    and tempered Thompson puts more mass on the greedy winner than Thompson does (common practice:
    tempering concentrates the posterior)."""
    b = _batch([0, 1, 2], 5)
    _, ts = _started("ts")
    _, gr = _started("greedy")
    _, te = _started("tempered")
    p_ts = ts.probabilities(b, np.random.default_rng(7))
    idx = gr.index(b, np.random.default_rng(7))
    assert np.allclose(idx, ts._exploit_index(b.participant, b.context), atol=1e-12)
    raw = te.index(b, np.random.default_rng(7))
    win = np.argmax(idx, axis=1)
    assert np.all(raw[np.arange(3), win] > p_ts[np.arange(3), win])


# -- propensities -----------------------------------------------------------------------
REPLAYS = 6000


@pytest.mark.parametrize("name", ["greedy", "ucb", "tempered", "kg", "clipped"])
def test_logged_propensities_are_exact(name):
    """Check 9 of the guide: replay one decision 6,000 times from the same state; each arm's count
    is Binomial(6000, p) (scipy.stats.binomtest, level 0.001 per arm: 15 tests, false alarm
    probability about 0.015). Every arm keeps at least p_min = 0.02 (and the clip floor when a
    clip band is set, which is applied after the floor)."""
    _, pol = _started(name)
    rng = np.random.default_rng(11)
    b = _batch(np.zeros(REPLAYS, int), 4)
    p = pol.probabilities(b, rng)
    assert np.allclose(p, p[0]) and np.allclose(p.sum(axis=1), 1)
    low = 0.1 if name == "clipped" else 0.02
    assert p.min() >= low - 1e-12
    if name == "clipped":
        assert p.max() <= 0.8 + 1e-12
    arm, prop = draw_arms(p, rng)
    assert np.array_equal(prop, p[np.arange(REPLAYS), arm])
    counts = np.bincount(arm, minlength=3)
    for k in range(3):
        assert stats.binomtest(int(counts[k]), REPLAYS, p[0, k]).pvalue > 0.001, (k, counts, p[0])


def test_ties_split_evenly_above_the_floor():
    """Before any data every participant's arms tie under Bayes-UCB at t = 1 (level 0): the table
    is uniform; a tie between two of three greedy arms splits (1 - 3 p_min) evenly."""
    design = parse_design(THREE)
    pol = make_policy(design.policy("o-ucb"), design, truth=object())
    pol.start(np.zeros((2, 0)))
    assert np.allclose(pol.probabilities(_batch([0, 1], 1), np.random.default_rng(0)), 1 / 3)
    tie = _three_design(arm_means=(0.3, 0.3, -0.2))
    pol = make_policy(tie.policy("o-greedy"), tie, truth=object())
    pol.start(np.zeros((1, 0)))
    p = pol.probabilities(_batch([0], 1), np.random.default_rng(0))[0]
    assert np.allclose(p, [0.02 + 0.47, 0.02 + 0.47, 0.02])


@pytest.mark.parametrize("name", ["greedy", "ucb", "tempered", "kg", "ts"])
def test_pooled_rules_are_uniform_before_any_data(name):
    """Before any reward the pooled posterior is the prior, the same for every arm (one beta_sd,
    one tau_scale: the arms are exchangeable a priori, so by symmetry every index ties): every
    participant gets the uniform table, not a ranking of the arms by the Monte Carlo chance of a
    few prior draws of the heterogeneity scales (which sent a whole first cohort to one arm)."""
    design = parse_design(THREE)
    pol = make_policy(design.policy(name), design, truth=object())
    pol.start(np.zeros((5, 0)))
    for seed in range(3):
        p = pol.probabilities(_batch(np.arange(5), 1), np.random.default_rng(seed))
        assert np.allclose(p, 1 / 3, atol=1e-12), p


def test_bad_floor_and_bad_bayes_optimal_design_raise_design_errors():
    """p_min above 1/K and bayes-optimal with three arms are refused with the key path named."""
    bad = THREE + '[policies.wide]\nkind = "pooled-greedy"\np_min = 0.4\n'
    design = parse_design(bad)
    with pytest.raises(DesignError, match=r"policies\.wide\.p_min: expected at most 1/K = 0\.3333"):
        make_policy(design.policy("wide"), design)
    bo = THREE + '[policies.limit]\nkind = "bayes-optimal"\n'
    design = parse_design(bo)
    with pytest.raises(DesignError, match=r"policies\.limit\.kind: .*exactly 2 arms; the design has 3"):
        make_policy(design.policy("limit"), design, truth=object())


# -- Bayes-optimal ----------------------------------------------------------------------
def _two_arm_value_t2(mu, sd, noise):
    """T = 2 by direct integration (scipy.integrate.quad): pull k first, then the larger posterior mean."""
    best = -np.inf
    for k in (0, 1):
        v = sd[k] ** 2
        s = v / np.sqrt(v + noise**2)
        other = mu[1 - k]
        second = integrate.quad(lambda x: max(mu[k] + s * x, other) * stats.norm.pdf(x), -12, 12)[0]
        best = max(best, mu[k] + second)
    return best


def test_bayes_optimal_small_horizons_match_direct_integration():
    """T = 1: regret E[max] - max(mu) (closed form of the maximum of two normals); T = 2: the value
    of the best first pull by scipy quadrature. Tolerance 1e-4: the grid (2001 points) and the
    sampled normal kernel are second-order accurate; the grid-halving test below bounds them."""
    mu, sd, noise = (0.0, 0.3), (0.5, 0.4), 1.0
    s = np.hypot(*sd)
    delta = mu[0] - mu[1]
    e_max = mu[1] + delta * stats.norm.cdf(delta / s) + s * stats.norm.pdf(delta / s)
    assert solve_two_arm(1, mu, sd, noise).regret(mu) == pytest.approx(e_max - max(mu), abs=1e-9)
    assert solve_two_arm(2, mu, sd, noise).value(mu) == pytest.approx(_two_arm_value_t2(mu, sd, noise), abs=1e-4)


def test_bayes_optimal_grid_convergence():
    """Halving the grid step moves the 21-step Bayes regret by less than 1e-3 (0.05% of it)."""
    a = solve_two_arm(21, (0.0, 0.3), (0.5, 0.5), 1.0, grid=1001).regret((0.0, 0.3))
    b = solve_two_arm(21, (0.0, 0.3), (0.5, 0.5), 1.0).regret((0.0, 0.3))
    assert abs(a - b) < 1e-3


#: Scenario A2 (two arms, means (0, 0.3), heterogeneity 0.5, horizon 21) of
#: poolbandit.simulation.scenarios.pooling_scenario with these policies.
TWO_ARM_POLICIES = {
    "limit": {"kind": "bayes-optimal"},
    "kg-lookahead": {"kind": "oracle-prior-knowledge-gradient", "lookahead": 40},
    "pooled-greedy": {"kind": "pooled-greedy"},
}


def test_bayes_optimal_value_agrees_with_simulation_of_the_policy():
    """Monte Carlo check of the backward induction: the computed policy run by the simulator on
    40,000 participants drawn from the prior (adherence 1, no dropout; feedback delayed by one
    step is immediate for a participant deciding once a day). Mean regret agrees with the Bayes
    regret within 4 standard errors (se from the participants' regrets, about 0.015, 0.8% of
    it; the benchmark repeats the check on 400,000 participants)."""
    from poolbandit.simulation import participant_metrics

    design = pooling_scenario("A2", size=40_000, policies=TWO_ARM_POLICIES)
    pop = draw_population(design, 5)
    res = run_policy(design, design.policy("limit"), pop, draw_streams(design, pop.size, 6), 7)
    r = participant_metrics(res)["regret"].to_numpy()
    se = r.std(ddof=1) / np.sqrt(len(r))
    expected = res.policy.solution.regret((0.0, 0.3))
    assert abs(r.mean() - expected) < 4 * se, (r.mean(), expected, se)


# -- scenario targets (smaller seeded versions of benchmarks/horizon_policies.py) ----------------
def _bench():
    import sys
    from pathlib import Path

    path = str(Path(__file__).resolve().parents[2] / "benchmarks")
    if path not in sys.path:
        sys.path.insert(0, path)
    import horizon_policies

    return horizon_policies


#: The scenario tests reproduce the benchmark's own numbers: its replicates and seeds, and its
#: policies' streams, which are keyed by policy name so that a subset of the policies gives the
#: same regrets as the full run. With the benchmark's 96 replicates a ratio of paired means has
#: a standard error of about 0.01 to 0.02 (printed by the benchmark). Two worker processes (the
#: CI machine's two cores); the regrets do not depend on the number of workers.


@functools.lru_cache(maxsize=None)
def _scenario_regrets(key):
    """Regret per replicate of the classic policies and the rules without floor (A: and pooled Thompson)."""
    hp = _bench()
    table = {**hp.CLASSIC, **hp.FLOORLESS}
    if key == "A":
        table["pooled-thompson"] = hp.POOLED["pooled-thompson"]
    if key == "A2":
        table["bayes-optimal"] = 'kind = "bayes-optimal"'
        table["oracle-prior-kg-lookahead-p0"] = hp.ORACLE["oracle-prior-kg-lookahead-p0"]
    res = hp.collect(key, hp.REPLICATES, hp.scenario_seed(key), 2, policies=table)
    return {n: v["regret"] for n, v in res.items()}


def _best(reg, names):
    return min(names, key=lambda n: reg[n].mean())


def _ratio(reg, num, den):
    return reg[num].mean() / reg[den].mean()


#: The horizon-aware family the scenario tests choose from: the benchmark's rules without floor
#: (p_min = 0), compared like for like with the classic policies, which have no floor either; the
#: benchmark prints the same ratios with the default floor p_min = 0.02 and the floor's cost.
def _scenario_ratio(key, *, reference=None):
    reg = _scenario_regrets(key)
    best = _best(reg, list(_bench().FLOORLESS))
    ref = reference or _best(reg, list(_bench().CLASSIC))
    return _ratio(reg, best, ref), best, ref


def test_scenario_a_beats_pooled_thompson():
    """Scenario A (N 60, K 3, T 21, heterogeneity 0.5): the best horizon-aware pooled rule has at
    most 0.80 x the regret of pooled Thompson sampling (the benchmark's numbers: 0.687, se 0.009,
    knowledge gradient with lookahead)."""
    r, best, ref = _scenario_ratio("A", reference="pooled-thompson")
    assert r <= 0.80, (r, best, ref)


def test_scenario_a_beats_tuned_classic():
    """Scenario A: best horizon-aware pooled rule <= 0.85 x the best tuned classic policy (greedy,
    epsilon-greedy 0.05/0.1, UCB1 c in {0.1, 0.25, 0.5, 1}, tuned on the same replicates).
    Benchmark: 0.802 (se 0.014), knowledge gradient with lookahead."""
    r, best, ref = _scenario_ratio("A")
    assert r <= 0.85, (r, best, ref)


def test_scenario_d_low_heterogeneity():
    """Scenario D (heterogeneity 0.15): best horizon-aware pooled rule <= 0.30 x the best tuned
    classic (benchmark: 0.201, se 0.013, pooled greedy with one forced first decision)."""
    r, best, ref = _scenario_ratio("D")
    assert r <= 0.30, (r, best, ref)


def test_scenario_e_high_heterogeneity():
    """Scenario E (heterogeneity 1.0): best horizon-aware pooled rule never more than 1.05 x the
    best tuned classic (benchmark: 0.978, se 0.017, knowledge gradient with lookahead)."""
    r, best, ref = _scenario_ratio("E")
    assert r <= 1.05, (r, best, ref)


def test_scenario_f_four_equal_arms():
    """Scenario F (N 80, K 4, T 28, equal arm means, heterogeneity 0.4): best horizon-aware pooled
    rule never more than 1.05 x the best tuned classic (benchmark: 1.040, se 0.012, knowledge
    gradient with lookahead against UCB1 with c = 0.25; little room: 1.106 with the floor)."""
    r, best, ref = _scenario_ratio("F")
    assert r <= 1.05, (r, best, ref)


def test_two_arm_limit():
    """Two-arm A (means 0, 0.3, heterogeneity 0.5, T 21): against the Bayes-optimal policy (which has
    no floor, so the rules are compared without one too: p_min = 0), the oracle-prior lookahead
    rule is within 1.03 x and the best pooled rule within 1.25 x (benchmark: 0.991 (se 0.006) and
    1.138 (se 0.020); with the default floor 1.078 and 1.240, printed there)."""
    reg = _scenario_regrets("A2")
    assert _ratio(reg, "oracle-prior-kg-lookahead-p0", "bayes-optimal") <= 1.03
    assert _ratio(reg, _best(reg, list(_bench().FLOORLESS)), "bayes-optimal") <= 1.25
