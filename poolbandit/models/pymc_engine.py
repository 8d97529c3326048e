r"""The full engine: the hierarchical model in PyMC, sampled with NUTS.

Model
-----
For participant :math:`i = 1..N` and observation :math:`t`,

.. math::

    y_{it} &= x_{it}'\theta_i + e_{it}, \qquad
    \theta_i = \beta + \Gamma w_i + b_i, \qquad b_i \sim N(0, \Sigma), \\
    e_{it} &\sim N(0, \sigma^2) \ \text{(gaussian)}, \qquad
    \Pr(y_{it} = 1) = \operatorname{logit}^{-1}(x_{it}'\theta_i) \ \text{(bernoulli)},

with :math:`x_{it}` the design row of :mod:`poolbandit.models.design_matrix`
(``P`` coefficients), :math:`w_i` the ``Q`` participant covariates (possibly
none) and :math:`\Gamma` a ``P x Q`` matrix. Only the coefficients marked in
``ModelData.random`` have participant deviations :math:`b_i`; the others are
shared by everyone (their entries of ``tau`` are reported as 0). A gaussian
outcome either has an unknown common noise sd :math:`\sigma` or a known
per-observation sd (``ModelData.obs_sd``, as in the eight-schools data).

Priors (:class:`poolbandit.spec.PriorSpec`)
-------------------------------------------
.. math::

    \beta_p \sim N(0, \text{beta\_sd}^2), \quad
    \Gamma_{pq} \sim N(0, \text{gamma\_sd}^2), \quad
    \sigma \sim \text{HalfNormal}(\text{sigma\_scale}), \\
    \tau_p \sim \text{HalfNormal}(\text{tau\_scale})
    \ \text{or}\ \text{HalfCauchy}(\text{tau\_scale}) \ (\text{tau\_family}).

``covariance = "diagonal"``: :math:`\Sigma = \operatorname{diag}(\tau^2)` over
the random coefficients. ``covariance = "full"``:
:math:`\Sigma = \operatorname{diag}(\tau)\,\Omega\,\operatorname{diag}(\tau)`
with :math:`\Omega \sim \text{LKJ}(\text{lkj\_eta})` [2]_ and the same prior on
:math:`\tau` (with one random coefficient this is the diagonal model).

Parameterisation
----------------
Non-centred [1]_: :math:`b_i = \operatorname{diag}(\tau) z_i` (diagonal) or
:math:`b_i = L z_i` with :math:`L` the Cholesky factor of :math:`\Sigma`
(full), :math:`z_i \sim N(0, I)`. This removes the funnel between
:math:`\tau` and :math:`b` that centred hierarchies show when each
participant has few observations, the usual case in short studies.

Mixture population (``priors.population = "mixture"``): the model of
:mod:`poolbandit.models.mixture` with the labels marginalised, ``theta``
centred (``sum_i log sum_c pi_c N(theta_i; mu_c + Gamma w_i, Sigma)`` as a
potential) and the component means non-centred around their centre; see
``_build_mixture_model``. No ordering constraint on the components: chains
may use different labellings, so ``weight`` and ``component_mean`` per label
are not comparable across chains (everything else is label-invariant).

Posterior variables (the same names as the fast engine): ``beta (coef)``,
``gamma (coef, covariate)`` when ``Q > 0``, ``tau (coef)``, ``sigma ()`` for a
gaussian outcome with unknown noise, ``theta (participant, coef)`` and, with a
full covariance, ``corr (coef, coef_)`` (the identity outside the block of
random coefficients). ``observed_data`` holds ``y (obs)``.

Compilation
-----------
A PyMC model and its NUTS step are built once per model structure (numbers of
participants, coefficients and covariates, outcome, noise kind, random mask,
priors, NUTS settings) and kept in a small in-process cache; the data live in
shared variables (``pm.Data``) and are swapped with ``pm.set_data``, so a
second fit of the same structure does not compile again. Chains start from
the model's initial point jittered by U(-1, 1) in the unconstrained space
(as PyMC's ``jitter+adapt_diag`` does), with the jitter and the integer seed
of :func:`pymc.sample` drawn from ``rng``.

References
----------
.. [1] Papaspiliopoulos, O., Roberts, G. O. and Skold, M. (2007). A general
   framework for the parametrization of hierarchical models. *Statistical
   Science* 22(1), 59-73. https://doi.org/10.1214/088342307000000014
.. [2] Lewandowski, D., Kurowicka, D. and Joe, H. (2009). Generating random
   correlation matrices based on vines and extended onion method. *Journal of
   Multivariate Analysis* 100(9), 1989-2001. https://doi.org/10.1016/j.jmva.2009.04.008
.. [3] Hoffman, M. D. and Gelman, A. (2014). The No-U-Turn sampler. *Journal of
   Machine Learning Research* 15, 1593-1623.
"""

from __future__ import annotations

import inspect
import logging
import os
from collections import OrderedDict
from dataclasses import dataclass
from typing import Any

import numpy as np
import xarray as xr

from .._random import RngLike, as_generator
from ..spec import PriorSpec
from .data import ModelData

__all__ = ["sample_full", "clear_model_cache"]

#: NUTS settings that change the step object (the rest of ``sample_kwargs`` goes to ``pm.sample``).
_STEP_KEYS = ("max_treedepth", "early_max_treedepth", "step_scale", "adapt_step_size")
#: ``pm.sample`` arguments this module sets itself.
_OWN_KEYS = ("draws", "tune", "chains", "step", "initvals", "random_seed", "var_names", "model",
             "return_inferencedata", "target_accept", "init")
_CACHE_SIZE = 8


@dataclass
class _Compiled:
    """A built model, its NUTS step and its untransformed-space initial point."""

    model: Any
    step: Any
    start: dict[str, np.ndarray]
    var_names: list[str]


_CACHE: "OrderedDict[tuple, _Compiled]" = OrderedDict()


def clear_model_cache() -> None:
    """Forget every cached model and NUTS step (frees their compiled functions)."""
    _CACHE.clear()


def sample_full(
    data: ModelData,
    priors: PriorSpec | None = None,
    *,
    chains: int = 4,
    draws: int = 1000,
    tune: int = 1000,
    target_accept: float | None = None,
    rng: RngLike = None,
    progress: bool = False,
    sample_kwargs: dict | None = None,
):
    """Sample the hierarchical model with PyMC's NUTS.

    Parameters
    ----------
    data : ModelData
        Outcomes, design rows, participant index and covariates.
    priors : PriorSpec, optional
        Prior scales; default ``PriorSpec()`` (the documented defaults).
    chains : int, default=4
        Independent chains, each started from its own jittered point.
    draws : int, default=1000
        Kept draws per chain.
    tune : int, default=1000
        Warm-up iterations per chain (step size and diagonal mass matrix
        adaptation), discarded.
    target_accept : float, optional
        NUTS target acceptance rate, in (0, 1). ``None`` resolves to 0.9 for
        the normal population model and to 0.95 for the mixture (its centred
        ``theta`` has a funnel with ``tau``: in the calibration scenario 0.9
        gave about half the draws divergent, 0.95 under 2%).
    rng : numpy.random.Generator, int or None
        Source of the chains' jitter and of the integer seed of ``pm.sample``.
    progress : bool, default=False
        Show PyMC's progress bar.
    sample_kwargs : dict, optional
        Extra arguments for :func:`pymc.sample` (copied), for example
        ``{"cores": 1}``; NUTS settings ``max_treedepth``, ``step_scale``,
        ``early_max_treedepth`` and ``adapt_step_size`` go to the step. Default
        ``cores`` is ``min(chains, os.cpu_count())`` (chains in parallel processes).

    Returns
    -------
    arviz.InferenceData
        ``posterior`` with ``beta (coef)``, ``gamma (coef, covariate)`` when
        there are covariates, ``tau (coef)`` (0 for shared coefficients),
        ``sigma ()`` for a gaussian outcome without known noise sd,
        ``theta (participant, coef)`` and ``corr (coef, coef_)`` for a full
        covariance; with the mixture population also ``weight
        (component)``, ``component_mean (component, coef)``,
        ``component_center (coef)`` and ``component_sd (coef)`` (``beta`` is
        then ``sum_c weight_c component_mean_c``); ``observed_data`` with
        ``y (obs)``; ``sample_stats`` with PyMC's NUTS statistics
        (``diverging``, ...).

    Raises
    ------
    ValueError
        If an outcome is not finite (or not 0/1 for a bernoulli outcome), a
        known noise sd is not positive, or an option is out of range.

    Examples
    --------
    >>> import numpy as np
    >>> from poolbandit.models.data import ModelData
    >>> g = np.repeat(np.arange(5), 4)
    >>> data = ModelData.from_arrays(np.sin(np.arange(20.0)), np.ones(20), g)
    >>> idata = sample_full(data, chains=2, draws=50, tune=50, rng=1)  # doctest: +SKIP
    >>> idata.posterior["theta"].dims  # doctest: +SKIP
    ('chain', 'draw', 'participant', 'coef')
    """
    import pymc as pm

    priors = PriorSpec() if priors is None else priors
    if target_accept is None:
        target_accept = 0.95 if priors.population == "mixture" else 0.9
    _check_options(chains, draws, tune, target_accept)
    _check_data(data)
    if priors.population == "mixture" and not np.all(np.asarray(data.random, dtype=bool)):
        raise ValueError("the mixture population model needs every coefficient to vary between participants "
                         "(data.random all true)")
    rng = as_generator(rng)
    kwargs = dict(sample_kwargs or {})
    own = sorted(set(kwargs) & set(_OWN_KEYS))
    if own:
        raise ValueError(f"sample_kwargs may not set {own}: they are arguments of sample_full")
    nuts = {k: kwargs.pop(k) for k in _STEP_KEYS if k in kwargs}
    kwargs.setdefault("cores", min(chains, os.cpu_count() or 1))
    kwargs.setdefault("compute_convergence_checks", False)
    if "quiet" in inspect.signature(pm.sample).parameters:  # PyMC >= 5.2x
        kwargs.setdefault("quiet", not progress)

    compiled = _compiled_for(data, priors, target_accept, nuts)
    pm.set_data(_data_values(data), model=compiled.model)
    # A reused step must start like a new one: PyMC resets tuning for sequential
    # chains but hands parallel workers the step as it is (adapted mass matrix,
    # step size and "tuning finished" from the previous fit).
    compiled.step.reset_tuning()
    seed = int(rng.integers(0, 2**31 - 1))
    initvals = [_jittered(compiled.start, rng) for _ in range(chains)]
    logger = logging.getLogger("pymc")
    level = logger.level
    if not progress:
        logger.setLevel(logging.WARNING)
    try:
        idata = pm.sample(
            draws=draws, tune=tune, chains=chains, step=compiled.step, initvals=initvals,
            random_seed=seed, var_names=compiled.var_names, model=compiled.model,
            progressbar=progress, return_inferencedata=True, **kwargs,
        )
    finally:
        logger.setLevel(level)
    return _relabel(idata, data, priors)


# --------------------------------------------------------------------------
# The model and its cache
# --------------------------------------------------------------------------
def _structure(data: ModelData, priors: PriorSpec, target_accept: float, nuts: dict) -> tuple:
    return (
        data.n_participants, data.n_coef, len(data.covariates), data.outcome, data.obs_sd is not None,
        tuple(bool(r) for r in data.random), priors, float(target_accept), tuple(sorted(nuts.items())),
    )


def _compiled_for(data: ModelData, priors: PriorSpec, target_accept: float, nuts: dict) -> _Compiled:
    key = _structure(data, priors, target_accept, nuts)
    if key in _CACHE:
        _CACHE.move_to_end(key)
        return _CACHE[key]
    import pymc as pm
    from pymc.blocking import DictToArrayBijection
    from pymc.step_methods.hmc.quadpotential import QuadPotentialDiagAdapt

    model, var_names = _build_model(data, priors)
    with model:
        start = {k: np.asarray(v) for k, v in model.initial_point().items()}
        mean = DictToArrayBijection.map(start).data
        potential = QuadPotentialDiagAdapt(len(mean), mean, np.ones_like(mean), 10)
        step = pm.NUTS(potential=potential, target_accept=target_accept, **nuts)
    compiled = _Compiled(model, step, start, var_names)
    _CACHE[key] = compiled
    while len(_CACHE) > _CACHE_SIZE:
        _CACHE.popitem(last=False)
    return compiled


def _jittered(start: dict[str, np.ndarray], rng: np.random.Generator) -> dict:
    """``start`` plus U(-1, 1) jitter, in the unconstrained space (keys are value-variable names)."""
    import pytensor.tensor as pt

    # Constants rather than arrays: PyMC maps transformed values back through
    # symbolic transforms, some of which (the LKJ Cholesky one) index symbolically.
    return {name: pt.as_tensor_variable(value + rng.uniform(-1.0, 1.0, size=np.shape(value)))
            for name, value in start.items()}


def _data_values(data: ModelData) -> dict[str, np.ndarray]:
    values = {"X": np.asarray(data.X, dtype=float), "group": np.asarray(data.group, dtype=np.int64)}
    values["y"] = data.y.astype(np.int64) if data.outcome == "bernoulli" else np.asarray(data.y, dtype=float)
    if data.covariates:
        values["W"] = np.asarray(data.W, dtype=float)
    if data.obs_sd is not None:
        values["obs_sd"] = np.asarray(data.obs_sd, dtype=float)
    return values


def _tau_prior(priors: PriorSpec, name: str | None, *, dims=None, shape=None):
    import pymc as pm

    dist = pm.HalfCauchy if priors.tau_family == "half-cauchy" else pm.HalfNormal
    scale = {"beta": priors.tau_scale} if dist is pm.HalfCauchy else {"sigma": priors.tau_scale}
    if name is None:
        return dist.dist(**scale, shape=shape)
    return dist(name, **scale, dims=dims)


def _build_model(data: ModelData, priors: PriorSpec):
    """A PyMC model of the structure of ``data`` (values are swapped later)."""
    import pymc as pm
    import pytensor.tensor as pt

    if priors.population == "mixture":
        return _build_mixture_model(data, priors)

    n_part, n_coef, n_cov = data.n_participants, data.n_coef, len(data.covariates)
    rand = np.flatnonzero(data.random)
    n_rand = len(rand)
    full = priors.covariance == "full" and n_rand >= 2
    coords = {"coef": list(data.coef), "participant": list(data.participants)}
    if n_cov:
        coords["covariate"] = list(data.covariates)
    if n_rand:
        coords["random_coef"] = [data.coef[j] for j in rand]
    if priors.covariance == "full":
        coords["coef_"] = list(data.coef)
    values = _data_values(data)
    var_names = ["beta", "tau", "theta"]
    with pm.Model(coords=coords) as model:
        X = pm.Data("X", values["X"])
        group = pm.Data("group", values["group"])
        y = pm.Data("y", values["y"])
        beta = pm.Normal("beta", 0.0, priors.beta_sd, dims="coef")
        theta = pt.zeros((n_part, n_coef)) + beta[None, :]
        if n_cov:
            W = pm.Data("W", values["W"])
            gamma = pm.Normal("gamma", 0.0, priors.gamma_sd, dims=("coef", "covariate"))
            # elementwise products, not dot: tiny matrices, and no BLAS needed
            theta = theta + (W[:, None, :] * gamma[None, :, :]).sum(axis=-1)
            var_names.insert(1, "gamma")
        if n_rand:
            z = pm.Normal("z", 0.0, 1.0, dims=("participant", "random_coef"))
            if full:
                chol, corr, stds = pm.LKJCholeskyCov(
                    "chol_cov", n=n_rand, eta=priors.lkj_eta, compute_corr=True, store_in_trace=False,
                    sd_dist=_tau_prior(priors, None, shape=n_rand),
                )
                # the correlation matrix over all coefficients: identity outside the random block
                pm.Deterministic("corr", pt.set_subtensor(pt.eye(n_coef)[np.ix_(rand, rand)], corr),
                                 dims=("coef", "coef_"))
                tau_r, dev = stds, (z[:, None, :] * chol[None, :, :]).sum(axis=-1)  # b_i = L z_i
            else:
                every = n_rand == n_coef
                tau_r = _tau_prior(priors, "tau" if every else "tau_random", dims="coef" if every else "random_coef")
                dev = z * tau_r[None, :]
            if n_rand == n_coef:
                theta = theta + dev
                if full:
                    pm.Deterministic("tau", tau_r, dims="coef")
            else:
                theta = pt.set_subtensor(theta[:, rand], theta[:, rand] + dev)
                pm.Deterministic("tau", pt.set_subtensor(pt.zeros(n_coef)[rand], tau_r), dims="coef")
        else:
            pm.Deterministic("tau", pt.zeros(n_coef), dims="coef")
        if priors.covariance == "full" and not full:
            pm.Deterministic("corr", pt.eye(n_coef), dims=("coef", "coef_"))
        if priors.covariance == "full":
            var_names.append("corr")
        theta = pm.Deterministic("theta", theta, dims=("participant", "coef"))
        _outcome(data, priors, values, X, group, y, theta, var_names)
    return model, var_names


def _outcome(data: ModelData, priors: PriorSpec, values, X, group, y, theta, var_names: list[str]) -> None:
    """The likelihood of the outcomes given every participant's ``theta`` (inside the model context)."""
    import pymc as pm

    eta = (X * theta[group]).sum(axis=1)
    if data.outcome == "bernoulli":
        pm.Bernoulli("y_obs", logit_p=eta, observed=y)
    elif data.obs_sd is not None:
        pm.Normal("y_obs", eta, pm.Data("obs_sd", values["obs_sd"]), observed=y)
    else:
        sigma = pm.HalfNormal("sigma", priors.sigma_scale)
        pm.Normal("y_obs", eta, sigma, observed=y)
        var_names.append("sigma")


def _build_mixture_model(data: ModelData, priors: PriorSpec):
    """The mixture population model (:mod:`poolbandit.models.mixture`) in PyMC, labels marginalised.

    ``theta`` is centred (a flat variable whose density is the potential
    ``sum_i log sum_c pi_c N(theta_i; mu_c + Gamma w_i, Sigma)``); the
    component means are non-centred around their centre, ``mu_c = mu_0 +
    omega * u_c`` with ``u_c ~ N(0, I)``. No ordering constraint is imposed:
    chains may settle on different labellings, which changes nothing in
    ``theta``, ``beta``, ``tau``, ``sigma`` or ``gamma``.
    """
    import pymc as pm
    import pytensor.tensor as pt
    from pytensor.tensor.slinalg import solve_triangular

    n_part, n_coef, n_cov = data.n_participants, data.n_coef, len(data.covariates)
    K = int(priors.components)
    full = priors.covariance == "full" and n_coef >= 2
    coords = {"coef": list(data.coef), "participant": list(data.participants), "component": list(range(K))}
    if n_cov:
        coords["covariate"] = list(data.covariates)
    if priors.covariance == "full":
        coords["coef_"] = list(data.coef)
    values = _data_values(data)
    var_names = ["beta", "tau", "theta", "weight", "component_mean", "component_center", "component_sd"]
    with pm.Model(coords=coords) as model:
        X = pm.Data("X", values["X"])
        group = pm.Data("group", values["group"])
        y = pm.Data("y", values["y"])
        weight = pm.Dirichlet("weight", a=np.full(K, float(priors.mixture_concentration)), dims="component")
        center = pm.Normal("component_center", 0.0, priors.beta_sd, dims="coef")
        spread = _tau_prior(priors, "component_sd", dims="coef")
        raw = pm.Normal("component_raw", 0.0, 1.0, dims=("component", "coef"))
        mu = pm.Deterministic("component_mean", center[None, :] + spread[None, :] * raw, dims=("component", "coef"))
        pm.Deterministic("beta", (weight[:, None] * mu).sum(axis=0), dims="coef")
        theta = pm.Flat("theta", dims=("participant", "coef"))
        dev = theta
        if n_cov:
            W = pm.Data("W", values["W"])
            gamma = pm.Normal("gamma", 0.0, priors.gamma_sd, dims=("coef", "covariate"))
            dev = dev - (W[:, None, :] * gamma[None, :, :]).sum(axis=-1)
            var_names.insert(1, "gamma")
        d = dev[:, None, :] - mu[None, :, :]  # (N, K, P)
        if full:
            chol, corr, stds = pm.LKJCholeskyCov(
                "chol_cov", n=n_coef, eta=priors.lkj_eta, compute_corr=True, store_in_trace=False,
                sd_dist=_tau_prior(priors, None, shape=n_coef),
            )
            pm.Deterministic("corr", corr, dims=("coef", "coef_"))
            pm.Deterministic("tau", stds, dims="coef")
            r = solve_triangular(chol, d.reshape((n_part * K, n_coef)).T, lower=True).T.reshape((n_part, K, n_coef))
            log_det = pt.log(pt.diag(chol)).sum()
        else:
            tau = _tau_prior(priors, "tau", dims="coef")
            r = d / tau[None, None, :]
            log_det = pt.log(tau).sum()
            if priors.covariance == "full":
                pm.Deterministic("corr", pt.eye(n_coef), dims=("coef", "coef_"))
        if priors.covariance == "full":
            var_names.append("corr")
        log_comp = pt.log(weight)[None, :] - 0.5 * (r * r).sum(axis=-1) - log_det  # (N, K), constants dropped
        pm.Potential("theta_mixture", pm.math.logsumexp(log_comp, axis=1).sum())
        _outcome(data, priors, values, X, group, y, theta, var_names)
    return model, var_names


def _relabel(idata, data: ModelData, priors: PriorSpec):
    """Put this data's labels on the posterior (the cached model may carry another's)."""
    coords = {"coef": list(data.coef), "participant": list(data.participants)}
    if data.covariates:
        coords["covariate"] = list(data.covariates)
    coords["coef_"] = list(data.coef)
    post = idata.posterior
    idata.posterior = post.assign_coords({k: v for k, v in coords.items() if k in post.dims})
    for group in ("constant_data", "observed_data"):
        if group in idata.groups():
            delattr(idata, group)
    idata.add_groups({"observed_data": xr.Dataset({"y": ("obs", np.asarray(data.y))},
                                                  coords={"obs": np.arange(len(data.y))})})
    idata.posterior.attrs.update({
        "engine": "full", "sampler": "pymc NUTS", "outcome": data.outcome,
        "covariance": priors.covariance, "tau_family": priors.tau_family, "population": priors.population,
    })
    if priors.population == "mixture":
        idata.posterior.attrs["components"] = int(priors.components)
    return idata


# --------------------------------------------------------------------------
# Checks
# --------------------------------------------------------------------------
def _check_options(chains: int, draws: int, tune: int, target_accept: float) -> None:
    for name, value, low in (("chains", chains, 1), ("draws", draws, 1), ("tune", tune, 0)):
        if not isinstance(value, (int, np.integer)) or value < low:
            raise ValueError(f"The {name!r} parameter of sample_full must be an int >= {low}. Got {value!r} instead.")
    if not 0.0 < float(target_accept) < 1.0:
        raise ValueError(f"The 'target_accept' parameter of sample_full must be in (0, 1). Got {target_accept!r} instead.")


def _check_data(data: ModelData) -> None:
    bad = np.flatnonzero(~np.isfinite(data.y))
    if len(bad):
        raise ValueError(f"y has {len(bad)} non-finite value(s) (first at row {bad[0] + 1}: {float(data.y[bad[0]])!r}); "
                         "drop missed sessions before fitting")
    if data.outcome == "bernoulli":
        bad = np.flatnonzero((data.y != 0) & (data.y != 1))
        if len(bad):
            raise ValueError(f"a bernoulli outcome must be 0 or 1; row {bad[0] + 1} has {float(data.y[bad[0]])!r}")
        if data.obs_sd is not None:
            raise ValueError("obs_sd (a known noise sd) applies to a gaussian outcome only")
    elif data.outcome != "gaussian":
        raise ValueError(f'outcome must be "gaussian" or "bernoulli", got {data.outcome!r}')
    if data.obs_sd is not None:
        sd = np.asarray(data.obs_sd, dtype=float)
        if sd.shape != data.y.shape or not (np.isfinite(sd) & (sd > 0)).all():
            raise ValueError("obs_sd must hold one finite positive sd per observation")
    if len(data.group) and (data.group.min() < 0 or data.group.max() >= data.n_participants):
        raise ValueError(f"group indices must lie in [0, {data.n_participants}); got "
                         f"[{data.group.min()}, {data.group.max()}]")
