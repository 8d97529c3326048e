"""The whole end-of-study analysis in one call, and reading logs that may lack propensities.

:func:`analyse` gives arm values (overall and by category), off-policy values
of other policies and the adaptive-against-control comparison, with the notes
a reader needs: how missing rewards were treated, whether propensities were
usable, which outcome model was used, and the caution about adaptively
collected data (:data:`ADAPTIVE_CAUTION`).

References
----------
.. [1] Nie, X., Tian, X., Taylor, J. and Zou, J. (2018). Why adaptively
   collected data have negative bias and how to correct for it. *AISTATS
   2018*, PMLR 84, 1261-1269.
.. [2] Hadad, V., Hirshberg, D. A., Zhan, R., Wager, S. and Athey, S. (2021).
   Confidence intervals for policy evaluation in adaptive experiments.
   *PNAS* 118(15), e2014602118. doi:10.1073/pnas.2014602118
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .._random import RngLike, spawn
from ..errors import OverlapWarning
from ..log import read_cells, validate_log
from ._prepare import SeMethod, prepare
from .arm_values import arm_values, outcome_predictions
from .conditions import compare_conditions
from .outcome_models import OutcomeModel, OutcomePredictions
from .policy_values import policy_values

__all__ = ["AnalysisResult", "analyse", "read_analysis_log", "ADAPTIVE_CAUTION", "ESTIMAND_TEXT"]

#: Plain-language caution printed in every report.
ADAPTIVE_CAUTION = (
    "These data were collected adaptively: the policy gave each arm more often when it had looked good so far. "
    "The plain mean of the rewards observed on an arm is then biased. An arm that was unlucky early is tried "
    "less, so its early bad luck is never averaged away and its mean tends to be too low (Nie, Tian, Taylor and "
    "Zou 2018, 'Why adaptively collected data have negative bias and how to correct for it', AISTATS); and "
    "participants who do well on an arm get it more often, which can push its mean up. The weighted estimates "
    "(inverse-propensity weighting, Horvitz and Thompson 1952, and its doubly robust form, Robins, Rotnitzky and "
    "Zhao 1994, Dudik, Langford and Li 2011) undo this by weighting every observed reward by one over the "
    "probability with which its arm was chosen; they need those probabilities to be logged exactly and to stay "
    "away from 0. Their usual confidence intervals can be too narrow when probabilities shrink towards 0 as the "
    "study goes on (Hadad, Hirshberg, Zhan, Wager and Athey 2021, 'Confidence intervals for policy evaluation in "
    "adaptive experiments', PNAS); clipping the probabilities into a band, as this study's design may do, keeps "
    "them usable."
)

#: How the estimand is defined, for reports.
ESTIMAND_TEXT = (
    "The value of an arm is the average, over participants, of the expected reward each participant would have "
    "had if that arm had been given at every one of their decisions, in the contexts (weekday, previous day, ...) "
    "that actually occurred. Every participant counts equally, whatever the number of their decisions. Missed "
    "sessions (no reward) are treated as missing completely at random among decisions: they are left out and "
    "each participant's average is taken over the remaining decisions. Standard errors treat participants as "
    "the independent units (participant-level clustering)."
)


@dataclass(frozen=True)
class AnalysisResult:
    """Everything :func:`analyse` computes.

    Attributes
    ----------
    arm_values, policy_values, conditions : DataFrame
        The three tables (see :func:`~poolbandit.analysis.arm_values.arm_values`,
        :func:`~poolbandit.analysis.policy_values.policy_values`,
        :func:`~poolbandit.analysis.conditions.compare_conditions`).
    notes : list of str
        Plain-language notes about the data and the methods.
    warnings : list of str
        Overlap and other warnings raised on the way.
    title : str
    """

    arm_values: pd.DataFrame
    policy_values: pd.DataFrame
    conditions: pd.DataFrame
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    title: str = ""


def read_analysis_log(path: str | Path, design) -> pd.DataFrame:
    """Read a StudyLog CSV for analysis; a propensity column that is absent or entirely empty is allowed.

    Such a log is validated with placeholder propensities and returned with
    ``propensity`` all NaN (and without ``prob_`` columns), which the
    estimators read as "no propensities": they refuse the weighted estimates
    and still give the rest. A column with only some cells empty is an error.

    Raises
    ------
    LogError
        Naming file, row, column and value (see :func:`poolbandit.log.validate_log`).
    """
    path = Path(path)
    df = read_cells(path)
    absent = "propensity" not in df.columns or (len(df) > 0 and df["propensity"].isna().all())
    if not absent:
        return validate_log(df, design, source=str(path))
    pcols = [c for c in df.columns if c.startswith("prob_")]
    df = df.drop(columns=pcols).assign(propensity="1")
    out = validate_log(df, design, source=str(path))
    out["propensity"] = np.nan
    return out


def analyse(log: pd.DataFrame, design, *, outcome_model: OutcomeModel | OutcomePredictions | None = None,
            outcome_note: str = "", categories=None, participant_outcomes: pd.DataFrame | None = None,
            level: float = 0.95, se: SeMethod = "sandwich", n_boot: int = 1000, design_policies: bool = True,
            rng: RngLike = None, progress: bool = False) -> AnalysisResult:
    """Arm values, policy values and the condition comparison of one log.

    Parameters
    ----------
    log : DataFrame
        A validated StudyLog (:func:`read_analysis_log` or :func:`poolbandit.read_log`).
    design : DesignSpec
    outcome_model : callable or OutcomePredictions, optional
        Fitted once and shared by both tables.
    outcome_note : str, optional
        A note on which outcome model was used.
    categories : mapping, Series or DataFrame, optional
        Participant -> category (see :func:`~poolbandit.analysis.arm_values.category_map`).
    participant_outcomes : DataFrame, optional
        A second outcome per participant (see :func:`~poolbandit.analysis.conditions.read_participant_outcomes`).
    level, se, n_boot : see :func:`~poolbandit.analysis.arm_values.arm_values`
    design_policies : bool, default=True
        Replay the design's policies on the log.
    rng : Generator, int or None
    progress : bool, default=False

    Returns
    -------
    AnalysisResult
    """
    g_arm, g_pol = spawn(rng, 2)
    prep = prepare(log, design)
    notes = list(prep.notes)
    if prep.table is None:
        notes.append("The log has no propensities: inverse-propensity and doubly robust estimates are refused; "
                     "only the naive means and the outcome model's estimates are given.")
    else:
        zero = (prep.table == 0).any(axis=0)
        if zero.any():
            arms = ", ".join(a for a, z in zip(design.arms, zero) if z)
            notes.append(f"Some arms ({arms}) had probability 0 at some decisions (a deterministic rule such as "
                         "UCB1 logs propensity 1 for its choice): positivity fails, and weighted estimates that "
                         "need those arms are refused.")
    pred = outcome_predictions(log, design, outcome_model)
    if outcome_note:
        notes.append(outcome_note)
    if pred is not None:
        notes.append("The doubly robust estimates use an outcome model fitted on the same data (no cross-fitting); "
                     "their bias from this is usually small but not exactly zero.")
    if design_policies and design.policies:
        notes.append("Design policies are replayed on the logged history: at each decision a policy sees what "
                     "actually happened before, not the history it would have produced itself, so its value "
                     "here is that of following its choices decision by decision on this study's path.")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", OverlapWarning)
        av = arm_values(log, design, outcome_model=pred, categories=categories, level=level, se=se, n_boot=n_boot,
                        rng=g_arm)
        pv = policy_values(log, design, outcome_model=pred, design_policies=design_policies, level=level, se=se,
                           n_boot=n_boot, rng=g_pol, progress=progress)
    found = [str(w.message) for w in caught if issubclass(w.category, OverlapWarning)]
    for w in caught:
        if not issubclass(w.category, OverlapWarning):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    for msg in found:
        warnings.warn(msg, OverlapWarning, stacklevel=2)
    if categories is not None:
        notes.append("Category rows group participants by a classification that usually comes from the same data; "
                     "they describe the participants as grouped, not a pre-registered subgroup.")
    cond = compare_conditions(log, design, participant_outcomes=participant_outcomes, level=level)
    return AnalysisResult(av, pv, cond, notes, found, design.study.title)
