"""The fast engine (partially collapsed Gibbs sampler) against outside references."""

from __future__ import annotations

import copy

import arviz as az
import numpy as np
import pytest
import xarray as xr
from scipy import stats

from poolbandit.models import GibbsSampler, ModelData, sample_fast
from poolbandit.models._polyagamma import draw_pg, pg_mean, pg_var
from poolbandit.simulation import simulate
from poolbandit.simulation.scenarios import reference_study
from poolbandit.spec import PriorSpec

from _reference import SCHOOLS_SD, SCHOOLS_Y


@pytest.fixture(scope="module")
def study():
    """A simulated 60 x 21 x 3 study under a random policy (seeded)."""
    design = reference_study()
    return design, simulate(design, "control", rng=20260101).log


def _mcse(draws: np.ndarray, method: str) -> float:
    """Monte Carlo standard error of draws shaped (chain, draw), by ArviZ."""
    ds = xr.Dataset({"x": (("chain", "draw"), np.asarray(draws))})
    return float(az.mcse(ds, method=method)["x"])


def _schools(random=True):
    return ModelData.from_arrays(SCHOOLS_Y, np.ones(8), np.arange(8), obs_sd=SCHOOLS_SD,
                                 random=None if random else [False])


# ---------------------------------------------------------------------------
# Eight schools
# ---------------------------------------------------------------------------
def test_eight_schools_matches_arviz_reference_posterior():
    """Eight schools (Rubin 1981; Gelman et al., BDA3 section 5.5) against ArviZ's
    bundled ``non_centered_eight`` posterior (priors mu ~ N(0, 5), tau ~ HalfCauchy(5)).

    For mu (= beta), tau and each theta, the posterior mean and sd of the two
    samplers differ by less than 4 combined Monte Carlo standard errors
    (``arviz.mcse`` on both sides; the spread compared through the second moment). 4 is chosen because
    40 comparisons are made: under exact agreement a |z| > 4 anywhere has
    probability below 0.3 percent.
    """
    ref = az.load_arviz_data("non_centered_eight").posterior
    pri = PriorSpec(beta_sd=5.0, tau_scale=5.0, tau_family="half-cauchy")
    post = sample_fast(_schools(), pri, chains=4, draws=1500, tune=200, rng=8).posterior
    pairs = [(post["beta"].sel(coef="x0"), ref["mu"]), (post["tau"].sel(coef="x0"), ref["tau"])]
    schools = ref["theta"]["school"].to_numpy()
    pairs += [(post["theta"].isel(participant=j).sel(coef="x0"), ref["theta"].sel(school=s))
              for j, s in enumerate(schools)]
    for ours, theirs in pairs:
        x, r = ours.to_numpy(), theirs.to_numpy()
        centre = r.mean()
        # mean, and second moment about a common centre (spread); ArviZ's "sd" MCSE
        # method fails with numba installed, so the spread goes through the "mean" MCSE
        for f in (lambda v: v, lambda v: (v - centre) ** 2):
            a, b = f(x), f(r)
            se = np.hypot(_mcse(a, "mean"), _mcse(b, "mean"))
            assert abs(a.mean() - b.mean()) < 4 * se, (ours.name, a.mean(), b.mean(), se)


def test_eight_schools_complete_pooling_closed_form():
    """Complete pooling of the eight schools: 7.7 with standard error 4.1 (BDA3 section
    5.5, from memory), recomputed here as the precision-weighted mean. With ``tau = 0``
    (no coefficient varies) the fast engine's posterior of beta under a N(0, 1000^2)
    prior is the conjugate normal (any Bayesian text), whose mean and sd we compute
    in closed form; the draws agree within 4 Monte Carlo standard errors.
    """
    w = 1.0 / SCHOOLS_SD**2
    pooled, se = np.sum(w * SCHOOLS_Y) / np.sum(w), np.sqrt(1.0 / np.sum(w))
    assert round(pooled, 1) == 7.7 and round(se, 1) == 4.1  # the published values, to their rounding
    prec = np.sum(w) + 1e-6
    mean, sd = np.sum(w * SCHOOLS_Y) / prec, np.sqrt(1.0 / prec)
    post = sample_fast(_schools(random=False), PriorSpec(beta_sd=1000.0), chains=2, draws=2000, tune=10, rng=3)
    beta = post.posterior["beta"].to_numpy()[..., 0]
    assert np.all(post.posterior["tau"].to_numpy() == 0.0)
    assert abs(beta.mean() - mean) < 4 * _mcse(beta, "mean")
    # spread through the second moment about the exact mean (see the eight-schools test)
    assert abs(np.mean((beta - mean) ** 2) - sd**2) < 4 * _mcse((beta - mean) ** 2, "mean")
    # theta of every school equals beta when nothing varies
    np.testing.assert_array_equal(post.posterior["theta"].to_numpy()[..., 0], beta[..., None].repeat(8, -1))


# ---------------------------------------------------------------------------
# Polya-Gamma variates
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("c", [0.0, 0.7, 2.5, 6.0])
def test_polya_gamma_moments(c):
    """Polson, Scott and Windle (2013): E[PG(1, c)] = tanh(c/2) / (2c) and
    Var[PG(1, c)] = (sinh c - c) sech^2(c/2) / (4 c^3). The closed forms are first
    checked against the defining series PG(1, c) = sum_k g_k / (2 pi^2 ((k - 1/2)^2 +
    c^2 / (4 pi^2))), g_k ~ Exp(1) (mean and variance term by term); then the variates
    the engine draws (``draw_pg``, 200,000 of them) match both moments within 4.5
    standard errors (sample sd / sqrt(n), and the standard error of a sample variance
    from the fourth central moment); 4.5 keeps 8 seeded comparisons far from chance.
    """
    k = np.arange(1, 200_001)
    d = (k - 0.5) ** 2 + c**2 / (4 * np.pi**2)
    assert pg_mean(1.0, c) == pytest.approx(np.sum(1 / d) / (2 * np.pi**2), rel=1e-5)
    assert pg_var(1.0, c) == pytest.approx(np.sum(1 / d**2) / (4 * np.pi**4), rel=1e-5)
    x = draw_pg(1.0, np.full(200_000, c), np.random.default_rng(11))
    n = len(x)
    assert abs(x.mean() - pg_mean(1.0, c)) < 4.5 * x.std() / np.sqrt(n)
    m4 = np.mean((x - x.mean()) ** 4)
    assert abs(x.var() - pg_var(1.0, c)) < 4.5 * np.sqrt((m4 - x.var() ** 2) / n)


# ---------------------------------------------------------------------------
# Mixing at every stage of a study
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("decision", [1, 3, 20])
def test_mixing_at_every_stage(study, decision):
    """Mixing from dispersed starts (R-hat: Vehtari, Gelman, Simpson, Carpenter and
    Buerkner 2021, rank-normalised split R-hat as computed by ``arviz.rhat``; ESS by
    ``arviz.ess``). On data frozen after decision 1, 3 and 20 of a simulated
    60 x 21 x 3 study, 4 chains of 600 kept sweeps give R-hat <= 1.01 (the threshold
    of that paper) for every heterogeneity scale tau and the noise sd, and at least
    one effective draw per 20 sweeps for the worst of them.
    """
    design, log = study
    data = ModelData.from_log(log[log.decision <= decision], design)
    idata = sample_fast(data, design.priors, chains=4, draws=600, tune=100, rng=decision, init="dispersed")
    rhat = az.rhat(idata, var_names=["tau", "sigma"])
    ess = az.ess(idata, var_names=["tau", "sigma"])
    assert float(rhat["tau"].max()) <= 1.01 and float(rhat["sigma"]) <= 1.01
    sweeps = 4 * 600
    assert float(ess["tau"].min()) / sweeps >= 1 / 20 and float(ess["sigma"]) / sweeps >= 1 / 20


# ---------------------------------------------------------------------------
# Warm start
# ---------------------------------------------------------------------------
def test_warm_start_agrees_with_cold_run(study):
    """Warm start: a chain at stationarity on days 1-3 of 40 participants, moved by
    ``set_data`` to days 1-4 of all 60 (20 new ids), gives after 5 sweeps draws with
    the same distribution as a cold run on the new data. Two-sample Kolmogorov-Smirnov
    tests (scipy) on tau, sigma, beta, an old and a new participant's theta, each at
    level 0.001 (7 tests on 300 warm forks vs 2000 cold draws). The check can fail:
    the same forks without ``set_data`` sweeps (stale draws) are rejected for the old
    participant whose data changed most.
    """
    design, log = study
    ids = list(dict.fromkeys(log["participant"]))
    early = log[(log.decision <= 3) & log.participant.isin(ids[:40])]
    d1 = ModelData.from_log(early, design, participants=ids[:40])
    d2 = ModelData.from_log(log[log.decision <= 4], design, participants=ids)
    priors = design.priors
    cold = sample_fast(d2, priors, chains=2, draws=1000, tune=100, thin=2, rng=5).posterior
    base = GibbsSampler(d1, priors, rng=6)
    base.sweep(100)
    warm, stale = [], []
    for _ in range(300):
        base.sweep(3)
        fork = copy.deepcopy(base)
        fork.set_data(d2)
        stale.append(fork.state.theta[:40].copy())
        fork.sweep(5)
        st = fork.state
        warm.append(np.concatenate([st.tau, st.beta, [st.sigma], st.theta[:, 0]]))
    warm = np.array(warm)
    P = d2.n_coef
    # old participant whose observations changed the most between d1 and d2
    changed = np.bincount(d2.group, minlength=60)[:40] - np.bincount(d1.group, minlength=40)
    old = int(np.argmax(changed))
    new = 50
    cold_cols = {
        "tau0": cold["tau"].to_numpy()[..., 0], "beta1": cold["beta"].to_numpy()[..., 1],
        "sigma": cold["sigma"].to_numpy(), "theta_old": cold["theta"].to_numpy()[..., old, 0],
        "theta_new": cold["theta"].to_numpy()[..., new, 0], "tau2": cold["tau"].to_numpy()[..., 2],
        "beta0": cold["beta"].to_numpy()[..., 0],
    }
    warm_cols = {"tau0": warm[:, 0], "beta1": warm[:, P + 1], "sigma": warm[:, 2 * P],
                 "theta_old": warm[:, 2 * P + 1 + old], "theta_new": warm[:, 2 * P + 1 + new],
                 "tau2": warm[:, 2], "beta0": warm[:, P]}
    for key, ref in cold_cols.items():
        p = stats.ks_2samp(warm_cols[key], ref.ravel()).pvalue
        assert p > 0.001, (key, p)
    # power check: a stale sampler (data replaced but no sweeps) is detectably wrong for
    # the participant with the most new data -- its theta for the arm it received
    arm = int(np.argmax(np.abs(d2.X[d2.group == old]).sum(0) - np.abs(d1.X[d1.group == old]).sum(0)))
    stale_theta = np.array(stale)[:, old, arm]
    assert stats.ks_2samp(stale_theta, cold["theta"].to_numpy()[..., old, arm].ravel()).pvalue < 0.001 or \
        changed[old] == 0


# ---------------------------------------------------------------------------
# Sufficient statistics and the conditional of theta
# ---------------------------------------------------------------------------
def test_likelihood_stats_and_theta_conditional(study):
    """``likelihood_stats`` equals X_i'X_i / sigma^2 and X_i'y_i / sigma^2 computed
    participant by participant with pandas (a reference loop), and
    ``theta_conditional`` equals the textbook Gaussian conditional
    N(Q^-1 (Sigma^-1 m + b), Q^-1), Q = Sigma^-1 + A (common practice), to 1e-8.
    """
    design, log = study
    data = ModelData.from_log(log[log.decision <= 3], design)
    s = GibbsSampler(data, design.priors, rng=1)
    s.sweep(3)
    A, b = s.likelihood_stats()
    st = s.state
    for i in (0, 17, 59):
        rows = data.group == i
        Xi, yi = data.X[rows], data.y[rows]
        np.testing.assert_allclose(A[i], Xi.T @ Xi / st.sigma**2, atol=1e-10)
        np.testing.assert_allclose(b[i], Xi.T @ yi / st.sigma**2, atol=1e-10)
    mean, factor = s.theta_conditional()
    for i in (0, 17, 59):
        Q = np.diag(st.tau**-2.0) + A[i]
        m = st.beta + st.gamma @ data.W[i]
        np.testing.assert_allclose(mean[i], np.linalg.solve(Q, np.diag(st.tau**-2.0) @ m + b[i]), atol=1e-8)
        np.testing.assert_allclose(factor[i] @ factor[i].T, np.linalg.inv(Q), atol=1e-8)


# ---------------------------------------------------------------------------
# Full covariance: LKJ prior on the correlation
# ---------------------------------------------------------------------------
def test_full_covariance_correlation_prior_is_lkj():
    """LKJ (Lewandowski, Kurowicka and Joe 2009): under R ~ LKJ(eta) in d dimensions
    every off-diagonal r_ij has marginal Beta(eta - 1 + d/2, eta - 1 + d/2) on (-1, 1).
    With no observations the engine's correlation draws (full covariance, d = 3,
    eta = 2) must have that marginal: KS test (scipy) at level 0.001 on 1,000
    consecutive sweeps (slice updates of prior-only targets are close to independent).
    """
    N, P = 5, 3
    data = ModelData(y=np.zeros(0), X=np.zeros((0, P)), group=np.zeros(0, dtype=np.int64), W=np.zeros((N, 0)),
                     participants=tuple("abcde"), coef=("a", "b", "c"))
    pri = PriorSpec(covariance="full", lkj_eta=2.0)
    s = GibbsSampler(data, pri, rng=4)
    s.sweep(20)
    r = []
    for _ in range(1000):
        s.sweep(1)
        r.append(s.state.corr[[1, 2, 2], [0, 0, 1]])
    r = np.array(r)
    a = 2.0 - 1 + 3 / 2
    for j in range(3):
        assert stats.kstest((r[:, j] + 1) / 2, stats.beta(a, a).cdf).pvalue > 0.001


# ---------------------------------------------------------------------------
# Reproducibility
# ---------------------------------------------------------------------------
def test_same_seed_same_draws_different_seed_different(study):
    """Reproducibility (common practice): the same ``rng`` gives identical draws,
    another seed gives different draws; gaussian and bernoulli."""
    design, log = study
    data = ModelData.from_log(log[log.decision <= 2], design)
    a = sample_fast(data, design.priors, chains=2, draws=20, tune=5, rng=42).posterior
    b = sample_fast(data, design.priors, chains=2, draws=20, tune=5, rng=42).posterior
    c = sample_fast(data, design.priors, chains=2, draws=20, tune=5, rng=43).posterior
    for v in ("beta", "tau", "sigma", "theta"):
        np.testing.assert_array_equal(a[v].to_numpy(), b[v].to_numpy())
        assert not np.array_equal(a[v].to_numpy(), c[v].to_numpy())
    # chains are independent streams
    assert not np.array_equal(a["theta"].to_numpy()[0], a["theta"].to_numpy()[1])
    yb = (data.y > np.median(data.y)).astype(float)
    bern = ModelData.from_arrays(yb, data.X, data.group, outcome="bernoulli")
    x = sample_fast(bern, PriorSpec(), chains=1, draws=10, tune=2, rng=7).posterior["theta"].to_numpy()
    y = sample_fast(bern, PriorSpec(), chains=1, draws=10, tune=2, rng=7).posterior["theta"].to_numpy()
    z = sample_fast(bern, PriorSpec(), chains=1, draws=10, tune=2, rng=8).posterior["theta"].to_numpy()
    np.testing.assert_array_equal(x, y)
    assert not np.array_equal(x, z)


def test_posterior_layout(study):
    """The posterior follows the engine contract of DEVELOPERS.md (variables, dims, coords)."""
    design, log = study
    data = ModelData.from_log(log[log.decision <= 2], design)
    idata = sample_fast(data, design.priors, chains=2, draws=5, tune=1, rng=1)
    post = idata.posterior
    assert set(post.data_vars) == {"beta", "tau", "sigma", "theta"}
    assert post["theta"].dims == ("chain", "draw", "participant", "coef")
    assert list(post["coef"].to_numpy()) == list(data.coef)
    assert list(post["participant"].to_numpy()) == list(data.participants)
    assert idata.observed_data["y"].shape == data.y.shape
    assert "n_evals" in idata.sample_stats


def test_bad_arguments():
    """Bad options raise ValueError naming the allowed values."""
    with pytest.raises(ValueError, match="init must be one of"):
        GibbsSampler(_schools(), PriorSpec(), init="wild")
    with pytest.raises(ValueError, match="bernoulli outcome must be 0 or 1"):
        GibbsSampler(ModelData.from_arrays([0.0, 2.0], np.ones(2), [0, 1], outcome="bernoulli"), PriorSpec())
    s = GibbsSampler(_schools(), PriorSpec(), rng=1)
    with pytest.raises(ValueError, match="must extend"):
        s.set_data(ModelData.from_arrays(SCHOOLS_Y, np.ones(8), np.arange(8), obs_sd=SCHOOLS_SD,
                                         participants=list("abcdefgh")))
