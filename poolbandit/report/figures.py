"""Matplotlib figures of classification results.

Every function returns a :class:`matplotlib.figure.Figure` built without
pyplot (no global figure registry, no backend choice, safe in worker
processes); embed it in a report with :meth:`poolbandit.report.html.Page.figure`
or save it with ``fig.savefig``.

Colours: one colour per category in the design's order, grey for
``"undetermined"``, the same in every figure.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from ..classify.rules import UNDETERMINED

__all__ = [
    "category_colors",
    "participant_order",
    "forest_plot",
    "probability_bars",
    "prevalence_plot",
    "reliability_diagram",
    "confusion_heatmap",
]

_PALETTE = ["#1f77b4", "#d62728", "#2ca02c", "#9467bd", "#ff7f0e", "#8c564b", "#e377c2", "#17becf", "#bcbd22"]
_GREY = "#9a9a9a"


def category_colors(names: Sequence[str]) -> dict[str, str]:
    """A colour per category name; ``"undetermined"`` is grey."""
    out, j = {}, 0
    for n in names:
        if n == UNDETERMINED:
            out[n] = _GREY
        else:
            out[n] = _PALETTE[j % len(_PALETTE)]
            j += 1
    out.setdefault(UNDETERMINED, _GREY)
    return out


def participant_order(classification) -> list[str]:
    """Participants grouped by label (design order, undetermined last), most certain first."""
    lab = classification.labels
    rank = {n: j for j, n in enumerate(classification.names)}
    key = pd.DataFrame({
        "participant": lab["participant"],
        "group": lab["label"].map(rank),
        "top": -lab["top_probability"],
        "sub": lab["top_category"].map(rank),
    })
    return key.sort_values(["group", "sub", "top", "participant"], kind="mergesort")["participant"].tolist()


def _height(n: int) -> float:
    return float(np.clip(1.2 + 0.14 * n, 3.0, 40.0))


def forest_plot(classification, *, quantities: Sequence[str] | None = None, title: str | None = None) -> Figure:
    """Posterior mean and HDI of each participant's arm effects, one panel per arm.

    Participants are sorted by label (see :func:`participant_order`) and
    coloured by it.

    Parameters
    ----------
    classification : Classification
    quantities : sequence of str, optional
        Arms or contrasts to show (default: every arm).
    title : str, optional
    """
    eff = classification.effects
    quantities = list(quantities) if quantities is not None else list(classification.arms)
    order = participant_order(classification)
    n = len(order)
    pos = {p: n - 1 - j for j, p in enumerate(order)}  # first participant at the top
    colors = category_colors(classification.names)
    label_of = classification.labels.set_index("participant")["label"]
    fig = Figure(figsize=(3.2 * len(quantities) + 1.4, _height(n)), layout="constrained")
    axes = fig.subplots(1, len(quantities), sharey=True, squeeze=False)[0]
    for ax, q in zip(axes, quantities):
        part = eff[eff["quantity"] == q].set_index("participant").loc[order]
        y = np.array([pos[p] for p in part.index])
        col = [colors[label_of[p]] for p in part.index]
        ax.hlines(y, part["hdi_low"], part["hdi_high"], colors=col, linewidth=1.4)
        ax.scatter(part["mean"], y, c=col, s=12, zorder=3)
        ax.set_title(q)
        ax.grid(axis="x", alpha=0.3)
        ax.set_xlabel(f"effect ({classification.mass:.0%} HDI)")
    axes[0].set_yticks(np.arange(n))
    axes[0].set_yticklabels(order[::-1], fontsize=6 if n > 40 else 8)
    if n > 150:
        axes[0].set_yticklabels([])
    axes[0].set_ylim(-1, n)
    handles = [Patch(color=colors[k], label=k) for k in classification.names]
    fig.legend(handles=handles, loc="outside lower center", ncol=min(len(handles), 5), frameon=False, title="label")
    if title:
        fig.suptitle(title)
    return fig


def probability_bars(classification, *, title: str | None = None) -> Figure:
    """Stacked bars of each participant's exclusive category probabilities.

    The dashed line marks the labelling threshold; participants are in the
    order of :func:`forest_plot`.
    """
    probs = classification.probabilities.pivot(index="participant", columns="category",
                                               values="exclusive_probability")
    order = participant_order(classification)
    names = classification.names
    probs = probs.loc[order, names]
    n = len(order)
    colors = category_colors(names)
    fig = Figure(figsize=(7.5, _height(n)), layout="constrained")
    ax = fig.subplots()
    y = np.arange(n)[::-1]
    left = np.zeros(n)
    for name in names:
        v = probs[name].to_numpy()
        ax.barh(y, v, left=left, color=colors[name], height=0.85, label=name, linewidth=0)
        left += v
    ax.axvline(classification.threshold, color="black", linestyle="--", linewidth=0.9)
    ax.set_xlim(0, 1)
    ax.set_ylim(-1, n)
    ax.set_yticks(y)
    ax.set_yticklabels(order, fontsize=6 if n > 40 else 8)
    if n > 150:
        ax.set_yticklabels([])
    ax.set_xlabel("posterior probability (exclusive categories)")
    fig.legend(loc="outside lower center", ncol=min(len(names), 5), frameon=False)
    if title:
        ax.set_title(title)
    return fig


def prevalence_plot(prevalence: pd.DataFrame, *, set_name: str = "exclusive", mass: float | None = None,
                    title: str | None = None) -> Figure:
    """Share of each category with its interval, one marker per source.

    Parameters
    ----------
    prevalence : DataFrame
        ``Classification.prevalence`` (source, set, category, share, low, high).
    set_name : {"exclusive", "marginal"}, default="exclusive"
    mass : float, optional
        Credible mass, for the axis label.
    """
    part = prevalence[prevalence["set"] == set_name]
    cats = list(dict.fromkeys(part["category"]))
    sources = list(dict.fromkeys(part["source"]))
    fig = Figure(figsize=(7.5, 1.0 + 0.55 * len(cats) * max(1, len(sources)) ** 0.5), layout="constrained")
    ax = fig.subplots()
    markers = ["o", "s", "D", "^"]
    width = 0.5
    for j, source in enumerate(sources):
        s = part[part["source"] == source].set_index("category").reindex(cats)
        off = (j - (len(sources) - 1) / 2) * width / max(1, len(sources))
        y = np.arange(len(cats))[::-1] + off
        err = np.vstack([s["share"] - s["low"], s["high"] - s["share"]])
        ax.errorbar(s["share"], y, xerr=err, fmt=markers[j % len(markers)], capsize=3, label=source)
    ax.set_yticks(np.arange(len(cats))[::-1])
    ax.set_yticklabels(cats)
    ax.set_xlim(0, 1)
    ax.grid(axis="x", alpha=0.3)
    ax.set_xlabel("share of participants" + (f" ({mass:.0%} credible interval)" if mass else ""))
    ax.legend(loc="best", fontsize=8)
    if title:
        ax.set_title(title)
    return fig


def reliability_diagram(table: pd.DataFrame, *, title: str | None = None) -> Figure:
    """Observed frequency against mean forecast per bin (:func:`poolbandit.classify.reliability_table`).

    Error bars are two binomial standard errors; the diagonal is perfect calibration.
    """
    fig = Figure(figsize=(5.0, 5.0), layout="constrained")
    ax = fig.subplots()
    ax.plot([0, 1], [0, 1], color="black", linewidth=0.8, linestyle="--")
    ax.errorbar(table["mean_probability"], table["observed"], yerr=2 * table["observed_se"], fmt="o", capsize=3)
    for r in table.itertuples():
        ax.annotate(str(int(r.n)), (r.mean_probability, r.observed), textcoords="offset points", xytext=(4, -10),
                    fontsize=7, color="#555")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.set_xlabel("forecast probability (bin mean)")
    ax.set_ylabel("observed frequency")
    if title:
        ax.set_title(title)
    return fig


def confusion_heatmap(table: pd.DataFrame, *, title: str | None = None) -> Figure:
    """Counts of a confusion table (rows and columns as labelled in ``table``)."""
    v = table.to_numpy()
    fig = Figure(figsize=(1.6 + 1.1 * v.shape[1], 1.4 + 0.6 * v.shape[0]), layout="constrained")
    ax = fig.subplots()
    ax.imshow(v, cmap="Blues", aspect="auto")
    for i in range(v.shape[0]):
        for j in range(v.shape[1]):
            ax.text(j, i, str(v[i, j]), ha="center", va="center",
                    color="white" if v[i, j] > 0.6 * max(v.max(), 1) else "black")
    ax.set_xticks(range(v.shape[1]))
    ax.set_xticklabels([str(c) for c in table.columns], rotation=30, ha="right")
    ax.set_yticks(range(v.shape[0]))
    ax.set_yticklabels([str(r) for r in table.index])
    ax.set_xlabel(table.columns.name or "")
    ax.set_ylabel(table.index.name or "")
    if title:
        ax.set_title(title)
    return fig
