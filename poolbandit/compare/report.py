"""Figures and the standalone HTML report of a design comparison.

Every figure is a :class:`matplotlib.figure.Figure` made without pyplot (no
global state, safe in threads) and embedded in the page as a base64 PNG
through :class:`poolbandit.report.Page`, so ``report.html`` stands alone.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from ..report import Page

if TYPE_CHECKING:  # pragma: no cover
    from .comparison import Comparison

__all__ = [
    "comparison_report",
    "add_comparison_sections",
    "regret_curves_figure",
    "differences_figure",
    "frontier_figure",
    "sweep_figure",
    "power_figure",
]

_Z = 1.959964


def _colors(labels) -> dict[str, str]:
    palette = ["#1f77b4", "#d62728", "#2ca02c", "#ff7f0e", "#9467bd", "#8c564b", "#e377c2", "#7f7f7f",
               "#bcbd22", "#17becf"]
    return {lab: palette[i % len(palette)] for i, lab in enumerate(labels)}


def regret_curves_figure(curves: pd.DataFrame, *, policies=None, reference: str | None = None) -> Figure:
    """Mean cumulative regret per participant by decision, with 95% Monte Carlo bands."""
    data = curves[curves["group"] == "policies"] if "group" in curves else curves
    names = list(pd.unique(data["policy"])) if policies is None else list(policies)
    colors = _colors(names)
    fig = Figure(figsize=(7.5, 4.6))
    ax = fig.add_subplot()
    for name in names:
        d = data[data["policy"] == name]
        lw = 2.6 if name == reference else 1.6
        ax.plot(d["decision"], d["cumulative_regret"], color=colors[name], lw=lw, label=name)
        ax.fill_between(d["decision"], d["lower"], d["upper"], color=colors[name], alpha=0.18, lw=0)
    ax.set_xlabel("decision")
    ax.set_ylabel("cumulative regret per participant")
    ax.set_title("Regret over the study (bands: 95% Monte Carlo intervals of the mean)")
    ax.legend(fontsize=8, ncol=2, frameon=False)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    return fig


def differences_figure(differences: pd.DataFrame, *, metrics=("regret", "mean_expected_reward", "brier")) -> Figure:
    """Paired differences against the reference with 95% intervals (thick: paired; thin: as if unpaired)."""
    metrics = [m for m in metrics if m in set(differences["metric"])]
    fig = Figure(figsize=(4.0 * max(1, len(metrics)), 0.45 * differences["policy"].nunique() + 1.6))
    axes = fig.subplots(1, max(1, len(metrics)), sharey=True, squeeze=False)[0]
    ref = differences["reference"].iloc[0] if len(differences) else ""
    for ax, m in zip(axes, metrics):
        d = differences[differences["metric"] == m].reset_index(drop=True)
        y = np.arange(len(d))[::-1]
        ax.errorbar(d["difference"], y, xerr=_Z * d["se_unpaired"], fmt="none", ecolor="#aaaaaa", elinewidth=1,
                    capsize=3, label="unpaired SE")
        ax.errorbar(d["difference"], y, xerr=_Z * d["se"], fmt="o", color="#1f4e79", elinewidth=2.5, capsize=0,
                    label="paired SE")
        ax.axvline(0.0, color="k", lw=0.8)
        ax.set_yticks(y, d["policy"])
        ax.set_title(f"{m}: policy - {ref}", fontsize=10)
        ax.grid(axis="x", alpha=0.3)
    if len(metrics):
        axes[0].legend(fontsize=7, frameon=False, loc="best")
    fig.tight_layout()
    return fig


def frontier_figure(frontier: pd.DataFrame) -> Figure:
    """Regret against classification quality: Brier score and share labelled; non-dominated designs marked."""
    fig = Figure(figsize=(11, 4.6))
    axes = fig.subplots(1, 2)
    groups = list(pd.unique(frontier["group"]))
    colors = _colors(groups)
    for ax, (col, title) in zip(axes, [("brier", "Brier score (lower is better)"),
                                       ("label_share", "share labelled (higher is better)")]):
        if col not in frontier:
            continue
        for g in groups:
            d = frontier[frontier["group"] == g]
            ax.errorbar(d["regret"], d[col], xerr=d["regret_se"], yerr=d.get(f"{col}_se"), fmt="o",
                        color=colors[g], ms=5, elinewidth=0.8, alpha=0.85,
                        label="design policies" if g == "policies" else f"sweep {g}")
        front = frontier[frontier["pareto"]].sort_values("regret")
        ax.scatter(front["regret"], front[col], s=140, facecolors="none", edgecolors="k", lw=1.4,
                   label="non-dominated (regret, Brier)")
        chosen = frontier[frontier["chosen"]]
        ax.scatter(chosen["regret"], chosen[col], s=260, marker="*", color="gold", edgecolors="k", zorder=5,
                   label="chosen with the weight")
        for _, row in frontier.iterrows():
            if np.isfinite(row[col]):
                ax.annotate(row["policy"], (row["regret"], row[col]), fontsize=7, xytext=(4, 3),
                            textcoords="offset points")
        if col == "brier":
            ax.plot(front["regret"], front[col], color="k", lw=0.8, ls="--")
        ax.set_xlabel("cumulative regret per participant (lower is better)")
        ax.set_ylabel(title)
        ax.grid(alpha=0.3)
    axes[0].legend(fontsize=7, frameon=False)
    fig.tight_layout()
    return fig


def sweep_figure(sweep: pd.DataFrame, *, rank_by: str = "regret") -> Figure:
    """Every sweep point's score with +-2 paired SE from the best; points near the best filled."""
    names = list(pd.unique(sweep["sweep"]))
    fig = Figure(figsize=(7.5, 0.38 * len(sweep) + 1.4 * len(names) + 0.6))
    axes = fig.subplots(len(names), 1, squeeze=False)[:, 0]
    for ax, name in zip(axes, names):
        d = sweep[sweep["sweep"] == name].sort_values("rank").reset_index(drop=True)
        y = np.arange(len(d))[::-1]
        ax.errorbar(d[rank_by], y, xerr=2 * d["difference_se"], fmt="none", ecolor="#888888", capsize=3)
        near = d["near_best"].to_numpy(dtype=bool)
        ax.scatter(d[rank_by][near], y[near], color="#1f4e79", zorder=3, label="within 2 SE of the best")
        ax.scatter(d[rank_by][~near], y[~near], facecolors="white", edgecolors="#1f4e79", zorder=3,
                   label="worse than the best")
        ax.set_yticks(y, [f"{r}. {p}" for r, p in zip(d["rank"], d["policy"])])
        ax.set_title(f"sweep {name}: ranked by {rank_by} (bars: 2 paired SE of the gap to the best)", fontsize=10)
        ax.grid(axis="x", alpha=0.3)
        ax.legend(fontsize=7, frameon=False)
    axes[-1].set_xlabel(rank_by)
    fig.tight_layout()
    return fig


def power_figure(power: pd.DataFrame) -> Figure:
    """Power by study size (binomial 95% intervals) and the expected difference with its range."""
    fig = Figure(figsize=(10, 4.0))
    a, b = fig.subplots(1, 2)
    a.errorbar(power["size"], power["power"], yerr=_Z * power["power_se"], fmt="o-", color="#1f4e79", capsize=3)
    a.axhline(power["alpha"].iloc[0], color="#c77c0e", ls=":", label="alpha")
    a.axhline(0.8, color="#888888", ls="--", lw=0.8, label="0.8")
    a.set_ylim(0, 1.02)
    a.set_xlabel("participants (both groups)")
    a.set_ylabel("power of Welch's t-test")
    a.set_title("Power: adaptive condition against random control", fontsize=10)
    a.legend(fontsize=8, frameon=False)
    a.grid(alpha=0.3)
    b.fill_between(power["size"], power["difference_low"], power["difference_high"], color="#1f4e79", alpha=0.15,
                   label="95% of single-study estimates")
    b.errorbar(power["size"], power["difference"], yerr=_Z * power["difference_se"], fmt="o-", color="#1f4e79",
               capsize=3, label="expected difference")
    b.axhline(0.0, color="k", lw=0.8)
    b.set_xlabel("participants (both groups)")
    b.set_ylabel("difference in mean reward")
    b.set_title("Adaptive minus control", fontsize=10)
    b.legend(fontsize=8, frameon=False)
    b.grid(alpha=0.3)
    fig.tight_layout()
    return fig


_SUMMARY_COLS = ["policy", "kind", "regret", "regret_se", "mean_expected_reward", "mean_expected_reward_se",
                 "gain", "gain_se", "best_arm_share", "best_arm_identified", "brier", "brier_se", "label_share",
                 "accuracy", "pareto", "chosen"]


def add_comparison_sections(page: Page, comparison: Comparison) -> Page:
    """Append the comparison's sections (tables and figures) to ``page``."""
    c, info = comparison, comparison.info
    page.heading("Design comparison")
    page.paragraph(
        f"{info['replicates']} simulated studies of {info['participants']} participants and {info['horizon']} "
        f"decisions each. In every replicate all policies meet the same participants and the same random "
        f"outcomes (common random numbers), so differences between policies are paired replicate by replicate. "
        f"Seed entropy {info['seed_entropy']}; run on {info['executor']}.")
    if info.get("skipped"):
        page.note("Not compared (kind not implemented in this version): " + ", ".join(info["skipped"]), warning=True)
    cols = [col for col in _SUMMARY_COLS if col in c.summary]
    page.table(c.summary[cols], caption="Mean over replicates with Monte Carlo standard errors (_se). Regret is "
                                        "per participant over the study; gain is the paired difference in mean "
                                        "expected reward against the random control.")
    page.heading("Regret curves", level=3)
    page.figure(regret_curves_figure(c.curves, reference=info.get("reference")),
                caption="Mean cumulative regret per participant after each decision.", alt="regret curves")
    page.heading(f"Paired differences against {info['reference']}", level=3)
    page.figure(differences_figure(c.differences),
                caption="Thick bars: 95% intervals from the paired standard error; thin grey bars: what "
                        "independent (unpaired) runs of the same size would give.", alt="paired differences")
    page.table(c.differences[c.differences["metric"].isin(["regret", "mean_expected_reward", "brier"])],
               caption="Paired differences (policy minus reference).")

    page.heading("Regret against classification")
    page.paragraph(
        "Each point is a design policy or a sweep point: its regret and how well its data classify participants "
        "at the end (Brier score of the category probabilities, share of participants labelled). Circled points "
        f"are not dominated on regret and Brier score; the star is the pick with weight {info['weight']:g} on "
        f"regret and {1 - info['weight']:g} on the Brier score (both rescaled to [0, 1] over the candidates).")
    page.figure(frontier_figure(c.frontier), caption="Regret against classification quality.", alt="frontier")
    page.table(c.frontier, caption="Trade-off table (score: weighted, smaller is better).")

    if len(c.sweep):
        page.heading("Tuning sweeps")
        page.paragraph(f"Grid points ranked by {info['rank_by']}; points within two paired standard errors of the "
                       "best cannot be told apart from it with these replicates.")
        page.figure(sweep_figure(c.sweep, rank_by=info["rank_by"]), caption="Sweep ranking.", alt="sweep ranking")
        page.table(c.sweep, caption="Sweep points.")
    if c.power is not None:
        page.heading("Power of the two-group study")
        page.paragraph(
            f"Participants randomised half and half to the adaptive condition ({info['power_policy']}) or uniform "
            f"random control; each participant's mean observed reward compared with Welch's t-test at level "
            f"{info['alpha']:g}; {info['power_replicates']} simulated studies per size.")
        page.figure(power_figure(c.power), caption="Power and expected difference by study size.", alt="power curve")
        page.table(c.power, caption="Power by study size.")
    return page


def comparison_report(comparison: Comparison) -> str:
    """The whole standalone HTML report of a comparison, as a string."""
    info = comparison.info
    page = Page(f"Design comparison: {info.get('title') or 'design'}",
                subtitle=f"{info.get('design') or ''} (sha256 {str(info.get('design_sha256', ''))[:12]})")
    add_comparison_sections(page, comparison)
    return page.render()
