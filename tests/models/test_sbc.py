"""Simulation-based calibration of the fast engine.

Talts, Betancourt, Simpson, Vehtari and Gelman (2018), "Validating Bayesian
inference algorithms with simulation-based calibration" (arXiv:1804.06788):
draw the parameters from the prior, simulate a data set, sample the posterior,
and record the rank of the true value among ``L`` posterior draws. If the
sampler is correct the ranks are uniform on ``0..L``.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from poolbandit._random import spawn
from poolbandit.models import GibbsSampler, ModelData
from poolbandit.spec import PriorSpec

N_REPS = 200  # replications per outcome
L_DRAWS = 39  # posterior draws per replication -> ranks 0..39, 10 bins of 4
THIN = 2  # sweeps per kept draw: the collapsed sampler's ESS per sweep is >= 0.3 on these models
TUNE = 15
LEVEL = 0.001  # per-quantity chi-square level (seeded, several quantities per outcome)


def _simulate(outcome: str, priors: PriorSpec, rng: np.random.Generator):
    """One prior draw and a data set from it (2 arms, one covariate for gaussian)."""
    n_part, per = (10, 4) if outcome == "gaussian" else (12, 6)
    q = 1 if outcome == "gaussian" else 0
    P = 2
    beta = priors.beta_sd * rng.standard_normal(P)
    gamma = priors.gamma_sd * rng.standard_normal((P, q))
    tau = np.abs(priors.tau_scale * rng.standard_normal(P))
    sigma = abs(priors.sigma_scale * rng.standard_normal())
    W = rng.standard_normal((n_part, q))
    theta = beta + W @ gamma.T + tau * rng.standard_normal((n_part, P))
    group = np.repeat(np.arange(n_part), per)
    arm = rng.integers(0, P, len(group))
    X = np.eye(P)[arm]
    eta = np.sum(X * theta[group], axis=1)
    if outcome == "gaussian":
        y = eta + sigma * rng.standard_normal(len(eta))
    else:
        y = (rng.random(len(eta)) < 1 / (1 + np.exp(-eta))).astype(float)
    data = ModelData.from_arrays(y, X, group, W if q else None, outcome=outcome)
    truth = {"beta0": beta[0], "beta1": beta[1], "tau0": tau[0], "tau1": tau[1], "theta00": theta[0, 0],
             "theta01": theta[0, 1]}
    if outcome == "gaussian":
        truth.update(sigma=sigma, gamma00=gamma[0, 0])
    return data, truth


def _extract(state) -> dict[str, float]:
    out = {"beta0": state.beta[0], "beta1": state.beta[1], "tau0": state.tau[0], "tau1": state.tau[1],
           "theta00": state.theta[0, 0], "theta01": state.theta[0, 1]}
    if state.sigma is not None:
        out.update(sigma=state.sigma, gamma00=state.gamma[0, 0])
    return out


@pytest.mark.slow
@pytest.mark.parametrize("outcome", ["gaussian", "bernoulli"])
def test_sbc_rank_uniformity(outcome):
    """SBC (Talts et al. 2018) for the gaussian and the bernoulli (Polya-Gamma) model.

    200 replications of a small model (10-12 participants, 2 arms, 4-6
    observations each, default priors), each sampled from an independent prior
    start with 15 warm-up sweeps and 39 draws thinned by 2. For beta, tau, a
    theta, and (gaussian) sigma and a covariate effect, the ranks binned into 10
    bins must pass a chi-square uniformity test (scipy) at level 0.001 per
    quantity; with a fixed seed the outcome is deterministic.
    """
    priors = PriorSpec()
    ranks: dict[str, list[int]] = {}
    for g in spawn(20260301 if outcome == "gaussian" else 20260302, N_REPS):
        g_data, g_chain = spawn(g, 2)
        data, truth = _simulate(outcome, priors, g_data)
        s = GibbsSampler(data, priors, rng=g_chain, init="prior")
        s.sweep(TUNE)
        draws: dict[str, list[float]] = {k: [] for k in truth}
        for _ in range(L_DRAWS):
            s.sweep(THIN)
            for k, v in _extract(s.state).items():
                draws[k].append(v)
        for k, v in truth.items():
            ranks.setdefault(k, []).append(int(np.sum(np.array(draws[k]) < v)))
    for k, r in ranks.items():
        counts = np.bincount(np.array(r) // 4, minlength=10)
        p = stats.chisquare(counts).pvalue
        assert p > LEVEL, (outcome, k, counts, p)
