"""The fast engine's fast paths: scalar coefficient blocks, lockstep slice sampling, Polya-Gamma cells."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from poolbandit.models import GibbsSampler, ModelData
from poolbandit.models import _gibbs_math as gm
from poolbandit.models._polyagamma import draw_pg, pg_mean, pg_var
from poolbandit.spec import PriorSpec

from _reference import SCHOOLS_SD, SCHOOLS_Y


def _arm_data(outcome: str, n: int = 200, **kwargs) -> ModelData:
    """30 participants, 3 arms (one-hot rows: scalar blocks), ``n`` seeded observations."""
    rng = np.random.default_rng(0)
    N, P = 30, 3
    g, arm = rng.integers(0, N, n), rng.integers(0, P, n)
    X = np.eye(P)[arm]
    W = rng.normal(size=(N, 2))
    theta = 0.5 * rng.normal(size=(N, P)) + W @ np.array([[0.3, -0.2, 0.1], [0.0, 0.2, 0.0]])
    eta = np.sum(X * theta[g], axis=1)
    if outcome == "gaussian":
        y = eta + rng.normal(size=n)
    else:
        y = (rng.random(n) < 1.0 / (1.0 + np.exp(-eta))).astype(float)
    if kwargs.pop("covariates", False):
        kwargs.update(W=W, covariates=["a", "b"])
    if kwargs.pop("obs_sd", False):
        kwargs["obs_sd"] = rng.uniform(0.5, 2.0, n)
    return ModelData.from_arrays(y, X, g, outcome=outcome, **kwargs)


_CASES = {
    "gaussian": lambda: _arm_data("gaussian"),
    "gaussian-covariates": lambda: _arm_data("gaussian", covariates=True),
    "gaussian-replicated": lambda: _arm_data("gaussian", n=900),  # 10 per cell: no ridge move
    "gaussian-one-fixed": lambda: _arm_data("gaussian", random=[True, False, True]),
    "gaussian-none-random": lambda: _arm_data("gaussian", random=[False, False, False]),
    "gaussian-known-noise": lambda: _arm_data("gaussian", obs_sd=True),
    "bernoulli": lambda: _arm_data("bernoulli"),
    "bernoulli-covariates": lambda: _arm_data("bernoulli", covariates=True),
    "bernoulli-one-fixed": lambda: _arm_data("bernoulli", random=[False, True, True]),
    "eight-schools": lambda: ModelData.from_arrays(SCHOOLS_Y, np.ones(8), np.arange(8), obs_sd=SCHOOLS_SD),
}


@pytest.mark.parametrize("family", ["half-normal", "half-cauchy"])
@pytest.mark.parametrize("case", list(_CASES))
def test_scalar_path_equals_general_path(case, family, both_sweep_paths):
    """The closed forms for scalar coefficient blocks (``GibbsSampler._sweep_scalar``) are
    the block algebra of the general sweep specialised to k = 1 (the reference here is
    the general path itself, which the other tests hold to NUTS, eight schools and SBC):
    on the same random stream, 25 lockstep sweeps of 2 chains give the same draws
    to rounding (1e-10; the two paths sum the same terms in a different order, so
    they differ by a few ulps, far below any slice acceptance margin)."""
    data = _CASES[case]()
    priors = PriorSpec(tau_family=family, tau_scale=1.0 if family == "half-normal" else 2.0)
    if case == "gaussian-replicated":
        assert not GibbsSampler(data, priors, rng=0)._ridge
    elif case in ("gaussian", "gaussian-covariates", "gaussian-one-fixed"):  # about 2 observations per cell
        assert GibbsSampler(data, priors, rng=0)._ridge
    draws = both_sweep_paths(GibbsSampler, data, priors, ("_tau", "_beta", "_gamma", "_theta", "_sigma", "_n_evals"))
    for fast, general in zip(*draws):
        if fast is None:
            assert general is None
            continue
        np.testing.assert_allclose(fast, general, rtol=0, atol=1e-10)


def test_lockstep_slice_sampler_targets_its_densities():
    """Slice sampling (Neal 2003, stepping out and shrinkage): the lockstep sampler run on
    three conditionally independent scalars per chain (4 chains) leaves N(0, 1), the
    log of a Gamma(3) variable and Exp(1) (a boundary at 0, density -inf beyond)
    invariant: KS tests (scipy) at level 0.001 on 20,000 sweeps thinned by 5 (slice
    updates of these targets are close to independent, so thinned draws are close
    to an iid sample). Its evaluation count matches the one-at-a-time
    ``slice_step`` on the same target (means within 5 standard errors)."""
    rngs = [np.random.default_rng(i) for i in range(4)]

    def logf(x):
        out = np.empty_like(x)
        a, b, c = x[:, 0::3], x[:, 1::3], x[:, 2::3]
        out[:, 0::3] = -0.5 * a * a
        out[:, 1::3] = 3.0 * b - np.exp(b)  # y = exp(b) ~ Gamma(3): density of b is y^3 e^-y
        with np.errstate(invalid="ignore"):
            out[:, 2::3] = np.where(c > 0, -c, -np.inf)
        return out

    x = np.tile([0.0, 0.0, 1.0], 4)
    xs, ns = [], []
    for _ in range(20_000):
        x, n = gm.slice_step_vec(x, logf, rngs)
        xs.append(x)
        ns.append(n)
    xs, ns = np.array(xs)[::5], np.array(ns)
    assert stats.kstest(xs[:, 0::3].ravel(), stats.norm.cdf).pvalue > 0.001
    assert stats.kstest(np.exp(xs[:, 1::3]).ravel(), stats.gamma(3).cdf).pvalue > 0.001
    assert stats.kstest(xs[:, 2::3].ravel(), stats.expon.cdf).pvalue > 0.001
    rng, x0, one = np.random.default_rng(9), 0.0, []
    for _ in range(20_000):
        x0, k = gm.slice_step(x0, lambda v: -0.5 * v * v, rng)
        one.append(k)
    lock = ns[:, 0::3].ravel()
    se = np.hypot(np.std(one) / np.sqrt(len(one)), np.std(lock) / np.sqrt(len(lock)))
    assert abs(np.mean(one) - np.mean(lock)) < 5 * se


def test_lockstep_slice_parts_use_their_own_streams():
    """Chains in lockstep: each part of the scalars draws from its own generator only, so
    a chain's updates are the same whether or not another chain runs beside it
    (reproducibility, common practice). The other chain starts far out in the tails,
    so it needs more stepping out and shrinkage rounds than the first."""
    def logf(x):
        return -0.5 * x * x - np.abs(x) ** 3

    a = np.array([0.3])
    ab = np.array([0.3, 4.0])
    ra, pair = np.random.default_rng(5), [np.random.default_rng(5), np.random.default_rng(6)]
    for _ in range(300):
        a, _ = gm.slice_step_vec(a, logf, [ra])
        ab, _ = gm.slice_step_vec(ab, logf, pair, width=np.array([1.0, 0.05]))
        assert a[0] == ab[0]


@pytest.mark.parametrize("h,c", [(3.0, 0.0), (7.0, 1.3), (12.0, 4.0)])
def test_polya_gamma_integer_shape_moments(h, c):
    """PG(h, c) for an integer h is the sum of h independent PG(1, c) variables (Polson,
    Scott and Windle 2013, definition), with mean h tanh(c/2) / (2c) and variance
    h (sinh c - c) sech^2(c/2) / (4 c^3). The engine draws one PG(n_u, .) per cell of
    n_u observations sharing x'theta; 100,000 seeded variates match both moments
    within 4.5 standard errors (as in test_gibbs.py's PG(1, c) check)."""
    x = draw_pg(np.full(100_000, h), np.full(100_000, c), np.random.default_rng(12))
    n = len(x)
    assert abs(x.mean() - pg_mean(h, c)) < 4.5 * x.std() / np.sqrt(n)
    m4 = np.mean((x - x.mean()) ** 4)
    assert abs(x.var() - pg_var(h, c)) < 4.5 * np.sqrt((m4 - x.var() ** 2) / n)


def test_polya_gamma_cells_give_the_per_observation_precision():
    """Bernoulli: the per-observation weights ``_omega`` (each cell's draw shared equally
    by its observations) rebuild the likelihood precision X_i' Omega_i X_i the sampler
    uses (``likelihood_stats``), participant by participant (a numpy reference loop;
    rounding tolerance)."""
    data = _arm_data("bernoulli")
    s = GibbsSampler(data, PriorSpec(), rng=2)
    s.sweep(3)
    A, _ = s.likelihood_stats()
    w = s._omega
    assert w.shape == data.y.shape and np.all(w > 0)
    for i in range(data.n_participants):
        rows = data.group == i
        X = data.X[rows]
        np.testing.assert_allclose(A[i], X.T @ (w[rows, None] * X), atol=1e-12)
