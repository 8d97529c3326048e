"""Simulated participants, their environment, and the runner that plays a policy on them."""

from .metrics import METRICS, participant_metrics, regret_curve, replicate_metrics, summarise
from .population import Population, Streams, draw_population, draw_streams, participant_ids
from .runner import SimulationResult, run_policy, simulate
from .scenarios import (latent_types_scenario, paired_ratio, paired_replicates, pooling_scenario,
                        preference_categories, reference_study)

__all__ = [
    "METRICS", "Population", "SimulationResult", "Streams", "draw_population", "draw_streams",
    "participant_ids", "participant_metrics", "regret_curve", "replicate_metrics", "run_policy",
    "simulate", "summarise", "reference_study", "pooling_scenario", "latent_types_scenario",
    "preference_categories", "paired_replicates", "paired_ratio",
]
