"""The ``report.html`` page of ``poolbandit analyse`` (built with :class:`poolbandit.report.Page`)."""

from __future__ import annotations

import pandas as pd

from .arm_values import ESTIMATOR_LABELS
from .run import ADAPTIVE_CAUTION, ESTIMAND_TEXT, AnalysisResult

__all__ = ["analysis_page", "arm_value_figure"]

_COLORS = {"naive": "#9a9a9a", "ipw": "#1f77b4", "hajek": "#17becf", "dr": "#d62728", "model": "#2ca02c"}


def arm_value_figure(arm_values: pd.DataFrame, *, group: str = "all", level: float = 0.95):
    """Estimates and intervals of every arm by estimator (a matplotlib Figure, built without pyplot)."""
    from matplotlib.figure import Figure

    t = arm_values[(arm_values["group"] == group) & (arm_values["status"] == "ok")]
    arms = list(pd.unique(arm_values["arm"]))
    ests = [e for e in _COLORS if e in set(t["estimator"])]
    fig = Figure(figsize=(7, 0.6 + 0.9 * len(arms)))
    ax = fig.subplots()
    step = 0.8 / max(len(ests), 1)
    for j, est in enumerate(ests):
        sub = t[t["estimator"] == est].set_index("arm").reindex(arms)
        y = [len(arms) - 1 - i + 0.4 - (j + 0.5) * step for i in range(len(arms))]
        lo = (sub["estimate"] - sub["lower"]).to_numpy()
        hi = (sub["upper"] - sub["estimate"]).to_numpy()
        ax.errorbar(sub["estimate"], y, xerr=[lo, hi], fmt="o", color=_COLORS[est], label=est, capsize=2, ms=4)
    ax.set_yticks(range(len(arms)), arms[::-1])
    ax.set_xlabel(f"arm value (estimate and {level:.0%} interval)")
    ax.legend(loc="best", fontsize="small")
    fig.tight_layout()
    return fig


def _interval(df: pd.DataFrame) -> pd.DataFrame:
    return df.drop(columns=[c for c in ("label",) if c in df.columns])


def analysis_page(result: AnalysisResult, *, level: float = 0.95):
    """A :class:`poolbandit.report.Page` with the three tables, the notes and the caution."""
    from ..report.html import Page

    page = Page("End-of-study analysis", subtitle=result.title or None)
    page.heading("Read this first")
    page.note(ADAPTIVE_CAUTION, warning=True)
    page.paragraph(ESTIMAND_TEXT)
    if result.notes:
        page.bullets(result.notes)
    for w in result.warnings:
        page.note(w, warning=True)

    page.heading("Arm values")
    page.paragraph(f"Estimates with {level:.0%} intervals. Estimators: "
                   + "; ".join(f"{k} = {ESTIMATOR_LABELS[k]}" for k in ("naive", "ipw", "hajek", "dr", "model"))
                   + ". Rows with status 'refused' could not be estimated from this log; the note says why.")
    av = result.arm_values
    wide = av[av["group"] == "all"].pivot(index="arm", columns="estimator", values="estimate")
    wide = wide.reindex(index=pd.unique(av["arm"]),
                        columns=[c for c in ("naive", "ipw", "hajek", "dr", "model") if c in wide.columns])
    page.table(wide.reset_index(), caption="Point estimates by estimator (all participants)")
    page.figure(arm_value_figure(av, level=level),
                caption="Arm values by estimator, all participants; the naive mean is shown for contrast only")
    page.table(_interval(av), caption="All estimates", max_rows=200)

    page.heading("Policy values")
    page.paragraph("Off-policy estimates of what other policies would have earned on this study's decisions: "
                   "ipw (inverse-propensity weighted), snipw (self-normalised), dr (doubly robust), model "
                   "(direct method with the outcome model). ess is Kish's effective sample size of the weights; "
                   "share_above_bound is the share of decisions whose weight exceeds weight_bound.")
    page.table(_interval(result.policy_values), caption="Policy values", max_rows=200)

    page.heading("Adaptive against control")
    page.table(result.conditions, caption="Adaptive minus control")
    return page
