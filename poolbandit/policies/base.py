"""The one interface every policy follows.

A policy answers one question for a batch of participants at one decision
step: which arm, and with what probability. It is vectorised over
participants: state lives in arrays indexed by the participant's position in
the roster (``0 .. N-1``), never in per-participant Python objects.

Life cycle (the simulation runner and the live study both drive it so)::

    policy = make_policy(spec, design, truth=None)
    policy.start(covariates)               # roster of N participants, (N, Q)
    for each decision step:
        policy.observe(rewards that arrived)   # delayed feedback
        a = policy.assign(batch, rng)          # arms, exact propensities, table
    policy.exploit(participants, context)      # the arm it would exploit now

A subclass implements :meth:`Policy._probabilities` (and usually
:meth:`Policy._update` and :meth:`Policy._exploit_index`). The base class adds
what every kind shares: forced exploration for the first ``explore_first``
decisions and clipping of the probabilities into a band, then draws the arm
by inversion so the logged propensity is exactly the probability used.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np

from ._probability import argmax_ties, clip_probabilities, draw_arms

if TYPE_CHECKING:  # pragma: no cover
    from ..simulation.population import Population
    from ..spec import DesignSpec, PolicySpec

__all__ = ["Batch", "Assignment", "Policy"]


@dataclass(frozen=True)
class Batch:
    """The participants due a decision at one step.

    Attributes
    ----------
    participant : ndarray of int, shape (n,)
        Roster positions.
    decision : ndarray of int, shape (n,)
        1-based decision index of each participant.
    context : ndarray of float, shape (n, F)
        Decision-time context features.
    step : int
        The study day (0-based) of this batch.
    """

    participant: np.ndarray
    decision: np.ndarray
    context: np.ndarray
    step: int = 0

    def __len__(self) -> int:
        return len(self.participant)


@dataclass(frozen=True)
class Assignment:
    """What a policy decided for a batch.

    Attributes
    ----------
    arm : ndarray of int, shape (n,)
    propensity : ndarray of float, shape (n,)
        Probability with which ``arm`` was drawn (exact).
    probabilities : ndarray of float, shape (n, K)
        The whole table the arm was drawn from.
    """

    arm: np.ndarray
    propensity: np.ndarray
    probabilities: np.ndarray


class Policy:
    """Base class of all policies.

    Parameters
    ----------
    spec : PolicySpec
        The named policy from the design, parameters validated.
    design : DesignSpec
        The design (arms, features, covariates, outcome, priors).
    truth : Population, optional
        The simulated truth; only simulation-only kinds may use it.
    """

    kind: ClassVar[str] = ""
    needs_truth: ClassVar[bool] = False

    def __init__(self, spec: PolicySpec, design: DesignSpec, *, truth: Population | None = None):
        if self.needs_truth and truth is None:
            raise ValueError(f"policy kind {self.kind!r} reads the simulated truth and cannot run in a live study")
        self.spec = spec
        self.design = design
        self.truth = truth if self.needs_truth else None
        self.params: dict[str, Any] = dict(spec.params)
        self.n_arms = design.n_arms
        self.n_features = len(design.features)

    # -- life cycle -----------------------------------------------------------
    def start(self, covariates: np.ndarray) -> None:
        """Begin with a roster of ``N`` participants; ``covariates`` is (N, Q)."""
        covariates = np.asarray(covariates, dtype=float).reshape(len(covariates), -1)
        self.n_participants = len(covariates)
        self.covariates = covariates
        self._shown = np.zeros((self.n_participants, self.n_arms), dtype=bool)
        self._start()

    def observe(self, participant: np.ndarray, arm: np.ndarray, context: np.ndarray, reward: np.ndarray) -> None:
        """Take rewards that have arrived (rows with a missing reward are ignored)."""
        reward = np.asarray(reward, dtype=float)
        keep = np.isfinite(reward)
        if keep.any():
            self._update(np.asarray(participant)[keep], np.asarray(arm)[keep],
                         np.asarray(context, dtype=float).reshape(len(reward), -1)[keep], reward[keep])

    def assign(self, batch: Batch, rng: np.random.Generator) -> Assignment:
        """Choose an arm for every participant of ``batch`` and return exact propensities."""
        p = self.probabilities(batch, rng)
        arm, prop = draw_arms(p, rng)
        self.note_assigned(batch.participant, arm, batch.decision)
        return Assignment(arm, prop, p)

    def probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:
        """The randomisation table for ``batch``: forced exploration, else the kind's rule, clipped."""
        n, k = len(batch), self.n_arms
        p = np.empty((n, k))
        m = int(self.params.get("explore_first", 0) or 0)
        forced = batch.decision <= m
        if forced.any():
            new_block = ((batch.decision[forced] - 1) % k == 0)[:, None]
            fresh = ~self._shown[batch.participant[forced]] | new_block
            p[forced] = fresh / fresh.sum(axis=1, keepdims=True)
        free = ~forced
        if free.any():
            sub = Batch(batch.participant[free], batch.decision[free], batch.context[free], batch.step)
            q = np.asarray(self._probabilities(sub, rng), dtype=float)
            clip = self.params.get("clip")
            if clip is not None:
                q = clip_probabilities(q, clip[0], clip[1])
            p[free] = q
        return p

    def note_assigned(self, participant: np.ndarray, arm: np.ndarray, decision: np.ndarray) -> None:
        """Record assignments (forced exploration shows every arm once per block of K)."""
        block_start = (np.asarray(decision) - 1) % self.n_arms == 0
        self._shown[participant[block_start]] = False
        self._shown[participant, arm] = True

    def exploit(self, participant: np.ndarray, context: np.ndarray | None = None) -> np.ndarray:
        """The arm each participant would get if the policy stopped exploring (ties: lowest index)."""
        participant = np.asarray(participant)
        if context is None:
            context = np.zeros((len(participant), self.n_features))
        return np.argmax(argmax_ties(self._exploit_index(participant, context)), axis=1)

    # -- what a kind implements ---------------------------------------------
    def _start(self) -> None:
        """Allocate per-participant state (called by :meth:`start`)."""

    def _update(self, participant: np.ndarray, arm: np.ndarray, context: np.ndarray, reward: np.ndarray) -> None:
        """Absorb observed rewards (only finite rewards reach here)."""

    def _probabilities(self, batch: Batch, rng: np.random.Generator) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def _exploit_index(self, participant: np.ndarray, context: np.ndarray) -> np.ndarray:
        """An (n, K) index whose maximum is the arm to exploit (default: uniform)."""
        return np.zeros((len(participant), self.n_arms))
