"""Simulated participants: true coefficients, covariates, types, enrolment, and
the pre-drawn random streams that make comparisons paired.

Participant ``i``'s true coefficient for arm ``k`` is

.. math::

    \\theta_{ik0} = m_{t(i),k} + \\Gamma_k w_i + s_k z_{ik}, \\qquad
    \\theta_{ik(1+f)} = c_{kf},

with ``m`` the arm means (of the participant's latent type ``t(i)`` when
types are declared), ``w_i`` standard normal covariates, ``s`` the
heterogeneity scales (``arm_sd``) and ``c`` the arm-by-context effects. The
linear predictor in context ``x`` is ``eta_ik = theta_ik0 + sum_f theta_ik(1+f) x_f``;
the expected reward is ``eta`` (gaussian) or ``logistic(eta)`` (bernoulli).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.special import expit

from .._random import RngLike, as_generator, spawn
from ..spec import DesignSpec

__all__ = ["Population", "Streams", "draw_population", "draw_streams", "participant_ids"]


def participant_ids(n: int, prefix: str = "p") -> list[str]:
    """Zero-padded ids ``p001``, ``p002``, ... that sort in roster order."""
    width = max(3, len(str(n)))
    return [f"{prefix}{i + 1:0{width}d}" for i in range(n)]


@dataclass(frozen=True)
class Population:
    """The simulated truth for one replicate.

    Attributes
    ----------
    design : DesignSpec
    ids : list of str
    coef : ndarray, shape (N, K, 1 + F)
        True coefficients (level at the reference context, then interactions).
    covariates : ndarray, shape (N, Q)
    types : ndarray of str, shape (N,)
        Latent type names ("" when the design declares none).
    enrol_step : ndarray of int, shape (N,)
        The study day of each participant's first decision.
    """

    design: DesignSpec
    ids: list[str]
    coef: np.ndarray
    covariates: np.ndarray
    types: np.ndarray
    enrol_step: np.ndarray

    @property
    def size(self) -> int:
        return len(self.ids)

    def linear_predictor(self, participant: np.ndarray, context: np.ndarray) -> np.ndarray:
        """``eta`` of every arm, shape (n, K)."""
        c = self.coef[participant]  # (n, K, 1+F)
        ctx = np.asarray(context, dtype=float).reshape(len(participant), -1)
        return c[:, :, 0] + np.einsum("nkf,nf->nk", c[:, :, 1:], ctx)

    def expected(self, participant: np.ndarray, context: np.ndarray) -> np.ndarray:
        """True expected reward of every arm in ``context``, shape (n, K)."""
        eta = self.linear_predictor(participant, context)
        return expit(eta) if self.design.study.outcome == "bernoulli" else eta

    def truth_table(self) -> pd.DataFrame:
        """participant, arm, mean (expected reward at the reference context), type."""
        n, k = self.size, self.design.n_arms
        mean = self.expected(np.arange(n), np.zeros((n, len(self.design.features))))
        return pd.DataFrame({
            "participant": np.repeat(self.ids, k),
            "arm": np.tile(self.design.arms, n),
            "mean": mean.reshape(-1),
            "type": np.repeat(self.types, k),
        })


@dataclass(frozen=True)
class Streams:
    """Pre-drawn randomness of the environment, shared by every policy (common random numbers).

    ``noise[i, d, k]`` is the reward noise of participant ``i`` at decision
    ``d`` (0-based) had arm ``k`` been given: a standard normal (gaussian) or a
    uniform (bernoulli: reward = ``u < p``). ``attend`` and ``feature`` are
    uniforms and standard normals for sessions and context features;
    ``n_decisions`` is how many decisions each participant makes before
    dropping out.
    """

    noise: np.ndarray
    attend: np.ndarray
    feature: np.ndarray
    n_decisions: np.ndarray


def draw_population(design: DesignSpec, rng: RngLike = None, *, size: int | None = None) -> Population:
    """Draw one population from ``design.population``.

    Parameters
    ----------
    design : DesignSpec
    rng : Generator, int or None
    size : int, optional
        Number of participants (default ``design.population.size``).
    """
    rng = as_generator(rng)
    pop = design.population
    n = int(size or pop.size)
    k, f, q = design.n_arms, len(design.features), len(design.covariates)
    if pop.types:
        shares = np.array([t.share for t in pop.types])
        t_idx = rng.choice(len(pop.types), size=n, p=shares / shares.sum())
        means = np.array([t.arm_means for t in pop.types])[t_idx]
        types = np.array([pop.types[j].name for j in t_idx], dtype=object)
    else:
        means = np.broadcast_to(np.array(pop.arm_means), (n, k))
        types = np.full(n, "", dtype=object)
    w = rng.standard_normal((n, q))
    gamma = np.array(pop.covariate_effects, dtype=float).reshape(k, q)
    z = rng.standard_normal((n, k))
    coef = np.empty((n, k, 1 + f))
    coef[:, :, 0] = means + w @ gamma.T + np.array(pop.arm_sd) * z
    coef[:, :, 1:] = np.array(pop.context_effects, dtype=float).reshape(k, f)
    wave = np.repeat(np.arange(pop.waves), int(np.ceil(n / pop.waves)))[:n]
    return Population(design, participant_ids(n), coef, w, types, wave * pop.wave_gap)


def draw_streams(design: DesignSpec, size: int, rng: RngLike = None) -> Streams:
    """Draw the environment's randomness for ``size`` participants (see :class:`Streams`)."""
    g_noise, g_attend, g_feature, g_drop = spawn(rng, 4)
    h, k, f = design.study.horizon, design.n_arms, len(design.features)
    if design.study.outcome == "bernoulli":
        noise = g_noise.random((size, h, k))
    else:
        noise = g_noise.standard_normal((size, h, k))
    attend = g_attend.random((size, h))
    feature = g_feature.random((size, h, f))
    drop = g_drop.random((size, h)) < design.population.dropout
    drop[:, -1] = True
    n_decisions = np.argmax(drop, axis=1) + 1
    return Streams(noise, attend, feature, n_decisions)
