"""Replicate work units and the executors that run them.

A comparison is a list of independent work units (one simulated replicate,
or one simulated two-group study for power). Each unit carries its own
:class:`numpy.random.SeedSequence`, derived from the root seed by its index
alone, so the numbers a unit produces do not depend on where it runs, in
which order, or how many workers share the work:

* :class:`LocalExecutor` runs units in this process (one worker) or in a
  pool of worker processes (:class:`concurrent.futures.ProcessPoolExecutor`
  with the ``spawn`` start method, so it is safe in programs that hold
  threads);
* :class:`DaskExecutor` runs the same units on a Dask distributed cluster
  (``dask.distributed.Client(address)``); every worker must have the same
  version of poolbandit installed.

Units are grouped into batches so that the design is shipped once per batch
and tiny units do not drown in messaging; the batching never changes a
result. The functions that run inside workers are top-level functions of
this module (importable by name, as process pools and Dask need).
"""

from __future__ import annotations

import dataclasses
import math
import multiprocessing
import os
import threading
import zlib
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ProcessPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import InputError

__all__ = [
    "Variant",
    "ReplicateJob",
    "run_replicate",
    "Executor",
    "LocalExecutor",
    "DaskExecutor",
    "make_executor",
    "child_seed",
    "label_key",
    "portable",
]


# --------------------------------------------------------------------------
# Seeds
# --------------------------------------------------------------------------
def child_seed(root: np.random.SeedSequence, *key: int) -> np.random.SeedSequence:
    """The descendant of ``root`` at ``key`` (what repeated ``spawn`` calls would give).

    ``child_seed(root, r)`` equals ``root.spawn(R)[r]`` for any ``R > r``, and
    ``child_seed(root, r, j)`` equals ``root.spawn(R)[r].spawn(J)[j]``; the
    children are built from the key directly, so no counter inside a
    SeedSequence is ever advanced and a unit can be rebuilt anywhere.
    """
    return np.random.SeedSequence(root.entropy, spawn_key=tuple(root.spawn_key) + tuple(int(k) for k in key),
                                  pool_size=root.pool_size)


def label_key(label: str) -> int:
    """A stable integer for a policy label (CRC-32 of its UTF-8 bytes).

    Used in seed keys so that a policy's own random stream depends on its
    name, not on its position among the policies being compared.
    """
    return zlib.crc32(label.encode("utf-8"))


# --------------------------------------------------------------------------
# Shipping designs to workers
# --------------------------------------------------------------------------
def portable(obj: Any) -> Any:
    """A copy of ``obj`` that pickles: read-only mappings become dicts.

    Designs hold :class:`types.MappingProxyType` fields, which the standard
    pickler refuses; policies only read them as mappings, so plain dicts
    behave identically in a worker.
    """
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        changes = {f.name: portable(getattr(obj, f.name)) for f in dataclasses.fields(obj) if f.init}
        return dataclasses.replace(obj, **changes)
    if isinstance(obj, Mapping):
        return {k: portable(v) for k, v in obj.items()}
    if isinstance(obj, tuple) and not hasattr(obj, "_fields"):
        return tuple(portable(v) for v in obj)
    if isinstance(obj, list):
        return [portable(v) for v in obj]
    return obj


# --------------------------------------------------------------------------
# The replicate work unit
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class Variant:
    """One policy to run in every replicate: a design policy or a sweep point.

    Attributes
    ----------
    label : str
        Unique name in the outputs (the policy name, or ``sweep[key=value, ...]``).
    group : str
        ``"policies"`` for the design's policies, else the sweep's name.
    spec : PolicySpec
        Kind and parameters (for a sweep point, the base policy's with the
        point's values).
    point : dict
        The sweep point's values (empty for design policies).
    """

    label: str
    group: str
    spec: Any
    point: Mapping[str, Any] = dataclasses.field(default_factory=dict)


@dataclass(frozen=True)
class ReplicateJob:
    """What every replicate shares: the design, the variants, the scorer.

    Attributes
    ----------
    design : DesignSpec
        In :func:`portable` form.
    variants : tuple of Variant
    size : int or None
        Participants per replicate (None: ``design.population.size``).
    scorer : Scorer or None
        Per-replicate scorer (see :mod:`poolbandit.compare.scoring`).
    """

    design: Any
    variants: tuple[Variant, ...]
    size: int | None = None
    scorer: Any = None


def run_replicate(job: ReplicateJob, item: tuple[int, np.random.SeedSequence]) -> dict[str, Any]:
    """Run every variant on one simulated population with shared environment streams.

    The replicate's seed sequence ``seq`` gives the population
    (``child_seed(seq, 0)``), the environment streams (``child_seed(seq, 1)``),
    each variant's own policy randomness (``child_seed(seq, 2, label_key(label))``)
    and its scorer's (``child_seed(seq, 4, label_key(label))``).

    Returns
    -------
    dict
        ``replicate``; ``rows``: one dict of scores per variant (label, group,
        the metrics of :func:`poolbandit.simulation.replicate_metrics` and the
        scorer's columns); ``curves``: array (V, H) of the mean cumulative
        regret per participant after each decision index.
    """
    from ..simulation import draw_population, draw_streams, replicate_metrics, run_policy

    r, seq = item
    design = job.design
    population = draw_population(design, np.random.default_rng(child_seed(seq, 0)), size=job.size)
    streams = draw_streams(design, population.size, np.random.default_rng(child_seed(seq, 1)))
    horizon = design.study.horizon
    rows, curves = [], np.zeros((len(job.variants), horizon))
    for v, variant in enumerate(job.variants):
        key = label_key(variant.label)
        result = run_policy(design, variant.spec, population, streams,
                            np.random.default_rng(child_seed(seq, 2, key)))
        row = {"policy": variant.label, "group": variant.group, "replicate": int(r), **replicate_metrics(result)}
        if job.scorer is not None:
            row.update(job.scorer(result, np.random.default_rng(child_seed(seq, 4, key))))
        rows.append(row)
        curves[v] = _regret_curve(result.log, population.size, horizon)
    return {"replicate": int(r), "rows": rows, "curves": curves}


def _regret_curve(log, n_participants: int, horizon: int) -> np.ndarray:
    """Mean over participants of cumulative regret after each decision (0 after dropping out)."""
    gap = (log["best_expected_reward"] - log["expected_reward"]).to_numpy(dtype=float)
    d = log["decision"].to_numpy(dtype=np.int64) - 1
    return np.cumsum(np.bincount(d, weights=gap, minlength=horizon)[:horizon]) / n_participants


# --------------------------------------------------------------------------
# The function that runs inside a worker
# --------------------------------------------------------------------------
def _run_batch(fn: Callable[[Any, Any], Any], shared: Any, items: Sequence[Any]) -> list[Any]:
    """Run ``fn(shared, item)`` for every item of one batch, in order."""
    return [fn(shared, item) for item in items]


def _batches(items: Sequence[Any], n_batches: int) -> list[list[Any]]:
    n_batches = max(1, min(n_batches, len(items)))
    size = math.ceil(len(items) / n_batches)
    return [list(items[i:i + size]) for i in range(0, len(items), size)]


# --------------------------------------------------------------------------
# Executors
# --------------------------------------------------------------------------
class Executor:
    """Runs ``fn(shared, item)`` for every item and returns the results in item order.

    Subclasses implement :meth:`_run` on batches; :meth:`map` groups the
    items, shows an optional progress bar and flattens the results.
    """

    #: Short description for reports (``"local, 2 processes"``).
    description: str = ""

    def map(self, fn: Callable[[Any, Any], Any], shared: Any, items: Sequence[Any], *,
            progress: bool = False, label: str = "replicates") -> list[Any]:
        """Apply ``fn(shared, item)`` to every item.

        Parameters
        ----------
        fn : callable
            A top-level (importable) function.
        shared : object
            Data every item needs (the design); shipped once per batch.
        items : sequence
            One work unit each; results come back in this order.
        progress : bool, default=False
            Show a tqdm progress bar (counted in items) on stderr.
        label : str, default="replicates"
            Name of the unit for the progress bar.
        """
        items = list(items)
        if not items:
            return []
        batches = _batches(items, self._n_batches(len(items)))
        bar = _progress_bar(len(items), label) if progress else None
        try:
            out = self._run(fn, shared, batches, bar)
        finally:
            if bar is not None:
                bar.close()
        return [r for batch in out for r in batch]

    def _n_batches(self, n_items: int) -> int:
        return n_items

    def _run(self, fn, shared, batches, bar) -> list[list[Any]]:  # pragma: no cover - interface
        raise NotImplementedError

    def close(self) -> None:
        """Release workers or connections (the executor cannot be used afterwards)."""

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class LocalExecutor(Executor):
    """Run work units on this machine.

    Parameters
    ----------
    workers : int, optional
        Worker processes (default ``os.cpu_count()``). With one worker the
        units run in this process, with no pool at all.
    batches_per_worker : int, default=8
        How many batches each worker gets (more batches: smoother progress
        and load balance; fewer: less messaging).

    Notes
    -----
    With ``W > 1`` workers, ``W - 1`` child processes are started with the
    ``spawn`` method and this process works through the same queue of
    batches, so no core idles while the children import their libraries.
    """

    def __init__(self, workers: int | None = None, *, batches_per_worker: int = 8):
        if workers is None:
            workers = os.cpu_count() or 1
        if isinstance(workers, bool) or not isinstance(workers, (int, np.integer)) or workers < 1:
            raise InputError(f"--workers: expected an integer >= 1, got {workers!r}")
        self.workers = int(workers)
        self.batches_per_worker = int(batches_per_worker)
        self.description = "local, in process" if self.workers == 1 else f"local, {self.workers} processes"

    def _n_batches(self, n_items: int) -> int:
        return n_items if self.workers == 1 else self.workers * self.batches_per_worker

    def _run(self, fn, shared, batches, bar):
        if self.workers == 1 or len(batches) == 1:
            out = []
            for batch in batches:
                out.append(_run_batch(fn, shared, batch))
                if bar is not None:
                    bar.update(len(batch))
            return out
        return _SharedQueue(fn, shared, batches, bar).run(self.workers)


class _SharedQueue:
    """Batches handed out one at a time to ``workers - 1`` child processes and to this process.

    This process works through the queue too while the children start (a
    spawned child needs a few seconds to import its libraries), and each
    child gets its next batch as soon as it returns one, so the load stays
    balanced to within one batch. Results are stored by batch index.
    """

    def __init__(self, fn, shared, batches, bar):
        self.fn, self.shared, self.batches, self.bar = fn, shared, batches, bar
        self.pending = list(range(len(batches)))
        self.results: list[list[Any] | None] = [None] * len(batches)
        self.remaining = len(batches)
        self.lock = threading.Lock()
        self.done = threading.Event()
        self.error: BaseException | None = None
        self.pool: ProcessPoolExecutor | None = None

    def _take(self) -> int | None:
        with self.lock:
            if self.error is not None or not self.pending:
                return None
            return self.pending.pop(0)

    def _finish(self, j: int, result: list[Any]) -> None:
        self.results[j] = result
        with self.lock:
            self.remaining -= 1
            if self.bar is not None:
                self.bar.update(len(self.batches[j]))
            if self.remaining == 0:
                self.done.set()

    def _submit_next(self) -> None:
        j = self._take()
        if j is None:
            return
        fut = self.pool.submit(_run_batch, self.fn, self.shared, self.batches[j])
        fut.add_done_callback(lambda f, j=j: self._on_done(f, j))

    def _on_done(self, fut, j: int) -> None:
        try:
            result = fut.result()
        except BaseException as err:  # noqa: BLE001 - handed to the caller's thread
            with self.lock:
                self.error = self.error or err
            self.done.set()
            return
        self._finish(j, result)
        self._submit_next()

    def run(self, workers: int) -> list[list[Any]]:
        ctx = multiprocessing.get_context("spawn")
        with _single_threaded_children(), ProcessPoolExecutor(max_workers=workers - 1, mp_context=ctx) as pool:
            self.pool = pool
            for _ in range(workers - 1):
                self._submit_next()
            while (j := self._take()) is not None:
                try:
                    self._finish(j, _run_batch(self.fn, self.shared, self.batches[j]))
                except BaseException as err:
                    with self.lock:
                        self.error = self.error or err
                    self.done.set()
            self.done.wait()
        if self.error is not None:
            raise self.error
        return self.results


class DaskExecutor(Executor):
    """Run work units on a Dask distributed cluster.

    Parameters
    ----------
    scheduler : str or dask.distributed.Client
        The scheduler's address (``tcp://HOST:PORT``) or a connected client.
        A client made here from an address is closed by :meth:`close`.
    timeout : float, default=20
        Seconds to wait for the scheduler before giving up.
    batches_per_worker : int, default=4

    Raises
    ------
    InputError
        When the scheduler cannot be reached.
    """

    def __init__(self, scheduler: Any, *, timeout: float = 20.0, batches_per_worker: int = 4):
        from dask.distributed import Client

        if isinstance(scheduler, Client):
            self.client, self._own = scheduler, False
        else:
            address = str(scheduler)
            try:
                self.client = Client(address, timeout=timeout, set_as_default=False)
            except (OSError, TimeoutError, ValueError) as err:
                raise InputError(f"--scheduler: cannot connect to {address!r} ({err})") from None
            self._own = True
        self.batches_per_worker = int(batches_per_worker)
        self.description = f"Dask cluster at {self.client.scheduler.address}"

    def _n_workers(self) -> int:
        try:
            info = self.client.scheduler_info()
            return max(1, sum(int(w.get("nthreads", 1)) for w in info.get("workers", {}).values()))
        except Exception:  # pragma: no cover - a scheduler that cannot answer still runs work
            return 1

    def _n_batches(self, n_items: int) -> int:
        return self._n_workers() * self.batches_per_worker

    def _run(self, fn, shared, batches, bar):
        shared_future = self.client.scatter(shared, broadcast=True, hash=False)
        futures = [self.client.submit(_run_batch, fn, shared_future, batch, pure=False) for batch in batches]
        results: list[list[Any]] = []
        try:
            for fut, batch in zip(futures, batches):  # in order: the bar moves as the earliest batches finish
                results.append(fut.result())
                if bar is not None:
                    bar.update(len(batch))
        finally:
            for f in futures:
                f.release()
        return results

    def close(self) -> None:
        if self._own:
            self.client.close()


@contextmanager
def _single_threaded_children():
    """While worker processes start, ask their numeric libraries for one thread each.

    The workers already use every core between them; BLAS or OpenMP thread
    pools inside each would only oversubscribe the machine. Variables the
    user has set are left alone; the parent's environment is restored after.
    """
    saved = {k: os.environ.get(k) for k in _THREAD_VARS}
    try:
        for k in _THREAD_VARS:
            os.environ.setdefault(k, "1")
        yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def make_executor(*, workers: int | None = None, scheduler: Any = None) -> Executor:
    """A :class:`DaskExecutor` when ``scheduler`` is given, else a :class:`LocalExecutor`."""
    if scheduler is not None:
        return DaskExecutor(scheduler)
    return LocalExecutor(workers)


def _progress_bar(total: int, label: str):
    from tqdm.auto import tqdm

    return tqdm(total=total, unit=label.rstrip("s") or "unit", desc=label, leave=False)
