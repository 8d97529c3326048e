"""Unpooled Thompson sampling: each participant alone, conjugate posteriors per arm.

Three conjugate models (``model`` parameter):

* ``beta-bernoulli``: arm mean ``p ~ Beta(prior_alpha, prior_beta)``; posterior
  ``Beta(prior_alpha + successes, prior_beta + failures)``;
* ``normal``: arm mean ``mu ~ N(prior_mean, prior_sd^2)``, known noise sd
  ``noise_sd``; posterior normal with precision ``1/prior_sd^2 + n/noise_sd^2``;
* ``normal-inverse-gamma``: ``sigma^2 ~ InvGamma(prior_shape, prior_rate)``,
  ``mu | sigma^2 ~ N(prior_mean, sigma^2 / kappa0)`` with
  ``kappa0 = 1 / prior_sd^2``; the marginal posterior of ``mu`` is Student t.

``auto`` picks beta-bernoulli for a bernoulli outcome, normal otherwise.
The probability that each arm is best is computed by one-dimensional
quadrature (:func:`~poolbandit.policies._probability.prob_best`), clipped if
asked, and the arm is drawn from it, so the logged propensity is exact.

References
----------
.. [1] Thompson, W. R. (1933). On the likelihood that one unknown probability
   exceeds another in view of the evidence of two samples. *Biometrika* 25,
   285-294. doi:10.2307/2332286
.. [2] Gelman, A. et al. (2013). *Bayesian Data Analysis*, 3rd ed., sections
   2.4 and 3.3 (conjugate normal and normal-inverse-gamma models).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ._marginals import Beta, Normal, StudentT
from ._gaussian import prob_best_normal
from ._probability import prob_best
from ._stats import ArmStats
from .base import Batch, Policy

__all__ = ["ThompsonPolicy"]


class ThompsonPolicy(Policy):
    """Unpooled Thompson sampling with conjugate per-arm posteriors."""

    kind = "thompson"

    def _start(self) -> None:
        self.stats = ArmStats(self.n_participants, self.n_arms)
        model = self.params.get("model", "auto")
        if model == "auto":
            model = "beta-bernoulli" if self.design.study.outcome == "bernoulli" else "normal"
        self.model = model

    def _update(self, participant, arm, context, reward) -> None:
        self.stats.add(participant, arm, reward)

    def posterior(self, participant: np.ndarray):
        """Distribution of each arm mean (parameters of shape (n, K); scipy.stats-like methods)."""
        s = self.stats
        n, total, squares = s.n[participant], s.total[participant], s.squares[participant]
        p = self.params
        if self.model == "beta-bernoulli":
            return Beta(p["prior_alpha"] + total, p["prior_beta"] + n - total)
        if self.model == "normal":
            prec = 1.0 / p["prior_sd"] ** 2 + n / p["noise_sd"] ** 2
            mean = (p["prior_mean"] / p["prior_sd"] ** 2 + total / p["noise_sd"] ** 2) / prec
            return Normal(mean, 1.0 / np.sqrt(prec))
        # normal-inverse-gamma
        kappa0 = 1.0 / p["prior_sd"] ** 2
        m0, a0, b0 = p["prior_mean"], p["prior_shape"], p["prior_rate"]
        with np.errstate(invalid="ignore", divide="ignore"):
            ybar = np.where(n > 0, total / np.maximum(n, 1), 0.0)
        ss = np.maximum(squares - n * ybar**2, 0.0)
        kappa = kappa0 + n
        mean = (kappa0 * m0 + total) / kappa
        a = a0 + n / 2
        b = b0 + 0.5 * ss + 0.5 * kappa0 * n * (ybar - m0) ** 2 / kappa
        return StudentT(2 * a, mean, np.sqrt(b / (a * kappa)))

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        dist = self.posterior(batch.participant)
        if isinstance(dist, Normal):  # the Gaussian-specialised quadrature, same rule, fewer calls
            return prob_best_normal(dist.loc, dist.scale, nodes=24)
        return prob_best(dist)

    def _exploit_index(self, participant, context) -> np.ndarray:
        return self.posterior(participant).mean()

    def effect_draws(self, ids: list[str], draws: int, rng: np.random.Generator) -> xr.DataArray:
        """Posterior draws of every participant's arm means, dims (chain, draw, participant, arm).

        Independent draws from the conjugate posteriors, shaped like an MCMC
        posterior with one chain so that classification treats pooled and
        unpooled designs alike.
        """
        dist = self.posterior(np.arange(self.n_participants))
        u = rng.random((draws, self.n_participants, self.n_arms))
        x = dist.ppf(np.clip(u, 1e-15, 1 - 1e-15))  # inversion: exact draws from each marginal
        return xr.DataArray(
            x[None], dims=("chain", "draw", "participant", "arm"),
            coords={"chain": [0], "draw": np.arange(draws), "participant": list(ids), "arm": list(self.design.arms)},
            name="effect",
        )
