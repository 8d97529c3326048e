"""Tuning sweeps: every point of a parameter grid, run with common random numbers, ranked.

A ``[[sweeps]]`` block of the design names a policy and a grid of parameter
values (:class:`poolbandit.spec.SweepSpec`)::

    [[sweeps]]
    name = "ucb-constant"
    policy = "ucb"
    grid = { c = [0.1, 0.25, 0.5, 1.0] }

Every point of the cartesian product of the grid becomes a policy of its
own (the base policy's parameters with the point's values), labelled
``ucb-constant[c=0.1]``, and runs in every replicate of the comparison on the
same populations and environment streams as everything else. The points are
then ranked by a chosen score; because the runs are paired, the distance of
each point from the best is judged with the paired standard error of their
difference, and points within two such standard errors of the best are
flagged: the data cannot tell them apart from the best.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from ..errors import DesignError, format_value
from ..spec import DesignSpec, PolicySpec, SweepSpec
from .engine import Variant
from .scoring import METRIC_DIRECTIONS, summarise_scores

__all__ = ["sweep_points", "sweep_variants", "rank_sweep"]


def sweep_points(sweep: SweepSpec) -> list[dict[str, Any]]:
    """The cartesian product of a sweep's grid, in grid order (the last key varies fastest)."""
    keys = list(sweep.grid)
    return [dict(zip(keys, combo)) for combo in itertools.product(*(sweep.grid[k] for k in keys))]


def _fmt(value: Any) -> str:
    if isinstance(value, float) and value.is_integer():
        return f"{value:g}"
    if isinstance(value, tuple):
        return "[" + ",".join(_fmt(v) for v in value) + "]"
    return str(value)


def sweep_variants(design: DesignSpec, sweeps: Sequence[SweepSpec] | None = None,
                   *, taken: Sequence[str] = ()) -> list[Variant]:
    """One :class:`~poolbandit.compare.engine.Variant` per grid point of every sweep.

    Parameters
    ----------
    design : DesignSpec
    sweeps : sequence of SweepSpec, optional
        Default: ``design.sweeps``.
    taken : sequence of str
        Labels already in use (the design's policy names); a clash raises.

    Raises
    ------
    DesignError
        When a point breaks a rule that involves more than one value (a
        ``clip`` band that excludes 1/K, ``explore_first`` beyond the
        horizon) or its label clashes with a policy name.
    """
    sweeps = design.sweeps if sweeps is None else tuple(sweeps)
    out: list[Variant] = []
    used = set(taken)
    k = design.n_arms
    for i, sweep in enumerate(sweeps):
        where = f"sweeps[{_index(design, sweep, i)}]"
        base = design.policy(sweep.policy)
        for point in sweep_points(sweep):
            params = {**base.params, **point}
            clip = params.get("clip")
            if clip is not None and (clip[0] > 1 / k or clip[1] < 1 / k):
                raise DesignError(f"{where}.grid.clip", f"expected bands that contain 1/K = {1 / k:.4g}, "
                                                        f"got {list(clip)!r}", source=design.source)
            if int(params.get("explore_first", 0) or 0) > design.study.horizon:
                raise DesignError(f"{where}.grid.explore_first",
                                  f"expected at most study.horizon = {design.study.horizon}, "
                                  f"got {params['explore_first']!r}", source=design.source)
            label = f"{sweep.name}[" + ", ".join(f"{key}={_fmt(v)}" for key, v in point.items()) + "]"
            if label in used:
                raise DesignError(f"{where}.name", f"the sweep point label {format_value(label)} is already "
                                                   "the name of a policy or another point", source=design.source)
            used.add(label)
            out.append(Variant(label, sweep.name, PolicySpec(label, base.kind, params), dict(point)))
    return out


def _index(design: DesignSpec, sweep: SweepSpec, fallback: int) -> int:
    for j, s in enumerate(design.sweeps):
        if s.name == sweep.name:
            return j
    return fallback


def rank_sweep(rows: pd.DataFrame, variants: Sequence[Variant], *, rank_by: str = "regret",
               metrics: Sequence[str] = (), within: float = 2.0) -> pd.DataFrame:
    """Rank the points of every sweep by one score.

    Parameters
    ----------
    rows : DataFrame
        One row per (policy label, replicate) with the score columns
        (the comparison's ``replicates`` table).
    variants : sequence of Variant
        The sweep points (``group`` is the sweep name, ``point`` its values).
    rank_by : str, default="regret"
        The score to rank by; its direction comes from
        :data:`~poolbandit.compare.scoring.METRIC_DIRECTIONS`.
    metrics : sequence of str
        Further scores to report (mean and SE) beside it.
    within : float, default=2.0
        A point is flagged ``near_best`` when it lies within ``within``
        paired standard errors of the best point of its sweep.

    Returns
    -------
    DataFrame
        One row per point: ``sweep``, ``policy`` (the label), one column per
        grid key, ``<rank_by>`` and ``<rank_by>_se``, the other scores with
        their SEs, ``difference`` (from the best point, in the ranking
        score), ``difference_se`` (paired, over replicates), ``rank``
        (1 = best, int) and ``near_best`` (bool; the best point itself is
        near best).
    """
    if rank_by not in METRIC_DIRECTIONS:
        raise ValueError(f"rank_by must be one of {sorted(METRIC_DIRECTIONS)}, got {rank_by!r}")
    sign = METRIC_DIRECTIONS[rank_by]
    tables = []
    keys = list(dict.fromkeys(k for v in variants for k in v.point))
    for sweep in dict.fromkeys(v.group for v in variants):
        points = [v for v in variants if v.group == sweep]
        labels = [v.label for v in points]
        sub = rows[rows["policy"].isin(labels)]
        cols = [rank_by] + [m for m in metrics if m != rank_by]
        summary = summarise_scores(sub, cols).set_index("policy").reindex(labels)
        wide = sub.pivot(index="replicate", columns="policy", values=rank_by)[labels]
        means = wide.mean(axis=0).to_numpy()
        if np.isfinite(means).any():
            best = labels[int(np.nanargmax(sign * means))]
        else:
            best = labels[0]
        diff = wide.sub(wide[best], axis=0)
        n = diff.count(axis=0)
        d_mean = diff.mean(axis=0)
        d_se = diff.std(axis=0, ddof=1) / np.sqrt(n)
        table = pd.DataFrame({"sweep": sweep, "policy": labels})
        for key in keys:
            table[key] = [_cell(v.point.get(key)) for v in points]
        for c in cols:
            table[c] = summary[c].to_numpy()
            table[f"{c}_se"] = summary[f"{c}_se"].to_numpy()
        table["difference"] = d_mean.to_numpy()
        table["difference_se"] = d_se.to_numpy()
        order = np.argsort(-sign * means, kind="stable")
        rank = np.empty(len(labels), dtype=np.int64)
        rank[order] = np.arange(1, len(labels) + 1)
        table["rank"] = rank
        near = (np.abs(d_mean.to_numpy()) <= within * np.nan_to_num(d_se.to_numpy(), nan=0.0)) | \
               (np.array(labels) == best)
        table["near_best"] = near.astype(bool)
        tables.append(table)
    if not tables:
        return pd.DataFrame(columns=["sweep", "policy", rank_by, f"{rank_by}_se", "difference", "difference_se",
                                     "rank", "near_best"])
    return pd.concat(tables, ignore_index=True)


def _cell(value: Any) -> Any:
    return _fmt(value) if isinstance(value, tuple) else value
