"""poolbandit: partially pooled bandits for short adaptive intervention studies."""

from .errors import ConvergenceWarning, DesignError, InputError, LogError, OverlapWarning
from .log import read_log, validate_log, write_log
from .simulation import draw_population, run_policy, simulate
from .spec import DesignSpec, default_design, load_design, parse_design

__version__ = "0.1.0"

__all__ = [
    "ConvergenceWarning", "DesignError", "DesignSpec", "InputError", "LogError", "OverlapWarning",
    "default_design", "draw_population", "load_design", "parse_design", "read_log", "run_policy",
    "simulate", "validate_log", "write_log", "__version__",
]
