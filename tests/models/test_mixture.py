"""The mixture population model (``[priors] population = "mixture"``): fast engine against PyMC's NUTS.

PyMC's NUTS on the same model (labels marginalised, :func:`poolbandit.models.pymc_engine.sample_full`)
is the reference of the fast engine (checks.md 2); the mixture reduces to the normal population model
when the data come from one normal population; bad input names what is wrong.
"""

from __future__ import annotations

from dataclasses import replace

import arviz as az
import numpy as np
import pytest
import xarray as xr
from scipy import stats

from poolbandit.models.data import ModelData
from poolbandit.models.fit import fit
from poolbandit.models.gibbs import sample_fast
from poolbandit.models.mixture import MixtureGibbsSampler, sample_mixture
from poolbandit.models.pymc_engine import sample_full
from poolbandit.simulation import simulate
from poolbandit.simulation.scenarios import reference_study
from poolbandit.spec import PriorSpec

MIXTURE = PriorSpec(population="mixture", components=2)


def _two_type_study(n: int = 20, t: int = 16, seed: int = 20261204) -> ModelData:
    """Two arms, ``n`` participants of two types in turn (arm means (1, 0) and (0, 1)), heterogeneity 0.2
    within type, ``t`` decisions alternating the arms, noise sd 0.5."""
    rng = np.random.default_rng(seed)
    mu = np.array([[1.0, 0.0], [0.0, 1.0]])
    theta = mu[np.arange(n) % 2] + 0.2 * rng.standard_normal((n, 2))
    g = np.repeat(np.arange(n), t)
    X = np.eye(2)[np.tile(np.arange(t) % 2, n)]
    y = (X * theta[g]).sum(axis=1) + 0.5 * rng.standard_normal(n * t)
    return ModelData.from_arrays(y, X, g, coef=["drill", "story"])


def _mcse(x: np.ndarray) -> float:
    """ArviZ's Monte Carlo standard error of the mean of draws shaped (chain, draw)."""
    return float(az.mcse(xr.Dataset({"x": (("chain", "draw"), np.asarray(x))}), method="mean")["x"])


def _label_invariant(idata) -> dict[str, np.ndarray]:
    """Draws (chain, draw) of every label-invariant scalar: beta, tau, sigma, the centre and spread of
    the component means, the largest weight and every participant's coefficients."""
    post = idata.posterior
    out = {}
    for var in ("beta", "tau", "component_center", "component_sd"):
        for c in post["coef"].to_numpy():
            out[f"{var}[{c}]"] = post[var].sel(coef=c).to_numpy()
    out["sigma"] = post["sigma"].to_numpy()
    out["largest weight"] = post["weight"].max("component").to_numpy()
    theta = post["theta"].transpose("chain", "draw", "participant", "coef").to_numpy()
    for i, p in enumerate(post["participant"].to_numpy()):
        for j, c in enumerate(post["coef"].to_numpy()):
            out[f"theta[{p}, {c}]"] = theta[:, :, i, j]
    return out


@pytest.fixture(scope="module")
def two_engines():
    data = _two_type_study()
    fast = sample_mixture(data, MIXTURE, chains=4, draws=1000, tune=300, rng=1)
    # target_accept 0.98: with 0.9 this centred model showed hundreds of divergences (the funnel between
    # tau and the centred theta) and biased tau; at 0.98 about 2 in 1000
    nuts = sample_full(data, MIXTURE, chains=2, draws=500, tune=500, target_accept=0.98, rng=2,
                       sample_kwargs={"cores": 2})
    return data, fast, nuts


def test_fast_mixture_agrees_with_nuts(two_engines):
    """checks.md 2 (PyMC NUTS as the reference), for the mixture population model with two components on
    20 participants of two well separated types: posterior means and sds of every label-invariant
    quantity (beta = sum_c pi_c mu_c, tau, sigma, the centre and spread of the component means, the
    largest weight, and all 40 participant coefficients) agree.

    Tolerance: ``0.1 * sd_NUTS + z * hypot(MCSE_fast, MCSE_NUTS)`` for means and ``0.1 * sd_NUTS + z *
    (Monte Carlo error of the sds)`` for sds, z the Bonferroni quantile for a 1% false alarm rate over all
    comparisons (checks.md 2's allowance of 0.1 posterior sd, plus Monte Carlo error, ArviZ's ESS-based
    MCSE). Measured: largest difference of theta means 0.022, posterior sd about 0.15.
    """
    _, fast, nuts = two_engines
    f, n = _label_invariant(fast), _label_invariant(nuts)
    z = stats.norm.ppf(1 - 0.01 / (2 * 2 * len(f)))
    failures = []
    for name in f:
        a, b = f[name], n[name]
        sd_n, sd_f = b.std(), a.std()
        tol_mean = 0.1 * sd_n + z * np.hypot(_mcse(a), _mcse(b))
        centre = 0.5 * (a.mean() + b.mean())
        se_sd = np.hypot(_mcse((a - centre) ** 2) / (2 * sd_f), _mcse((b - centre) ** 2) / (2 * sd_n))
        if abs(a.mean() - b.mean()) > tol_mean:
            failures.append((name, "mean", a.mean(), b.mean(), tol_mean))
        if abs(sd_f - sd_n) > 0.1 * sd_n + z * se_sd:
            failures.append((name, "sd", sd_f, sd_n))
    assert not failures, failures
    # the reference itself is sound: few divergences (a centred model; see the fixture)
    assert int(nuts.sample_stats["diverging"].sum()) <= 10
    for idata in (fast, nuts):
        assert idata.posterior.attrs["population"] == "mixture"
        assert idata.posterior["component_mean"].dims == ("chain", "draw", "component", "coef")
        # beta is the population mean sum_c pi_c mu_c, draw by draw
        beta = (idata.posterior["weight"] * idata.posterior["component_mean"]).sum("component")
        np.testing.assert_allclose(beta.to_numpy(), idata.posterior["beta"].to_numpy(), rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("outcome", ["gaussian", "bernoulli"])
def test_mixture_on_one_normal_population_matches_normal_model(outcome):
    """When participants come from one normal population (scenarios.reference_study: 60 x 21 x 3, random
    assignment, heterogeneity 0.5), a three-component mixture describes the same population (its
    components may overlap), so each participant's posterior matches the normal population model's
    (hierarchical model, BDA3 chapter 5; common practice that an overfitted mixture reduces to the
    simpler model). Gaussian: the labels are drawn with theta integrated out; bernoulli: given theta.

    Tolerance: every theta posterior mean within 0.3 normal-model posterior sds and their root mean
    square within 0.12 (the models differ, so checks.md 2's 0.1 sd for one model is widened; Monte
    Carlo error of a difference is about 0.03 sd here). Measured: largest 0.15 (gaussian) and 0.20
    (bernoulli), rms 0.055 and 0.070; sd ratios 0.93-1.20.
    """
    design = reference_study(outcome)
    log = simulate(design, "control", 20261205).log
    data = ModelData.from_log(log[np.isfinite(log[design.study.reward])], design)
    normal = sample_fast(data, design.priors, chains=4, draws=1000, tune=200, rng=1).posterior["theta"]
    mix = sample_mixture(data, replace(design.priors, population="mixture", components=3), chains=4, draws=1000,
                         tune=200, rng=2).posterior["theta"]
    d = ((mix.mean(("chain", "draw")) - normal.mean(("chain", "draw"))) / normal.std(("chain", "draw"))).to_numpy()
    assert np.abs(d).max() < 0.3
    assert np.sqrt(np.mean(d ** 2)) < 0.12
    ratio = (mix.std(("chain", "draw")) / normal.std(("chain", "draw"))).to_numpy()
    assert 0.8 < ratio.min() and ratio.max() < 1.3  # the sds of the two models' theta: measured 0.93-1.20


def test_fit_dispatches_on_the_design_and_is_seeded():
    """fit(engine="fast") uses the mixture sampler when the priors say so (posterior variables
    weight and component_mean), the same seed gives the same draws, and the normal model is untouched."""
    data = _two_type_study(n=8, t=8)
    a = fit(data, priors=MIXTURE, chains=2, draws=20, tune=10, rng=3)
    b = fit(data, priors=MIXTURE, chains=2, draws=20, tune=10, rng=3)
    assert a.posterior.attrs["population"] == "mixture"
    np.testing.assert_array_equal(a.posterior["theta"].to_numpy(), b.posterior["theta"].to_numpy())
    normal = fit(data, priors=PriorSpec(), chains=2, draws=20, tune=10, rng=3)
    assert "weight" not in normal.posterior and "population" not in normal.posterior.attrs
    ref = sample_fast(data, PriorSpec(), chains=2, draws=20, tune=10, rng=np.random.default_rng(3))
    np.testing.assert_array_equal(normal.posterior["theta"].to_numpy(), ref.posterior["theta"].to_numpy())


def test_warm_start_adds_participants_with_labels():
    """set_data with more participants (a growing study) keeps the state and gives each new participant
    a label, and the next sweep uses it (the normal model's set_data contract, DEVELOPERS.md)."""
    data = _two_type_study(n=12, t=8)
    first = ModelData(y=data.y[data.group < 8], X=data.X[data.group < 8], group=data.group[data.group < 8],
                      W=data.W[:8], participants=data.participants[:8], coef=data.coef)
    s = MixtureGibbsSampler(first, MIXTURE, rng=4)
    s.sweep(5)
    s.set_data(data)
    assert s.labels.shape == (12,) and s.state.theta.shape == (12, 2)
    s.sweep(5)
    assert np.all((s.labels >= 0) & (s.labels < 2))
    np.testing.assert_allclose(s.weights.sum(), 1.0)


@pytest.mark.parametrize("outcome", ["gaussian", "bernoulli"])
def test_scalar_path_equals_general_path(both_sweep_paths, outcome):
    """The base class's closed forms for scalar coefficient blocks (diagonal covariance) must serve the
    mixture too (per-participant prior means m_i = mu_{z_i}): on the same streams, 25 sweeps give the same
    labels, weights, component means, scales and theta as the general block algebra (as
    tests/models/test_gibbs_fast_paths.py checks for the normal model). Tolerance 1e-9: rounding only."""
    design = reference_study(outcome, size=24, horizon=12)
    log = simulate(design, "control", 5).log
    data = ModelData.from_log(log[np.isfinite(log[design.study.reward])], design)
    priors = replace(design.priors, population="mixture", components=3)
    draws = both_sweep_paths(MixtureGibbsSampler, data, priors, ("_z", "_pi", "_mu", "_spread", "_tau", "_theta", "_beta"))
    for fast, general in zip(*draws):
        np.testing.assert_allclose(fast, general, rtol=0, atol=1e-9)


def test_mixture_needs_every_coefficient_random():
    """A coefficient shared by everyone cannot follow a mixture density: both engines refuse, naming it."""
    data = replace(_two_type_study(n=6, t=4), random=np.array([True, False]))
    with pytest.raises(ValueError, match="every coefficient to vary"):
        sample_mixture(data, MIXTURE, chains=1, draws=5, tune=0, rng=1)
    with pytest.raises(ValueError, match="every coefficient to vary"):
        sample_full(data, MIXTURE, chains=1, draws=5, tune=5, rng=1)
