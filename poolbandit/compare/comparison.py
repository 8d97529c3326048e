"""Design comparison with common random numbers.

:func:`compare` draws one population and one set of environment streams per
replicate and runs every policy of the design (and every point of its
tuning sweeps) on them, so that every difference between policies is paired
(common random numbers). It returns a :class:`Comparison` holding the tables
and writes them, with a standalone HTML report, on request.

Replicate ``r`` owns the seed sequence ``SeedSequence(root).spawn(R)[r]``,
built from the index alone (:func:`~poolbandit.compare.engine.child_seed`),
so the results are identical whichever executor runs the replicates and
however many workers it has.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .._random import RngLike, seed_sequence
from ..errors import InputError, format_value
from ..policies.registry import CLASSES
from ..spec import DesignSpec, PolicySpec
from .engine import Executor, ReplicateJob, Variant, child_seed, make_executor, portable, run_replicate
from .power import PowerJob, check_sizes, power_items, run_power_study, summarise_power
from .scoring import (
    BASE_METRICS,
    METRIC_DIRECTIONS,
    ClassificationScorer,
    curve_bands,
    paired_differences,
    summarise_scores,
    tradeoff_table,
)
from .sweeps import rank_sweep, sweep_variants

__all__ = ["Comparison", "compare", "runnable_policies", "RANK_METRICS"]

#: Scores a sweep can be ranked by.
RANK_METRICS = [m for m in METRIC_DIRECTIONS if m != "gain"]


@dataclass
class Comparison:
    """The result of :func:`compare`.

    Attributes
    ----------
    replicates : DataFrame
        One row per (policy, replicate): ``policy, group, replicate`` and the
        scores (``regret`` ... ``best_arm_identified``, ``brier``,
        ``label_share``, ``accuracy``). ``group`` is ``policies`` for the
        design's policies, else the sweep's name.
    summary : DataFrame
        One row per design policy: ``policy, kind``, each score's mean and
        ``_se``, ``gain`` and ``gain_se`` (paired difference of mean expected
        reward against the random control), ``replicates``, and the
        trade-off columns ``pareto``, ``score``, ``chosen``.
    differences : DataFrame
        Paired differences against the reference policy (see
        :func:`~poolbandit.compare.scoring.paired_differences`).
    curves : DataFrame
        Mean cumulative regret per participant by decision, with bands
        (see :func:`~poolbandit.compare.scoring.curve_bands`).
    sweep : DataFrame
        The ranked sweep points (see :func:`~poolbandit.compare.sweeps.rank_sweep`);
        empty without sweeps.
    frontier : DataFrame
        Every design policy and sweep point with regret, Brier score, share
        labelled, ``pareto``, ``score`` and ``chosen``.
    power : DataFrame or None
        Power per study size (see :func:`~poolbandit.compare.power.summarise_power`).
    power_studies : DataFrame or None
        One row per simulated two-group study.
    info : dict
        Settings and provenance: design title and hash, root seed entropy,
        replicates, reference, control, executor, rank_by, weight, ...
    """

    replicates: pd.DataFrame
    summary: pd.DataFrame
    differences: pd.DataFrame
    curves: pd.DataFrame
    sweep: pd.DataFrame
    frontier: pd.DataFrame
    power: pd.DataFrame | None = None
    power_studies: pd.DataFrame | None = None
    info: dict[str, Any] = field(default_factory=dict)

    def write(self, out: str | Path, *, report: bool = True) -> list[Path]:
        """Write the tables (CSV) and the HTML report into folder ``out``, each atomically.

        Files: ``replicates.csv``, ``summary.csv``, ``differences.csv``,
        ``curves.csv``, ``frontier.csv``, ``sweep.csv`` (when the design has
        sweeps), ``power.csv`` and ``power_studies.csv`` (when power was
        computed) and ``report.html``.

        Returns
        -------
        list of Path
            The files written.
        """
        from ..cli._common import atomic_path, output_dir

        folder = output_dir(out)
        tables = {"replicates": self.replicates, "summary": self.summary, "differences": self.differences,
                  "curves": self.curves, "frontier": self.frontier}
        if len(self.sweep):
            tables["sweep"] = self.sweep
        if self.power is not None:
            tables["power"] = self.power
            tables["power_studies"] = self.power_studies
        written = []
        for name, table in tables.items():
            path = folder / f"{name}.csv"
            with atomic_path(path) as tmp:
                table.to_csv(tmp, index=False, lineterminator="\n")
            written.append(path)
        if report:
            from .report import comparison_report

            path = folder / "report.html"
            with atomic_path(path) as tmp:
                tmp.write_text(comparison_report(self), encoding="utf-8")
            written.append(path)
        return written


def runnable_policies(design: DesignSpec, names: Sequence[str] | None = None) -> tuple[list[str], list[str]]:
    """Split policy names into those that can run now and those whose kind has no implementation yet.

    Raises
    ------
    InputError
        When ``names`` lists a policy the design does not have, or one whose
        kind cannot run.
    """
    if names is None:
        ok = [n for n, s in design.policies.items() if s.kind in CLASSES]
        skipped = [n for n, s in design.policies.items() if s.kind not in CLASSES]
        return ok, skipped
    out = []
    for name in names:
        spec = design.policy(name)
        if spec.kind not in CLASSES:
            raise InputError(f"--policies: policy {format_value(name)} has kind {format_value(spec.kind)}, "
                             f"which this version cannot run yet")
        out.append(name)
    return out, []


def _resolve(design: DesignSpec, names: list[str], wanted: str | None, kind: str, what: str) -> str | None:
    if wanted is not None:
        if wanted not in names:
            raise InputError(f"--{what}: expected one of the compared policies ({', '.join(names)}), "
                             f"got {format_value(wanted)}")
        return wanted
    for n in names:
        if design.policies[n].kind == kind:
            return n
    return None


def compare(
    design: DesignSpec,
    *,
    replicates: int = 50,
    rng: RngLike = None,
    policies: Sequence[str] | None = None,
    sweeps: bool = True,
    size: int | None = None,
    reference: str | None = None,
    control: str | None = None,
    scorer: Any = "default",
    rank_by: str = "regret",
    weight: float = 0.5,
    power_sizes: Sequence[int] | None = None,
    power_policy: str | None = None,
    power_replicates: int | None = None,
    alpha: float = 0.05,
    workers: int | None = None,
    scheduler: Any = None,
    executor: Executor | None = None,
    progress: bool = False,
) -> Comparison:
    """Compare the design's policies on shared simulated populations.

    Parameters
    ----------
    design : DesignSpec
    replicates : int, default=50
        Simulated studies (each with its own population), at least 2.
    rng : Generator, int or None
        Root seed; the same value gives the same tables with any executor.
    policies : sequence of str, optional
        Names of the design's policies to compare (default: every policy
        whose kind is implemented; the others are skipped with a warning).
    sweeps : bool, default=True
        Also run every point of the design's ``[[sweeps]]``.
    size : int, optional
        Participants per replicate (default ``design.population.size``).
    reference : str, optional
        Policy the paired differences are taken against (default: the first
        of kind ``pooled-thompson``, else the first compared policy).
    control : str, optional
        The control for ``gain`` and power (default: the first of kind
        ``random``; without one, gain is NaN and power uses a uniform random
        control built on the fly).
    scorer : Scorer, "default" or None
        Per-replicate scorer; ``"default"`` is
        :class:`~poolbandit.compare.scoring.ClassificationScorer()`.
    rank_by : str, default="regret"
        Score that ranks sweep points (one of :data:`RANK_METRICS`).
    weight : float in [0, 1], default=0.5
        Weight of regret against classification quality (Brier score) when
        picking a design from the trade-off.
    power_sizes : sequence of int, optional
        Study sizes (participants in both groups together) for the power of
        the two-group study; None skips power.
    power_policy : str, optional
        The adaptive condition's policy (default: the reference policy, or
        the first compared policy not of kind ``random`` when the reference
        is random).
    power_replicates : int, optional
        Simulated studies per size (default: ``replicates``).
    alpha : float, default=0.05
        Level of the power test.
    workers : int, optional
        Local worker processes (default ``os.cpu_count()``).
    scheduler : str or dask.distributed.Client, optional
        Run on a Dask cluster instead (``tcp://HOST:PORT``).
    executor : Executor, optional
        An executor to use (and not close); overrides ``workers`` and
        ``scheduler``.
    progress : bool, default=False
        Show progress bars.

    Returns
    -------
    Comparison

    Raises
    ------
    InputError
        For bad settings (fewer than 2 replicates, unknown policy names,
        a weight outside [0, 1], an unknown ranking score, bad power sizes,
        an unreachable scheduler).
    """
    if isinstance(replicates, bool) or not isinstance(replicates, (int, np.integer)) or replicates < 2:
        raise InputError(f"--replicates: expected an integer >= 2, got {replicates!r}")
    if rank_by not in RANK_METRICS:
        raise InputError(f"--rank-by: expected one of {', '.join(RANK_METRICS)}, got {format_value(rank_by)}")
    if not (isinstance(weight, (int, float)) and 0.0 <= weight <= 1.0):
        raise InputError(f"--weight: expected a number in [0, 1], got {weight!r}")
    if size is not None and (isinstance(size, bool) or not isinstance(size, (int, np.integer)) or size < 1):
        raise InputError(f"--participants: expected an integer >= 1, got {size!r}")
    names, skipped = runnable_policies(design, policies)
    if skipped:
        warnings.warn(f"skipping policies whose kind is not implemented yet: {', '.join(skipped)}",
                      UserWarning, stacklevel=2)
    if not names:
        raise InputError(f"{design.source or 'design'}: policies: no policy that can run")
    reference = _resolve(design, names, reference, "pooled-thompson", "reference") or names[0]
    control = _resolve(design, names, control, "random", "control")
    if scorer == "default":
        scorer = ClassificationScorer()
    sizes = check_sizes(power_sizes) if power_sizes is not None else None
    if power_policy is not None:
        power_policy = _resolve(design, names, power_policy, "", "power-policy")
    else:
        adaptive = [n for n in names if design.policies[n].kind != "random"]
        power_policy = reference if design.policies[reference].kind != "random" or not adaptive else adaptive[0]
    power_replicates = replicates if power_replicates is None else power_replicates
    if sizes is not None and (isinstance(power_replicates, bool) or power_replicates < 2):
        raise InputError(f"--power-replicates: expected an integer >= 2, got {power_replicates!r}")

    variants = [Variant(n, "policies", design.policies[n]) for n in names]
    sweep_points = sweep_variants(design, taken=names) if sweeps else []
    variants += sweep_points
    root = seed_sequence(rng)
    plain = portable(design)
    job = ReplicateJob(plain, tuple(portable(v) for v in variants), size, scorer)
    own = executor is None
    executor = make_executor(workers=workers, scheduler=scheduler) if own else executor
    try:
        items = [(r, child_seed(root, r)) for r in range(int(replicates))]
        results = executor.map(run_replicate, job, items, progress=progress, label="replicates")
        power_rows = None
        if sizes is not None:
            ctrl = design.policies[control] if control else PolicySpec("control", "random", {})
            pjob = PowerJob(plain, portable(design.policies[power_policy]), portable(ctrl), float(alpha))
            power_rows = executor.map(run_power_study, pjob, power_items(root, sizes, int(power_replicates)),
                                      progress=progress, label="power studies")
        info = {
            "title": design.study.title, "design": design.source, "design_sha256": design.sha256,
            "seed_entropy": root.entropy, "spawn_key": tuple(root.spawn_key), "replicates": int(replicates),
            "participants": int(size or design.population.size), "horizon": design.study.horizon,
            "arms": list(design.arms), "policies": names, "skipped": skipped, "reference": reference,
            "control": control, "executor": executor.description, "rank_by": rank_by, "weight": float(weight),
            "scorer": repr(scorer), "power_policy": power_policy if sizes else None,
            "power_replicates": int(power_replicates) if sizes else None, "alpha": float(alpha),
        }
    finally:
        if own:
            executor.close()
    return _assemble(design, variants, results, power_rows, info, alpha=alpha)


def _assemble(design: DesignSpec, variants: list[Variant], results: list[dict], power_rows: list[dict] | None,
              info: dict[str, Any], *, alpha: float) -> Comparison:
    rows = pd.DataFrame([row for res in results for row in res["rows"]])
    metrics = [c for c in rows.columns if c not in ("policy", "group", "replicate")]
    reference, control = info["reference"], info["control"]
    main = rows[rows["group"] == "policies"]

    summary = summarise_scores(main, metrics)
    summary.insert(1, "kind", [design.policies[n].kind for n in summary["policy"]])
    if control is not None:
        gain = paired_differences(main, control, ["mean_expected_reward"]).set_index("policy")
        summary["gain"] = [0.0 if n == control else gain.loc[n, "difference"] for n in summary["policy"]]
        summary["gain_se"] = [0.0 if n == control else gain.loc[n, "se"] for n in summary["policy"]]
    else:
        summary["gain"] = np.nan
        summary["gain_se"] = np.nan

    diff_metrics = [m for m in BASE_METRICS + ["brier", "label_share", "accuracy"] if m in rows.columns]
    differences = paired_differences(main, reference, diff_metrics)

    labels = [v.label for v in variants]
    curves = np.stack([res["curves"] for res in results])  # (R, V, H)
    curve_table = curve_bands(curves, labels)
    curve_table.insert(1, "group", np.repeat([v.group for v in variants], design.study.horizon))

    sweep_vs = [v for v in variants if v.group != "policies"]
    sweep = rank_sweep(rows, sweep_vs, rank_by=info["rank_by"],
                       metrics=[m for m in ("regret", "mean_expected_reward", "brier", "label_share") if m in rows])

    all_summary = summarise_scores(rows, metrics)
    all_summary.insert(1, "group", [next(v.group for v in variants if v.label == p) for p in all_summary["policy"]])
    keep = ["policy", "group"] + [c for m in ("regret", "brier", "label_share", "accuracy") if m in all_summary
                                  for c in (m, f"{m}_se")]
    frontier = tradeoff_table(all_summary[keep], weight=info["weight"])
    marks = frontier.set_index("policy")[["pareto", "score", "chosen"]]
    summary = summary.join(marks, on="policy")
    info["chosen"] = frontier.loc[frontier["chosen"], "policy"].tolist()

    power = power_studies = None
    if power_rows is not None:
        power_studies = pd.DataFrame(power_rows)
        power = summarise_power(power_studies, alpha=alpha)
        power.insert(1, "adaptive", info["power_policy"])
        power.insert(2, "control", info["control"] or "control (uniform random)")
    rows = rows[["policy", "group", "replicate"] + metrics]
    return Comparison(rows.reset_index(drop=True), summary, differences, curve_table, sweep, frontier, power,
                      power_studies, info)
