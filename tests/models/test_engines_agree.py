"""The fast engine agrees with PyMC's NUTS on the same data and priors (checks.md 1 and 2).

PyMC's NUTS is the reference implementation of the model: the fast Gibbs engine
is correct only if its posterior matches NUTS's within Monte Carlo error. NUTS
runs are small (2 chains x 1000 draws); the fast engine runs longer because it
is cheap, which keeps its share of the Monte Carlo error small.
"""

from __future__ import annotations

import arviz as az
import numpy as np
import pytest
import xarray as xr
from scipy import stats

from poolbandit.models.data import ModelData
from poolbandit.models.gibbs import sample_fast
from poolbandit.models.pymc_engine import sample_full
from poolbandit.simulation import simulate
from poolbandit.simulation.scenarios import reference_study
from poolbandit.spec import PriorSpec

from _reference import SCHOOLS_SD, SCHOOLS_Y

#: The simulated study of checks.md 2 is scenarios.reference_study: 60 participants, 3 arms,
#: 21 decisions, arm means (0, 0.3, -0.2), heterogeneity 0.5, noise 1, random assignment;
#: default priors.
NUTS = {"chains": 2, "draws": 1000, "tune": 500, "sample_kwargs": {"cores": 2}}
FAST = {"chains": 4, "draws": 1000, "tune": 200}
THETA_SAMPLE = 5  # participants whose three coefficients are compared


def _mcse(x: np.ndarray) -> float:
    """ArviZ's Monte Carlo standard error of the mean of draws shaped (chain, draw)."""
    return float(az.mcse(xr.Dataset({"x": (("chain", "draw"), np.asarray(x))}), method="mean")["x"])


def _compare(pairs, *, allowance: float, family_alpha: float = 0.01):
    """Compare posterior means and sds of paired draw sets.

    Each (name, fast, nuts) pair passes when
    ``|mean_f - mean_n| <= allowance * sd_n + z * hypot(MCSE_f, MCSE_n)`` and
    ``|sd_f - sd_n| <= allowance * sd_n + z * hypot(se_f, se_n)``, where the MCSEs come
    from ``arviz.mcse`` and the sd's Monte Carlo error is that of the second moment about
    a common centre divided by ``2 sd`` (delta method; ArviZ's own "sd" MCSE method is
    not used because it fails when numba is installed). ``z`` is the two-sided
    Bonferroni quantile for a ``family_alpha`` false-alarm rate over all comparisons:
    the two engines are independent samplers, so without a real difference only Monte
    Carlo error separates them.
    """
    z = stats.norm.ppf(1 - family_alpha / (2 * 2 * len(pairs)))
    failures = []
    for name, f, n in pairs:
        f, n = np.asarray(f), np.asarray(n)
        sd_n, sd_f = n.std(), f.std()
        if sd_n == 0.0 and sd_f == 0.0:
            failures += [] if f.mean() == n.mean() else [(name, "constant", f.mean(), n.mean())]
            continue
        d_mean = abs(f.mean() - n.mean())
        tol_mean = allowance * sd_n + z * np.hypot(_mcse(f), _mcse(n))
        centre = 0.5 * (f.mean() + n.mean())
        se_f = _mcse((f - centre) ** 2) / (2 * sd_f)
        se_n = _mcse((n - centre) ** 2) / (2 * sd_n)
        d_sd = abs(sd_f - sd_n)
        tol_sd = allowance * sd_n + z * np.hypot(se_f, se_n)
        if d_mean > tol_mean:
            failures.append((name, "mean", round(f.mean(), 4), round(n.mean(), 4), round(tol_mean, 4)))
        if d_sd > tol_sd:
            failures.append((name, "sd", round(sd_f, 4), round(sd_n, 4), round(tol_sd, 4)))
    assert not failures, failures


def test_eight_schools_fast_engine_agrees_with_nuts():
    """Eight schools (Rubin 1981; BDA3 section 5.5) under ArviZ's ``non_centered_eight``
    priors (mu ~ N(0, 5), tau ~ HalfCauchy(5), known sds): the fast engine and PyMC's
    NUTS, run here on the same data, agree on mu, tau and every theta (means and sds)
    within Monte Carlo error (no extra allowance: this is the same model exactly)."""
    data = ModelData.from_arrays(SCHOOLS_Y, np.ones(8), np.arange(8), obs_sd=SCHOOLS_SD, coef=["mu"])
    pri = PriorSpec(beta_sd=5.0, tau_scale=5.0, tau_family="half-cauchy")
    fast = sample_fast(data, pri, chains=4, draws=1500, tune=200, rng=81).posterior
    nuts = sample_full(data, pri, chains=2, draws=1000, tune=1000, rng=82, sample_kwargs={"cores": 2}).posterior
    pairs = [(v, fast[v].sel(coef="mu").to_numpy(), nuts[v].sel(coef="mu").to_numpy()) for v in ("beta", "tau")]
    pairs += [(f"theta[{j}]", fast["theta"].isel(participant=j, coef=0).to_numpy(),
               nuts["theta"].isel(participant=j, coef=0).to_numpy()) for j in range(8)]
    _compare(pairs, allowance=0.0)


@pytest.fixture(scope="module", params=["gaussian", "bernoulli"])
def study_fits(request):
    """One simulated 60 x 21 x 3 study per outcome, fitted by both engines (seeded)."""
    design = reference_study(request.param)
    log = simulate(design, "control", rng=20261203).log
    data = ModelData.from_log(log, design)
    fast = sample_fast(data, design.priors, rng=1, **FAST).posterior
    nuts = sample_full(data, design.priors, rng=2, **NUTS).posterior
    return request.param, data, fast, nuts


def test_fast_engine_agrees_with_nuts_on_a_simulated_study(study_fits):
    """checks.md 2 (PyMC NUTS as the reference for the full model): on a simulated
    60 x 21 x 3 study, gaussian and bernoulli, the fast engine's posterior means agree with
    NUTS within 0.1 posterior sd plus Monte Carlo error and its posterior sds within 10
    percent (of NUTS's sd) plus Monte Carlo error, for the population means (beta), the
    heterogeneity scales (tau), the noise scale (sigma, gaussian) and the coefficients of
    five participants (theta, chosen by a seeded draw). The 0.1 sd and 10 percent
    allowances are the check's own; the Monte Carlo part is a Bonferroni z (1 percent
    family-wise over all comparisons of the outcome) times the combined MCSE."""
    outcome, data, fast, nuts = study_fits
    pairs = []
    for var in ("beta", "tau"):
        pairs += [(f"{var}[{c}]", fast[var].sel(coef=c).to_numpy(), nuts[var].sel(coef=c).to_numpy())
                  for c in data.coef]
    if outcome == "gaussian":
        pairs.append(("sigma", fast["sigma"].to_numpy(), nuts["sigma"].to_numpy()))
    else:
        assert "sigma" not in fast and "sigma" not in nuts
    who = np.random.default_rng(7).choice(data.n_participants, THETA_SAMPLE, replace=False)
    for i in who:
        p = data.participants[i]
        pairs += [(f"theta[{p}, {c}]", fast["theta"].sel(participant=p, coef=c).to_numpy(),
                   nuts["theta"].sel(participant=p, coef=c).to_numpy()) for c in data.coef]
    _compare(pairs, allowance=0.1)


def test_both_engines_share_the_layout(study_fits):
    """DEVELOPERS.md's posterior contract: the same variables, dims and coords from both engines."""
    _, data, fast, nuts = study_fits
    assert set(fast.data_vars) == set(nuts.data_vars)
    for var in fast.data_vars:
        assert fast[var].dims == nuts[var].dims, var
    for dim in ("coef", "participant"):
        assert list(fast[dim].to_numpy()) == list(nuts[dim].to_numpy())
    assert list(nuts["participant"].to_numpy()) == list(data.participants)
