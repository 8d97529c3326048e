"""End-of-study analysis of adaptively collected data.

* :mod:`.arm_values`: each arm's value by the naive mean, inverse-propensity
  weighting (Horvitz and Thompson 1952), its self-normalised form (Hajek),
  the doubly robust estimate (Robins, Rotnitzky and Zhao 1994; Dudik,
  Langford and Li 2011) and the outcome model, overall and by category;
* :mod:`.policy_values`: off-policy values of other policies on the same log,
  with effective sample sizes and overlap warnings;
* :mod:`.conditions`: adaptive against control (Welch's t, random-intercept
  mixed model);
* :mod:`.outcome_models`: the pluggable outcome models;
* :mod:`.run`: :func:`analyse`, the whole analysis in one call;
* :mod:`.report`: the HTML page.

Naive means of adaptively collected data are biased (Nie, Tian, Taylor and
Zou 2018) and the usual intervals need care (Hadad, Hirshberg, Zhan, Wager
and Athey 2021); see :data:`ADAPTIVE_CAUTION`.
"""

from .arm_values import ARM_VALUE_COLUMNS, ESTIMATORS, arm_values, category_map
from .conditions import CONDITION_COLUMNS, compare_conditions, read_participant_outcomes
from .outcome_models import OutcomePredictions, default_outcome_model, hierarchical_outcome_model, \
    ridge_outcome_model
from .policy_values import POLICY_VALUE_COLUMNS, policy_values, replay_probabilities
from .run import ADAPTIVE_CAUTION, ESTIMAND_TEXT, AnalysisResult, analyse, read_analysis_log

__all__ = [
    "ADAPTIVE_CAUTION", "ARM_VALUE_COLUMNS", "AnalysisResult", "CONDITION_COLUMNS", "ESTIMAND_TEXT", "ESTIMATORS",
    "OutcomePredictions", "POLICY_VALUE_COLUMNS", "analyse", "arm_values", "category_map", "compare_conditions",
    "default_outcome_model", "hierarchical_outcome_model", "policy_values", "read_analysis_log",
    "read_participant_outcomes", "replay_probabilities", "ridge_outcome_model",
]
