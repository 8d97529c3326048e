"""The data of the hierarchical model, shared by both engines.

The model (see :mod:`poolbandit.models`) is

.. math::

    y_{it} = x_{it}'\\theta_i + e_{it}, \\qquad
    \\theta_i = \\beta + \\Gamma w_i + b_i, \\qquad
    b_i \\sim N(0, \\Sigma),

with ``x`` the design row of :mod:`.design_matrix`, ``w_i`` participant
covariates (possibly none) and ``e ~ N(0, sigma^2)`` (gaussian; or a known
per-observation sd) or a logit link (bernoulli). Only the coefficients marked
``random`` have participant deviations; the others are shared by everyone.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..errors import InputError
from .design_matrix import coef_names, design_rows

__all__ = ["ModelData"]


@dataclass(frozen=True)
class ModelData:
    """Arrays of the hierarchical model.

    Attributes
    ----------
    y : ndarray (n,)
        Observed outcomes (missing sessions already dropped).
    X : ndarray (n, P)
        Design rows.
    group : ndarray of int (n,)
        Participant index of each row, in ``[0, N)``.
    W : ndarray (N, Q)
        Participant covariates (Q may be 0).
    participants : tuple of str (N,)
    coef : tuple of str (P,)
    covariates : tuple of str (Q,)
    outcome : {"gaussian", "bernoulli"}
    random : ndarray of bool (P,)
        Which coefficients vary between participants (default: all).
    obs_sd : ndarray (n,) or None
        Known noise sd per observation (gaussian only); ``sigma`` is then not estimated.
    arms, features : tuple of str
        The design's arms and context features, when the data came from a design.
    """

    y: np.ndarray
    X: np.ndarray
    group: np.ndarray
    W: np.ndarray
    participants: tuple[str, ...]
    coef: tuple[str, ...]
    covariates: tuple[str, ...] = ()
    outcome: str = "gaussian"
    random: np.ndarray | None = None
    obs_sd: np.ndarray | None = None
    arms: tuple[str, ...] = ()
    features: tuple[str, ...] = ()

    def __post_init__(self):
        n, p = self.X.shape
        if self.y.shape != (n,) or self.group.shape != (n,):
            raise ValueError(f"inconsistent lengths: y={self.y.shape}, X={self.X.shape}, group={self.group.shape}")
        if self.W.shape != (len(self.participants), len(self.covariates)):
            raise ValueError(f"W has shape {self.W.shape}, expected ({len(self.participants)}, {len(self.covariates)})")
        if len(self.coef) != p:
            raise ValueError(f"{len(self.coef)} coefficient names for {p} columns")
        if self.random is None:
            object.__setattr__(self, "random", np.ones(p, dtype=bool))

    @property
    def n_participants(self) -> int:
        return len(self.participants)

    @property
    def n_coef(self) -> int:
        return len(self.coef)

    @classmethod
    def from_arrays(cls, y, X, group, W=None, *, outcome: str = "gaussian", coef=None, participants=None,
                    covariates=None, random=None, obs_sd=None) -> "ModelData":
        """Build model data from plain arrays (reference data sets, tests)."""
        y = np.asarray(y, dtype=float)
        X = np.asarray(X, dtype=float).reshape(len(y), -1)
        group = np.asarray(group, dtype=np.int64)
        n_groups = int(group.max()) + 1 if participants is None else len(participants)
        W = np.zeros((n_groups, 0)) if W is None else np.asarray(W, dtype=float).reshape(n_groups, -1)
        return cls(
            y=y, X=X, group=group, W=W,
            participants=tuple(participants or [str(j) for j in range(n_groups)]),
            coef=tuple(coef or [f"x{j}" for j in range(X.shape[1])]),
            covariates=tuple(covariates or [f"w{j}" for j in range(W.shape[1])]),
            outcome=outcome,
            random=None if random is None else np.asarray(random, dtype=bool),
            obs_sd=None if obs_sd is None else np.asarray(obs_sd, dtype=float),
        )

    @classmethod
    def from_log(cls, log: pd.DataFrame, design, *, participants: list[str] | None = None) -> "ModelData":
        """Model data from a validated StudyLog: observed rewards only.

        Participants are every id in the log (or ``participants``, which may
        add ids with no observations yet, in that order), sorted as given.
        Covariates are taken from each participant's first row.
        """
        reward = design.study.reward
        ids = list(participants) if participants is not None else list(pd.unique(log["participant"]))
        pos = pd.Index(ids)
        code = pos.get_indexer(log["participant"])
        if (code < 0).any():
            raise InputError(f"participant {log['participant'][code < 0].iloc[0]!r} of the log is not in the roster")
        arm_code = pd.Index(design.arms).get_indexer(log["arm"])
        obs = np.isfinite(log[reward].to_numpy(dtype=float))
        ctx = log[list(design.features)].to_numpy(dtype=float) if design.features else np.zeros((len(log), 0))
        X = design_rows(arm_code[obs], ctx[obs], design.n_arms)
        W = np.zeros((len(ids), len(design.covariates)))
        if design.covariates:
            first = log.drop_duplicates("participant").set_index("participant")[list(design.covariates)]
            W = first.reindex(ids).fillna(0.0).to_numpy(dtype=float)
        return cls(
            y=log[reward].to_numpy(dtype=float)[obs], X=X, group=code[obs].astype(np.int64), W=W,
            participants=tuple(ids), coef=tuple(coef_names(design.arms, design.features)),
            covariates=tuple(design.covariates), outcome=design.study.outcome,
            arms=tuple(design.arms), features=tuple(design.features),
        )
