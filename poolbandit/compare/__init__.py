"""Design comparison: every policy on the same simulated populations, tuning sweeps, power.

* :func:`compare` runs the comparison and returns a :class:`Comparison`
  (tables, and :meth:`Comparison.write` for CSV files and a standalone HTML
  report);
* :mod:`.engine`: the replicate work units and the executors (local
  processes or a Dask cluster) that run them with identical results;
* :mod:`.scoring`: per-replicate classification scores, Monte Carlo
  summaries, paired differences, regret curves, the trade-off frontier;
* :mod:`.sweeps`: grid points of ``[[sweeps]]`` and their ranking;
* :mod:`.power`: power of the two-group study (adaptive against random control);
* :mod:`.report`: the HTML report.
"""

from .comparison import RANK_METRICS, Comparison, compare, runnable_policies
from .engine import DaskExecutor, Executor, LocalExecutor, make_executor
from .scoring import ClassificationScorer

__all__ = [
    "RANK_METRICS", "ClassificationScorer", "Comparison", "DaskExecutor", "Executor", "LocalExecutor",
    "compare", "make_executor", "runnable_policies",
]
