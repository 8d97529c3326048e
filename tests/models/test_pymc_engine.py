"""The full engine (PyMC NUTS) and the diagnostics table against outside references.

NUTS runs are few and small (2 chains, at most 1000 draws); every model
structure is compiled once per session (the engine caches model and step).
"""

from __future__ import annotations

import warnings

import arviz as az
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats

from poolbandit.errors import ConvergenceWarning
from poolbandit.models import pymc_engine
from poolbandit.models.data import ModelData
from poolbandit.models.diagnostics import COLUMNS, diagnostics_table
from poolbandit.models.pymc_engine import sample_full
from poolbandit.spec import PriorSpec

SCHOOLS_Y = np.array([28.0, 8, -3, 7, -1, 1, 18, 12])
SCHOOLS_SD = np.array([15.0, 10, 16, 11, 9, 11, 10, 18])
SCHOOLS = ["Choate", "Deerfield", "Phillips Andover", "Phillips Exeter", "Hotchkiss", "Lawrenceville",
           "St. Paul's", "Mt. Hermon"]
#: The priors of ArviZ's bundled ``non_centered_eight``: mu ~ N(0, 5), tau ~ HalfCauchy(5).
SCHOOL_PRIORS = PriorSpec(beta_sd=5.0, tau_scale=5.0, tau_family="half-cauchy")
NUTS = {"chains": 2, "sample_kwargs": {"cores": 2}}


def _mcse(x: np.ndarray, method: str = "mean") -> float:
    """ArviZ's Monte Carlo standard error of draws shaped (chain, draw)."""
    return float(az.mcse(xr.Dataset({"x": (("chain", "draw"), np.asarray(x))}), method=method)["x"])


def _schools(order=slice(None)) -> ModelData:
    return ModelData.from_arrays(SCHOOLS_Y[order], np.ones(8), np.arange(8), obs_sd=SCHOOLS_SD[order],
                                 participants=SCHOOLS[order], coef=["mu"])


@pytest.fixture(scope="module")
def schools_nuts():
    return sample_full(_schools(), SCHOOL_PRIORS, draws=1000, tune=1000, rng=20261201, **NUTS)


# ---------------------------------------------------------------------------
# Eight schools
# ---------------------------------------------------------------------------
def test_eight_schools_matches_arviz_bundled_posterior(schools_nuts):
    """Eight schools (Rubin 1981; Gelman et al., BDA3 section 5.5) with PyMC NUTS against
    ArviZ's bundled ``non_centered_eight`` posterior (same data, mu ~ N(0, 5),
    tau ~ HalfCauchy(5), known sds). Published posterior means: mu about 4.4, tau about
    3.7 (checks.md, from memory; the bundled draws are the reference used here).

    Tolerance: the posterior means of mu, tau and each theta differ by less than z
    combined Monte Carlo standard errors (``arviz.mcse`` of both draw sets), with z the
    two-sided Bonferroni quantile for a 1 percent family-wise false alarm over the 10
    comparisons (z = 3.48): the two runs are independent samples of one posterior, so
    only Monte Carlo error separates them.
    """
    ref = az.load_arviz_data("non_centered_eight").posterior
    post = schools_nuts.posterior
    pairs = [(post["beta"].sel(coef="mu"), ref["mu"]), (post["tau"].sel(coef="mu"), ref["tau"])]
    pairs += [(post["theta"].sel(participant=s, coef="mu"), ref["theta"].sel(school=s)) for s in SCHOOLS]
    z = stats.norm.ppf(1 - 0.01 / (2 * len(pairs)))
    for ours, theirs in pairs:
        a, b = ours.to_numpy(), theirs.to_numpy()
        se = np.hypot(_mcse(a), _mcse(b))
        assert abs(a.mean() - b.mean()) < z * se, (ours.name, a.mean(), b.mean(), se)
    # the bundled values match the published ones (to the 0.5 their rounding and MC error allow)
    assert abs(float(ref["mu"].mean()) - 4.4) < 0.5 and abs(float(ref["tau"].mean()) - 3.7) < 0.5


def test_posterior_layout_and_labels(schools_nuts):
    """The contract of DEVELOPERS.md: the fast engine's variable names, dims and coords;
    no sigma when the noise sd is known; NUTS statistics kept."""
    idata = schools_nuts
    post = idata.posterior
    assert set(post.data_vars) == {"beta", "tau", "theta"}
    assert post["beta"].dims == ("chain", "draw", "coef")
    assert post["theta"].dims == ("chain", "draw", "participant", "coef")
    assert list(post["participant"].to_numpy()) == SCHOOLS and list(post["coef"].to_numpy()) == ["mu"]
    assert post.sizes["chain"] == 2 and post.sizes["draw"] == 1000
    assert post.attrs["engine"] == "full"
    assert "diverging" in idata.sample_stats and idata.observed_data["y"].dims == ("obs",)


def test_cached_model_takes_new_data_and_labels(schools_nuts):
    """The cached model is reused for data of the same structure and sees the new values:
    the schools in reverse order (values, sds and labels reversed together) give the same
    posterior per school label within Monte Carlo error (Bonferroni z for 1 percent over
    the 9 comparisons, as above), and no second model is built."""
    before = dict(pymc_engine._CACHE)
    rev = sample_full(_schools(slice(None, None, -1)), SCHOOL_PRIORS, draws=500, tune=500, rng=7, **NUTS)
    assert pymc_engine._CACHE.keys() == before.keys()
    assert list(rev.posterior["participant"].to_numpy()) == SCHOOLS[::-1]
    a_post, b_post = schools_nuts.posterior, rev.posterior
    names = [("tau", {}), *[("theta", {"participant": s}) for s in SCHOOLS]]
    z = stats.norm.ppf(1 - 0.01 / (2 * len(names)))
    for var, sel in names:
        a = a_post[var].sel(coef="mu", **sel).to_numpy()
        b = b_post[var].sel(coef="mu", **sel).to_numpy()
        assert abs(a.mean() - b.mean()) < z * np.hypot(_mcse(a), _mcse(b)), (var, sel)


def test_same_seed_same_draws_different_seed_different():
    """Reproducibility (style rule 11): the same rng gives identical draws whatever ran
    before on the cached model and whether chains run in parallel processes or one after
    the other; another rng differs; no global seeding happens."""
    data = _schools()
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(np.random, "seed", lambda *a, **k: pytest.fail("global seeding"))
        a = sample_full(data, SCHOOL_PRIORS, draws=30, tune=30, rng=11, **NUTS).posterior
        b = sample_full(data, SCHOOL_PRIORS, chains=2, draws=30, tune=30, rng=np.random.default_rng(11),
                        sample_kwargs={"cores": 1}).posterior
        c = sample_full(data, SCHOOL_PRIORS, draws=30, tune=30, rng=12, **NUTS).posterior
    np.testing.assert_array_equal(a["theta"].to_numpy(), b["theta"].to_numpy())
    assert not np.array_equal(a["theta"].to_numpy(), c["theta"].to_numpy())


def test_bad_arguments():
    data = _schools()
    with pytest.raises(ValueError, match="'draws' parameter of sample_full must be an int >= 1. Got 0"):
        sample_full(data, SCHOOL_PRIORS, draws=0)
    with pytest.raises(ValueError, match="'target_accept'"):
        sample_full(data, SCHOOL_PRIORS, target_accept=1.5)
    with pytest.raises(ValueError, match=r"sample_kwargs may not set \['draws'\]"):
        sample_full(data, SCHOOL_PRIORS, sample_kwargs={"draws": 5})
    nan_y = ModelData.from_arrays([1.0, np.nan], np.ones(2), [0, 1])
    with pytest.raises(ValueError, match="non-finite value.*row 2"):
        sample_full(nan_y)
    bad01 = ModelData.from_arrays([1.0, 2.0], np.ones(2), [0, 1], outcome="bernoulli")
    with pytest.raises(ValueError, match="must be 0 or 1; row 2 has 2.0"):
        sample_full(bad01)


# ---------------------------------------------------------------------------
# Grunfeld: variance components against statsmodels MixedLM (REML)
# ---------------------------------------------------------------------------
def test_grunfeld_random_intercept_matches_mixedlm_reml():
    """Random intercept per firm, fixed slopes for value and capital, on statsmodels'
    bundled Grunfeld panel (11 firms x 20 years), against ``statsmodels`` MixedLM's REML
    estimates computed here (checks.md 3).

    Outcome and covariates are standardised (mean 0, sd 1) so that the weak priors
    (beta ~ N(0, 10^2), tau ~ HalfNormal(5), sigma ~ HalfNormal(5), in sd units) are
    nearly flat where the likelihood lives; tau and sigma are converted back by the sd
    of ``invest``.

    What "centred close" means: REML maximises the restricted likelihood, which is the
    marginal posterior of the variance components under flat priors, so REML estimates
    the posterior *mode*. The posterior of a scale estimated from nu degrees of freedom is
    right-skewed, approximately a scaled inverse-chi with nu degrees of freedom, whose
    median exceeds its mode by delta(nu) posterior sds (computed here with scipy; about
    0.29 for the intercept sd with nu = 11 - 1 firms, 0.03 for sigma with nu = 220 - 13).
    We assert ``|(median - REML) / sd - delta| < 0.1 + 3 * MCSE(median) / sd``: 0.1 sd for
    the approximation (flat versus weak priors, fixed-effect uncertainty), plus Monte
    Carlo error of the median (``arviz.mcse``).
    """
    sm = pytest.importorskip("statsmodels.api")
    import statsmodels.formula.api as smf

    df = sm.datasets.grunfeld.load_pandas().data
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels' optimiser chatter
        reml = smf.mixedlm("invest ~ value + capital", df, groups=df["firm"]).fit(reml=True)
    reml_tau, reml_sigma = float(np.sqrt(reml.cov_re.iloc[0, 0])), float(np.sqrt(reml.scale))
    firms, group = np.unique(df["firm"].astype(str), return_inverse=True)
    sy = df["invest"].std()
    y = (df["invest"] - df["invest"].mean()) / sy
    X = np.column_stack([np.ones(len(df))] + [(df[c] - df[c].mean()) / df[c].std() for c in ("value", "capital")])
    data = ModelData.from_arrays(y.to_numpy(), X, group, coef=["intercept", "value", "capital"],
                                 random=[True, False, False], participants=list(firms))
    idata = sample_full(data, PriorSpec(beta_sd=10.0, tau_scale=5.0, sigma_scale=5.0), draws=1000, tune=500,
                        rng=1935, **NUTS)
    post = idata.posterior
    # shared slopes: no deviation, tau fixed at 0 and every firm's slope equal to beta
    assert np.all(post["tau"].sel(coef=["value", "capital"]).to_numpy() == 0.0)
    np.testing.assert_allclose(post["theta"].sel(coef="value").to_numpy(),
                               np.broadcast_to(post["beta"].sel(coef="value").to_numpy()[..., None], (2, 1000, 11)))
    n_groups, n_obs = len(firms), len(df)
    for draws, estimate, nu in (
        (post["tau"].sel(coef="intercept").to_numpy() * sy, reml_tau, n_groups - 1),
        (post["sigma"].to_numpy() * sy, reml_sigma, n_obs - n_groups - 2),
    ):
        median, sd = np.median(draws), draws.std()
        delta = _median_minus_mode_in_sd(nu)
        tol = 0.1 + 3 * _mcse(draws, "median") / sd
        assert abs((median - estimate) / sd - delta) < tol, (estimate, median, sd, delta, tol)


def _median_minus_mode_in_sd(nu: int) -> float:
    """(median - mode) / sd of s * sqrt(nu / X), X ~ chi2(nu) (a scaled inverse-chi)."""
    from scipy.special import gammaln

    mode = np.sqrt(nu / (nu + 1))
    median = np.sqrt(nu / stats.chi2.median(nu))
    mean = np.sqrt(nu / 2) * np.exp(gammaln((nu - 1) / 2) - gammaln(nu / 2))
    sd = np.sqrt(nu / (nu - 2) - mean**2)
    return float((median - mode) / sd)


# ---------------------------------------------------------------------------
# Full covariance: with no observations the posterior is the prior
# ---------------------------------------------------------------------------
def test_full_covariance_prior_draws_match_lkj_and_half_normal():
    """With no observations the posterior is the prior, so NUTS draws of the full
    covariance model must follow it: each random coefficient's tau ~ HalfNormal(0.5), and
    the correlation of two random coefficients under LKJ(eta) in dimension 2 is
    ``2 B - 1`` with ``B ~ Beta(eta, eta)`` (Lewandowski, Kurowicka and Joe 2009; scipy
    as reference). The third coefficient is shared: tau 0, correlation row of the identity.

    Kolmogorov-Smirnov tests on draws thinned to about one per effective sample (ESS from
    ArviZ), at level 0.001 each (4 tests, so a 0.4 percent family-wise false alarm
    rate; seeded, so deterministic).
    """
    eta = 2.0
    empty = ModelData(y=np.zeros(0), X=np.zeros((0, 3)), group=np.zeros(0, dtype=np.int64), W=np.zeros((2, 0)),
                      participants=("p1", "p2"), coef=("drill", "story", "roleplay"),
                      random=np.array([True, True, False]))
    pri = PriorSpec(tau_scale=0.5, covariance="full", lkj_eta=eta)
    idata = sample_full(empty, pri, draws=1000, tune=300, rng=2009, **NUTS)
    post = idata.posterior
    corr = post["corr"].to_numpy()
    np.testing.assert_allclose(corr[..., 2, :], np.broadcast_to([0.0, 0.0, 1.0], corr.shape[:2] + (3,)), atol=1e-12)
    np.testing.assert_allclose(corr, np.swapaxes(corr, -1, -2), atol=1e-12)
    assert np.all(post["tau"].sel(coef="roleplay").to_numpy() == 0.0)
    checks = [
        (post["tau"].sel(coef="drill"), stats.halfnorm(scale=0.5).cdf),
        (post["tau"].sel(coef="story"), stats.halfnorm(scale=0.5).cdf),
        (post["corr"].sel(coef="drill", coef_="story"), stats.beta(eta, eta, loc=-1, scale=2).cdf),
        (post["beta"].sel(coef="drill"), stats.norm(0, 1).cdf),
    ]
    for da, cdf in checks:
        x = da.to_numpy()
        ess = float(az.ess(xr.Dataset({"x": (("chain", "draw"), x)}))["x"])
        step = max(1, int(np.ceil(x.size / ess)))
        sample = x[:, ::step].ravel()
        assert stats.kstest(sample, cdf).pvalue > 0.001, (da.name, step)
    # a shared coefficient has no deviation: every participant's value is beta's
    deviation = post["theta"].sel(coef="roleplay") - post["beta"].sel(coef="roleplay")
    assert np.all(deviation.to_numpy() == 0.0)


# ---------------------------------------------------------------------------
# Diagnostics table against ArviZ (checks.md 10)
# ---------------------------------------------------------------------------
def test_diagnostics_table_equals_arviz_on_the_same_draws():
    """R-hat, bulk and tail ESS, MCSE and HDI of the table equal ArviZ's (``arviz.rhat``,
    ``arviz.ess``, ``arviz.mcse``, ``arviz.hdi``, and ``arviz.summary`` as a second view)
    on ArviZ's bundled ``centered_eight`` draws. That posterior is the textbook case of
    poor convergence (centred parameterisation: low ESS for tau, divergences), so the
    flags must fire there: exact equality up to float rounding, and the flags follow the
    stated thresholds."""
    idata = az.load_arviz_data("centered_eight")
    names = ["mu", "tau", "theta"]
    with pytest.warns(ConvergenceWarning, match="divergent transitions"):
        table = diagnostics_table(idata, var_names=names, hdi_prob=0.94)
    assert list(table.columns) == list(COLUMNS)
    assert table["flagged"].dtype == bool
    summary = az.summary(idata, var_names=names, hdi_prob=0.94, round_to="none")
    params = table[table["variable"] != "divergences"].set_index("parameter")
    assert list(params.index) == list(summary.index)
    post = idata.posterior
    rhat, bulk = az.rhat(post[names]), az.ess(post[names], method="bulk")
    tail, hdi = az.ess(post[names], method="tail"), az.hdi(post[names], hdi_prob=0.94)
    np.testing.assert_allclose(params.loc["tau", "r_hat"], float(rhat["tau"]), rtol=1e-12)
    np.testing.assert_allclose(params.loc["theta[Choate]", "ess_bulk"], float(bulk["theta"].sel(school="Choate")),
                               rtol=1e-12)
    np.testing.assert_allclose(params.loc["mu", "ess_tail"], float(tail["mu"]), rtol=1e-12)
    np.testing.assert_allclose(params.loc["tau", "hdi_high"], float(hdi["tau"].sel(hdi="higher")), rtol=1e-12)
    for ours, theirs in (("mean", "mean"), ("sd", "sd"), ("mcse_mean", "mcse_mean"), ("hdi_low", "hdi_3%"),
                         ("hdi_high", "hdi_97%"), ("r_hat", "r_hat"), ("ess_bulk", "ess_bulk"),
                         ("ess_tail", "ess_tail")):
        np.testing.assert_allclose(params[ours].to_numpy(), summary[theirs].to_numpy(), rtol=1e-9, err_msg=ours)
    expected = (params["r_hat"] > 1.01) | (params["ess_bulk"] < 400) | (params["ess_tail"] < 400)
    np.testing.assert_array_equal(params["flagged"].to_numpy(), expected.to_numpy())
    assert params.loc["tau", "flagged"]  # centred eight schools: tau mixes badly
    divergences = int(idata.sample_stats["diverging"].sum())
    assert divergences > 0 and table.attrs["divergences"] == divergences
    last = table.iloc[-1]
    assert last["parameter"] == "divergences" and last["mean"] == divergences and last["flagged"]


def test_diagnostics_flags_a_bad_chain_and_stays_quiet_on_good_draws():
    """A deliberately bad chain set (one chain of the bundled ``non_centered_eight`` draws
    shifted by 3 posterior sds, a chain stuck elsewhere) must raise R-hat above 1.01 for
    exactly the shifted variable and warn; independent normal draws (4 x 1000, seeded)
    must not be flagged. Thresholds are Vehtari et al. (2021)'s recommendations."""
    ref = az.load_arviz_data("non_centered_eight")
    good = az.from_dict(posterior={"beta": np.random.default_rng(5).standard_normal((4, 1000, 2))},
                        coords={"coef": ["a", "b"]}, dims={"beta": ["coef"]})
    with warnings.catch_warnings():
        warnings.simplefilter("error", ConvergenceWarning)
        table = diagnostics_table(good)
    assert not table["flagged"].any() and table.attrs["divergences"] == 0
    mu = ref.posterior["mu"].to_numpy().copy()
    mu[0] += 3 * mu.std()
    bad = az.from_dict(posterior={"beta": mu[..., None], "tau": ref.posterior["tau"].to_numpy()[..., None]},
                       coords={"coef": ["mu"]}, dims={"beta": ["coef"], "tau": ["coef"]})
    with pytest.warns(ConvergenceWarning, match=r"beta\[mu\] \(R-hat"):
        table = diagnostics_table(bad)
    rows = table.set_index("parameter")
    assert rows.loc["beta[mu]", "r_hat"] > 1.01 and rows.loc["beta[mu]", "flagged"]
    assert rows.loc["tau[mu]", "r_hat"] <= 1.01


def test_constant_elements_are_not_flagged():
    """tau of a shared coefficient is 0 in every draw: R-hat is undefined there (NaN, as
    ArviZ returns it) and the row is not flagged; a NaN elsewhere would be."""
    rng = np.random.default_rng(3)
    tau = np.concatenate([np.abs(rng.standard_normal((4, 500, 1))), np.zeros((4, 500, 1))], axis=-1)
    idata = az.from_dict(posterior={"tau": tau}, coords={"coef": ["a", "b"]}, dims={"tau": ["coef"]})
    table = diagnostics_table(idata, warn=False).set_index("parameter")
    assert np.isnan(table.loc["tau[b]", "r_hat"]) and not table.loc["tau[b]", "flagged"]
    assert not table.loc["tau[a]", "flagged"]
    assert isinstance(table, pd.DataFrame)
