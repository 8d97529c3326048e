"""Classification: from posterior draws of arm effects to each participant's likely category.

* :mod:`.rules`: the design's category rules evaluated draw by draw;
* :mod:`.posterior`: :func:`classify` (probabilities with Monte Carlo errors,
  labels, effect and contrast HDIs, population shares) and
  :func:`population_effects` (new participants from the fitted population);
* :mod:`.agreement`: confusion table and Cohen's kappa against an intake measure;
* :mod:`.unpooled`: each participant's own conjugate posterior, for comparison;
* :mod:`.calibration`: Brier score with Murphy's decomposition, reliability
  table, interval coverage and label accuracy against a simulated truth.
"""

from .agreement import Agreement, Kappa, agreement, cohens_kappa, confusion_table, read_intake
from .calibration import Calibration, brier_decomposition, calibrate, reliability_table, true_categories, \
    true_effects
from .posterior import POPULATION, PARTICIPANTS, Classification, classify, hdi_table, population_effects, \
    posterior_mean_mcse
from .unpooled import unpooled_effects
from .rules import UNDETERMINED, category_indicators, contrast_draws, describe_rule, exclusive_codes, rule_contrasts

__all__ = [
    "Agreement", "Calibration", "Classification", "Kappa", "PARTICIPANTS", "POPULATION", "UNDETERMINED",
    "agreement", "brier_decomposition", "calibrate", "category_indicators", "classify", "cohens_kappa",
    "confusion_table", "contrast_draws", "describe_rule", "exclusive_codes", "hdi_table", "population_effects",
    "posterior_mean_mcse", "read_intake", "reliability_table", "rule_contrasts", "true_categories",
    "true_effects", "unpooled_effects",
]
