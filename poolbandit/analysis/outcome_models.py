"""Outcome models for the doubly robust and model-based estimates.

An outcome model is any callable ``model(log, design) -> OutcomePredictions``
(or a bare ``(n, K)`` array) giving, for every row of the log, the predicted
expected reward of every arm in that decision's context. Two are provided:

* :func:`hierarchical_outcome_model`: the hierarchical model of
  :mod:`poolbandit.models` (fast engine), its posterior mean of
  ``x(k, context)' theta_i`` and the posterior draws for the model-based rows;
* :func:`ridge_outcome_model`: a cheap stand-in, an empirical shrinkage
  estimate that pulls each participant's own least-squares coefficients
  towards the pooled ones (a ridge penalty centred on the pooled fit).

Both are fitted on the same data they are then used to correct: no
cross-fitting. The doubly robust estimate stays close to unbiased when the
model is strongly pooled, but a model that follows each participant's own
noisy data closely carries part of the adaptive sampling bias into the
correction (the caveat stated in every report).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd
from scipy.special import expit

from .._random import RngLike, as_generator
from ..models.design_matrix import arm_rows, design_rows

__all__ = ["OutcomePredictions", "OutcomeModel", "ridge_outcome_model", "hierarchical_outcome_model",
           "default_outcome_model", "as_predictions", "hierarchical_available"]


@dataclass(frozen=True)
class OutcomePredictions:
    """Predicted expected rewards of every arm at every row of a log.

    Attributes
    ----------
    mean : ndarray (n, K)
        Point predictions (posterior means for a Bayesian model).
    draws : ndarray (S, n, K) or None
        Posterior draws of the same, when the model has a posterior.
    name : str
        Shown in the tables' notes.
    """

    mean: np.ndarray
    draws: np.ndarray | None = None
    name: str = "outcome model"


OutcomeModel = Callable[[pd.DataFrame, object], "OutcomePredictions | np.ndarray"]


def as_predictions(value, n_rows: int, n_arms: int) -> OutcomePredictions:
    """Check what an outcome model returned and wrap a bare array."""
    pred = value if isinstance(value, OutcomePredictions) else OutcomePredictions(np.asarray(value, dtype=float))
    mean = np.asarray(pred.mean, dtype=float)
    if mean.shape != (n_rows, n_arms):
        raise ValueError(f"the outcome model returned predictions of shape {mean.shape}, "
                         f"expected ({n_rows}, {n_arms}) (rows of the log, arms)")
    if not np.isfinite(mean).all():
        raise ValueError("the outcome model returned non-finite predictions")
    return pred


def ridge_outcome_model(*, penalty: float = 4.0, sequential: bool = False) -> OutcomeModel:
    """A per-participant regression shrunk towards the pooled regression (a random-effects stand-in).

    Parameters
    ----------
    penalty : float, default=4.0
        Ridge penalty on each participant's deviation from the pooled
        coefficients: the ratio of noise variance to between-participant
        variance of a coefficient, in units of observations.
    sequential : bool, default=False
        Predict each decision from data logged at earlier steps only (the
        participant's own earlier rewards and everyone's for the pooled
        part). The predictions are then fixed before the decision's own arm
        and reward, and the doubly robust score is exactly unbiased however
        adaptive the policy (the construction of Hadad et al. 2021).

    Returns
    -------
    callable
        ``model(log, design) -> OutcomePredictions`` (no posterior draws).

    Notes
    -----
    With design rows ``x = onehot(arm) (x) [1, context]``, participant ``i``
    has ``X_i'X_i``, ``X_i'y_i`` and ``A_i = X_i'X_i + penalty I``. The pooled
    coefficients ``b`` solve ``sum_i A_i^-1 X_i'X_i b = sum_i A_i^-1 X_i'y_i``
    (generalised least squares of the random-effects model whose
    coefficient deviations have variance ``sigma^2 / penalty``), and
    ``theta_i = b + A_i^-1 X_i'(y_i - X_i b)`` (their best linear unbiased
    predictions). All of it is vectorised over participants. For a bernoulli
    outcome the linear-probability predictions are clipped into [0, 1].

    References
    ----------
    .. [1] Henderson, C. R. (1975). Best linear unbiased estimation and
       prediction under a selection model. *Biometrics* 31, 423-447.
    .. [2] Hadad, V., Hirshberg, D. A., Zhan, R., Wager, S. and Athey, S.
       (2021). Confidence intervals for policy evaluation in adaptive
       experiments. *PNAS* 118(15), e2014602118.
    """
    if not penalty > 0:
        raise ValueError(f"penalty must be > 0, got {penalty!r}")

    def model(log: pd.DataFrame, design) -> OutcomePredictions:
        k = design.n_arms
        ctx = log[list(design.features)].to_numpy(dtype=float) if design.features else np.zeros((len(log), 0))
        y = log[design.study.reward].to_numpy(dtype=float)
        obs = np.isfinite(y)
        arm = pd.Index(design.arms).get_indexer(log["arm"])
        ids = pd.unique(log["participant"])
        code = pd.Index(ids).get_indexer(log["participant"])
        X = design_rows(np.clip(arm, 0, None), ctx, k)
        p = X.shape[1]
        if sequential:
            step = log["step"].to_numpy() if "step" in log.columns else log["decision"].to_numpy() - 1
            levels, s_code = np.unique(step, return_inverse=True)
        else:
            levels, s_code = np.zeros(1), np.zeros(len(log), dtype=np.int64)
        xtx = np.zeros((len(levels), len(ids), p, p))
        xty = np.zeros((len(levels), len(ids), p))
        np.add.at(xtx, (s_code[obs], code[obs]), X[obs, :, None] * X[obs, None, :])
        np.add.at(xty, (s_code[obs], code[obs]), X[obs] * y[obs][:, None])
        if sequential:  # data of earlier steps only
            xtx = np.cumsum(xtx, axis=0) - xtx
            xty = np.cumsum(xty, axis=0) - xty
        a_inv = np.linalg.inv(xtx + penalty * np.eye(p))  # (S, N, P, P)
        lhs = np.einsum("snpq,snqr->spr", a_inv, xtx) + 1e-9 * np.eye(p)
        b = np.linalg.solve(lhs, np.einsum("snpq,snq->sp", a_inv, xty)[..., None])[..., 0]  # (S, P)
        dev = np.einsum("snpq,snq->snp", a_inv, xty - np.einsum("snpq,sq->snp", xtx, b))
        theta = b[:, None, :] + dev  # (S, N, P)
        mean = np.einsum("nkp,np->nk", arm_rows(ctx, k), theta[s_code, code])
        if design.study.outcome == "bernoulli":
            mean = np.clip(mean, 0.0, 1.0)
        kind = "sequential ridge stand-in" if sequential else "ridge stand-in"
        return OutcomePredictions(mean, None, f"{kind} (penalty {penalty:g})")

    return model


def hierarchical_available() -> bool:
    """Whether the hierarchical model's fitting function is installed in this tree."""
    try:
        from ..models.fit import fit as _fit  # noqa: F401
    except ImportError:
        return False
    return callable(_fit)


def hierarchical_outcome_model(*, engine: str = "fast", chains: int = 2, draws: int = 200, tune: int = 200,
                               keep: int = 200, rng: RngLike = None, fit_kwargs: dict | None = None) -> OutcomeModel:
    """The hierarchical model's posterior predictions (:func:`poolbandit.models.fit.fit`).

    Parameters
    ----------
    engine : {"fast", "full"}, default="fast"
    chains, draws, tune : int, default=2, 200, 200
        Passed to ``fit``: enough for posterior means and a 95 percent interval
        of an average over participants (the Gibbs sampler mixes in a few sweeps).
    keep : int, default=200
        Posterior draws kept (evenly thinned) for the model-based rows.
    rng : Generator, int or None
        Seeds the sampler.
    fit_kwargs : dict, optional
        More arguments for ``fit`` (copied).

    Returns
    -------
    callable
        ``model(log, design) -> OutcomePredictions`` with posterior draws.
        The prediction of arm ``k`` at a decision is ``x(k, context)' theta_i``
        (on the probability scale for a bernoulli outcome), one value per draw.
    """
    g = as_generator(rng)

    def model(log: pd.DataFrame, design) -> OutcomePredictions:
        from ..models.fit import fit

        kwargs = {"engine": engine, "chains": chains, "draws": draws, "tune": tune, **dict(fit_kwargs or {})}
        data = log
        if "propensity" in log.columns and log["propensity"].isna().all():
            # a log without propensities: the model does not use them; placeholders pass validation
            data = log.drop(columns=[c for c in log.columns if c.startswith("prob_")]).assign(propensity=1.0)
        idata = fit(data, design, rng=g, **kwargs)
        post = idata.posterior if hasattr(idata, "posterior") else idata
        theta = post["theta"]
        parts = [str(v) for v in theta["participant"].to_numpy()]
        t = theta.transpose("chain", "draw", "participant", "coef").to_numpy()
        t = t.reshape(-1, t.shape[2], t.shape[3])  # (S, N, P)
        idx = np.unique(np.linspace(0, len(t) - 1, min(keep, len(t))).round().astype(int))
        t = t[idx]
        code = pd.Index(parts).get_indexer(log["participant"].astype(str))
        if (code < 0).any():
            raise ValueError("the posterior lacks some participants of the log")
        ctx = log[list(design.features)].to_numpy(dtype=float) if design.features else np.zeros((len(log), 0))
        rows = arm_rows(ctx, design.n_arms)  # (n, K, P)
        eta = np.einsum("nkp,snp->snk", rows, t[:, code, :])
        pred = expit(eta) if design.study.outcome == "bernoulli" else eta
        return OutcomePredictions(pred.mean(axis=0), pred, f"hierarchical model ({engine} engine)")

    return model


def default_outcome_model(rng: RngLike = None) -> tuple[OutcomeModel, str]:
    """The hierarchical model when its fit exists in this tree, else the ridge stand-in.

    Returns the model and a note saying which one was used.
    """
    if hierarchical_available():
        return hierarchical_outcome_model(rng=rng), "outcome model: the hierarchical model, fast engine"
    return ridge_outcome_model(), ("outcome model: a ridge stand-in (each participant shrunk towards the pooled "
                                   "regression); the hierarchical model's fit is not available in this version")
