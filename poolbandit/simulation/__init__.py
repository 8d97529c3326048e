"""Simulated participants, their environment, and the runner that plays a policy on them."""

from .metrics import METRICS, participant_metrics, regret_curve, replicate_metrics, summarise
from .population import Population, Streams, draw_population, draw_streams, participant_ids
from .runner import SimulationResult, run_policy, simulate

__all__ = [
    "METRICS", "Population", "SimulationResult", "Streams", "draw_population", "draw_streams",
    "participant_ids", "participant_metrics", "regret_curve", "replicate_metrics", "run_policy",
    "simulate", "summarise",
]
