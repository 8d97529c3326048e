"""The Bayes-optimal finite-horizon policy for one participant and two arms (simulation only).

With two arms, independent normal priors ``theta_k ~ N(mu_k, s_k^2)``, a
known noise sd ``sigma`` and ``T`` decisions, the policy that maximises the
expected total reward is found by backward induction over the sufficient
statistic: the number of pulls of each arm ``(n_0, n_1)`` (which fixes the
posterior variances) and the posterior means ``(m_0, m_1)``. It is the
physical limit of any policy for a participant whose prior is the true
population distribution: no index rule, pooled or not, can have a smaller
expected regret on that population.

Reduction to one dimension
--------------------------
Shifting both posterior means by ``c`` shifts every future reward by ``c``,
so with ``r`` decisions left the value is
``V_r(n_0, n_1, m_0, m_1) = r m_1 + W_r(n_0, n_1, d)`` with ``d = m_0 - m_1``,
and

.. math::

    W_r(n_0, n_1, d) = \\max\\big\\{ d + E\\,W_{r-1}(n_0 + 1, n_1, d + \\tilde s_0(n_0) Z),\\;
    E\\,W_{r-1}(n_0, n_1 + 1, d - \\tilde s_1(n_1) Z) \\big\\},

:math:`W_0 = 0`, :math:`Z \\sim N(0, 1)`, where
:math:`\\tilde s_k(n)^2 = v_k(n)^2 / (v_k(n) + \\sigma^2)` is the variance of
the change of arm ``k``'s posterior mean from one more observation and
:math:`v_k(n) = (1/s_k^2 + n/\\sigma^2)^{-1}` its posterior variance after
``n`` (the predictive distribution of the next posterior mean; Bellman [1]_,
Gittins, Glazebrook and Weber [2]_ chapter 1 for the finite-horizon
formulation). ``W`` is computed on a fine uniform grid of ``d``: the
expectation of ``U_r(d) = W_r(d) - r max(d, 0)`` is a convolution with a
normal kernel (sampled on the grid), and that of ``r max(d, 0)`` is exact
(``d Phi(d/s) + s phi(d/s)``). ``U`` tends to 0 at both ends of the grid
(far above, arm 0 is pulled to the end; far below, arm 1), so holding it at
its end values beyond the grid is harmless.

The policy then pulls, in state ``(n_0, n_1, m_0, m_1)`` with ``r``
decisions left, the arm whose term of the maximum is larger (ties split).
Its expected total reward for a participant drawn from the prior is
``T mu_1 + W_T(0, 0, mu_0 - mu_1)``, and its Bayes regret is
``T E[max(theta_0, theta_1)]`` minus that, with
``E[max] = mu_1 + delta Phi(delta / s) + s phi(delta / s)``,
``delta = mu_0 - mu_1``, ``s^2 = s_0^2 + s_1^2``.

Delayed feedback and missed sessions: in the simulator a participant decides
once per study day and the rewards of a day reach the policy the next day,
before its next decision, so for one participant this is the same as
immediate feedback. A missed session (adherence < 1) leaves ``n_0 + n_1``
below ``t - 1``; the table covers every ``(n_0, n_1)`` with
``n_0 + n_1 <= T - r``, so the policy stays defined, but it is then only
optimal for the model in which every session is observed. Dropout shortens a
participant's horizon without the policy knowing: the limit is computed for
``adherence = 1`` and ``dropout = 0``.

References
----------
.. [1] Bellman, R. (1956). A problem in the sequential design of experiments.
   *Sankhya* 16(3/4), 221-229.
.. [2] Gittins, J., Glazebrook, K. and Weber, R. (2011). *Multi-armed Bandit
   Allocation Indices*, 2nd ed. Wiley. doi:10.1002/9780470980033
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import gaussian_filter1d
from scipy.special import ndtr

from ..errors import DesignError
from ._probability import floor_and_split
from .base import Batch
from .pooled import OraclePriorThompsonPolicy

__all__ = ["BayesOptimalSolution", "solve_two_arm", "BayesOptimalPolicy"]


@dataclass(frozen=True)
class BayesOptimalSolution:
    """The solved backward induction (see the module docstring).

    Attributes
    ----------
    horizon : int
    prior_sd : tuple of float
        ``(s_0, s_1)``.
    noise_sd : float
    grid : ndarray (G,)
        Uniform grid of ``d = m_0 - m_1``.
    advantage : ndarray (M, G)
        Term of arm 0 minus term of arm 1 of every stored state (row ``row[r, n_0, n_1]``).
    row : ndarray of int (T + 1, T + 1, T + 1)
        Row of ``advantage`` for ``(r, n_0, n_1)`` (-1: not stored).
    start : ndarray (G,)
        ``W_T(0, 0, d)``.
    """

    horizon: int
    prior_sd: tuple[float, float]
    noise_sd: float
    grid: np.ndarray
    advantage: np.ndarray
    row: np.ndarray
    start: np.ndarray

    def value(self, prior_mean) -> float:
        """Expected total reward of the optimal policy for a participant with prior means ``(mu_0, mu_1)``."""
        mu0, mu1 = (float(x) for x in prior_mean)
        return self.horizon * mu1 + float(np.interp(mu0 - mu1, self.grid, self.start))

    def regret(self, prior_mean) -> float:
        """Expected cumulative regret (Bayes regret) of the optimal policy over the horizon."""
        mu0, mu1 = (float(x) for x in prior_mean)
        s = float(np.hypot(*self.prior_sd))
        delta = mu0 - mu1
        if s > 0:
            e_max = mu1 + delta * ndtr(delta / s) + s * np.exp(-0.5 * (delta / s) ** 2) / np.sqrt(2 * np.pi)
        else:
            e_max = max(mu0, mu1)
        return self.horizon * float(e_max) - self.value(prior_mean)

    def advantage_at(self, remaining: np.ndarray, n0: np.ndarray, n1: np.ndarray, d: np.ndarray) -> np.ndarray:
        """Term of arm 0 minus term of arm 1 at states (vectorised; linear interpolation in ``d``)."""
        rows = self.row[np.asarray(remaining), np.asarray(n0), np.asarray(n1)]
        if np.any(rows < 0):
            raise ValueError("state outside the solved table (more observations than decisions made)")
        g = self.grid
        h = g[1] - g[0]
        x = np.clip((np.asarray(d, dtype=float) - g[0]) / h, 0.0, len(g) - 1.000001)
        j = np.floor(x).astype(int)
        frac = x - j
        a = self.advantage
        return (1 - frac) * a[rows, j] + frac * a[rows, j + 1]


def _change_sd(prior_sd: float, noise_sd: float, n: np.ndarray) -> np.ndarray:
    """sd of the change of the posterior mean from one more observation, after ``n``."""
    if prior_sd <= 0:
        return np.zeros_like(n, dtype=float)
    v = 1.0 / (1.0 / prior_sd**2 + n / noise_sd**2)
    return v / np.sqrt(v + noise_sd**2)


@functools.lru_cache(maxsize=8)
def _solve_cached(horizon: int, sd0: float, sd1: float, noise: float, center: float, points: int):
    T = horizon
    half = abs(center) + 8.0 * max(float(np.hypot(sd0, sd1)), 1e-6)
    grid = np.linspace(center - half, center + half, points)
    h = grid[1] - grid[0]
    ns = np.arange(T + 1, dtype=float)
    change = (_change_sd(sd0, noise, ns), _change_sd(sd1, noise, ns))  # sd of the change of d (sign irrelevant)
    row = np.full((T + 1, T + 1, T + 1), -1, dtype=np.int64)
    adv_rows: list[np.ndarray] = []
    pos = np.maximum(grid, 0.0)
    # U_r(n0, n1, d) = W_r - r max(d, 0), kept for the previous r only
    U_prev = np.zeros((T + 1, T + 1, points))
    start = pos * 0.0
    for r in range(1, T + 1):
        top = T - r  # states with n0 + n1 <= top
        E = np.zeros((2, top + 1, top + 1, points))  # E W_{r-1} after pulling arm k, by (n0, n1)
        for n in range(top + 1):
            for k in (0, 1):
                sd = change[k][n]
                e_pos = _expect_positive(grid, sd)
                if k == 0:  # n0 = n, every n1 <= top - n: next state (n + 1, n1)
                    E[0, n, : top - n + 1] = _smooth(U_prev[n + 1, : top - n + 1], sd / h) + (r - 1) * e_pos
                else:  # n1 = n, every n0 <= top - n: next state (n0, n + 1)
                    E[1, : top - n + 1, n] = _smooth(U_prev[: top - n + 1, n + 1], sd / h) + (r - 1) * e_pos
        q0 = grid + E[0]
        q1 = E[1]
        U_now = np.zeros((T + 1, T + 1, points))
        for n0 in range(top + 1):
            for n1 in range(top + 1 - n0):
                row[r, n0, n1] = len(adv_rows)
                adv_rows.append(q0[n0, n1] - q1[n0, n1])
        U_now[: top + 1, : top + 1] = np.maximum(q0, q1) - r * pos
        U_prev = U_now
        if r == T:
            start = U_now[0, 0] + T * pos
    return grid, np.array(adv_rows), row, start


def _smooth(U: np.ndarray, width: float) -> np.ndarray:
    """``E U(d + width h Z)`` on the grid for every row of ``U`` (m, G): a discrete Gaussian convolution.

    The kernel is the normal density sampled at the grid spacing and
    normalised (``scipy.ndimage.gaussian_filter1d``, truncated at 6 sd);
    beyond the ends ``U`` is held at its end values (it tends to 0 there).
    """
    if width <= 0:
        return U
    return gaussian_filter1d(U, width, axis=-1, mode="nearest", truncate=6.0)


def _expect_positive(d: np.ndarray, sd: float) -> np.ndarray:
    """``E max(d + sd Z, 0) = d Phi(d/sd) + sd phi(d/sd)`` (the part of ``W`` taken out before smoothing)."""
    if sd <= 0:
        return np.maximum(d, 0.0)
    u = d / sd
    return d * ndtr(u) + sd * np.exp(-0.5 * u * u) / np.sqrt(2 * np.pi)


def solve_two_arm(horizon: int, prior_mean, prior_sd, noise_sd: float, *, grid: int = 2001) -> BayesOptimalSolution:
    """Solve the two-arm finite-horizon problem by backward induction.

    Parameters
    ----------
    horizon : int
        Decisions ``T``.
    prior_mean, prior_sd : pair of float
        Independent normal priors of the two arm values (the means only
        centre the grid; the solution covers every starting difference on it).
    noise_sd : float
        Known sd of one observation.
    grid : int, default=2001
        Points of the uniform grid of ``d = m_0 - m_1``, which spans
        ``delta +- 8 sqrt(s_0^2 + s_1^2)``.

    Returns
    -------
    BayesOptimalSolution
    """
    sd0, sd1 = (float(x) for x in prior_sd)
    center = float(prior_mean[0]) - float(prior_mean[1])
    g, adv, row, start = _solve_cached(int(horizon), sd0, sd1, float(noise_sd), center, int(grid))
    return BayesOptimalSolution(int(horizon), (sd0, sd1), float(noise_sd), g, adv, row, start)


class BayesOptimalPolicy(OraclePriorThompsonPolicy):
    """The Bayes-optimal policy for two arms under the true population prior (simulation only).

    Parameters (design keys): ``grid`` (default 2001 points of the posterior
    mean difference) and ``p_min`` (default 0: the exact optimum; a floor
    turns it into ``floor_and_split`` of the optimal choice).

    The prior of each participant is the design's ``[population]``:
    ``N(arm_means_k + Gamma_k w_i, arm_sd_k^2)``, noise sd ``noise_sd``. Needs
    exactly two arms, a gaussian outcome, no latent types and no
    arm-by-context effects; otherwise a :class:`~poolbandit.errors.DesignError`
    names the key. See the module docstring for the method.
    """

    kind = "bayes-optimal"
    needs_truth = True

    def __init__(self, spec, design, *, truth=None):
        name = f"policies.{spec.name}"
        if design.n_arms != 2:
            raise DesignError(f"{name}.kind", f'"bayes-optimal" is solved for exactly 2 arms; the design has '
                                              f"{design.n_arms} (study.arms = {list(design.arms)!r})")
        if design.study.outcome != "gaussian":
            raise DesignError(f"{name}.kind", '"bayes-optimal" needs a gaussian outcome (study.outcome), got '
                                              f"{design.study.outcome!r}")
        pop = design.population
        if pop.types:
            raise DesignError("population.types", '"bayes-optimal" needs a normal prior: latent types make it a '
                                                  "mixture; remove population.types")
        if any(abs(v) > 0 for row in pop.context_effects for v in row):
            raise DesignError("population.context_effects", '"bayes-optimal" is solved without arm-by-context '
                                                            "effects; set them to 0")
        super().__init__(spec, design, truth=truth)
        p_min = float(self.params.get("p_min", 0.0))
        if p_min * 2 > 1:
            raise DesignError(f"{name}.p_min", f"expected at most 0.5 for 2 arms, got {p_min!r}")

    def _start(self) -> None:
        super()._start()
        pop = self.design.population
        self.solution = solve_two_arm(self.design.study.horizon, pop.arm_means, pop.arm_sd, pop.noise_sd,
                                      grid=int(self.params.get("grid", 2001)))

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        _, mean, _ = self.posterior(batch.participant)
        mean = mean[0]
        counts = self._n[batch.participant].astype(int)
        remaining = np.clip(self.design.study.horizon - np.asarray(batch.decision) + 1, 1, None)
        adv = self.solution.advantage_at(remaining, counts[:, 0], counts[:, 1], mean[:, 0] - mean[:, 1])
        index = np.stack([adv, np.zeros_like(adv)], axis=1)
        return floor_and_split(index, float(self.params.get("p_min", 0.0)))
