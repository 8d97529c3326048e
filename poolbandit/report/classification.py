"""The classification report: one self-contained HTML page."""

from __future__ import annotations

from typing import Sequence

import pandas as pd

from ..classify.posterior import POPULATION
from ..classify.rules import UNDETERMINED, describe_rule
from .figures import confusion_heatmap, forest_plot, prevalence_plot, probability_bars
from .html import Page

__all__ = ["classification_page"]


def classification_page(classification, *, title: str = "Participant categories", agreement=None,
                        notes: Sequence[str] = (), subtitle: str | None = None) -> Page:
    """Build the report of a :class:`~poolbandit.classify.Classification`.

    Parameters
    ----------
    classification : Classification
    title : str
    agreement : Agreement, optional
        Agreement with an intake measure (:func:`poolbandit.classify.agreement`).
    notes : sequence of str
        Extra lines for the summary (data source, engine, diagnostics).
    subtitle : str, optional
    """
    c = classification
    ctx = ", ".join(f"{k} = {v:g}" for k, v in c.context.items()) or "the reference context (every feature 0)"
    page = Page(title, subtitle=subtitle)
    page.heading("Summary")
    page.paragraph(
        f"{len(c.participants)} participants, arms {', '.join(c.arms)}. Effects are evaluated in {ctx}. "
        f"A participant gets a label when the posterior probability of its most likely category (exclusive set) "
        f"is at least {c.threshold:g}; otherwise the label is \"{UNDETERMINED}\". Intervals are highest-density "
        f"intervals with {c.mass:.0%} posterior mass.")
    page.bullets(f"{r.name}: {describe_rule(r)}" for r in c.categories)
    if notes:
        page.bullets(notes)
    counts = c.label_counts().rename("participants").rename_axis("label").reset_index()
    page.table(counts, caption="Labels")
    if c.overlapping:
        top = c.overlap_pairs.sort_values("mean_probability", ascending=False).iloc[0]
        page.note(f"The categories overlap: a posterior draw can satisfy more than one rule (for example "
                  f"\"{top.category_a}\" and \"{top.category_b}\" hold together with probability "
                  f"{top.mean_probability:.3f} on average, up to {top.max_probability:.3f} for one participant). "
                  "The column 'probability' is each rule on its own; labels and shares use the exclusive set, "
                  "in which each draw counts for the first rule it satisfies, in the design's order.",
                  warning=True)
        page.table(c.overlap_pairs[c.overlap_pairs["max_probability"] > 0], caption="Overlap of rules")
    else:
        page.paragraph("The rules did not overlap in any posterior draw: the exclusive and the per-rule "
                       "probabilities coincide.")

    page.heading("Participant effects")
    page.figure(forest_plot(c), caption=f"Posterior mean and {c.mass:.0%} HDI of each arm effect, participants "
                                        "sorted and coloured by label.")

    page.heading("Category probabilities")
    page.figure(probability_bars(c), caption="Posterior probability of each category (exclusive set); the dashed "
                                             "line is the labelling threshold.")

    page.heading("Population shares")
    has_pop = (c.prevalence["source"] == POPULATION).any()
    page.paragraph(
        "Studied participants: the expected share of each category among the participants of this study, with a "
        "credible interval computed draw by draw from their joint posterior."
        + (" New participant (population model): the probability that a new participant drawn from the fitted "
           "population distribution (coefficients beta + Gamma w + tau z, with w resampled from the observed "
           "covariates) falls in each category." if has_pop else
           " The share implied by a population model is not available for this posterior (no hierarchical "
           "population distribution, e.g. unpooled posteriors)."))
    page.figure(prevalence_plot(c.prevalence, mass=c.mass), caption="Shares (exclusive categories).")
    shown = c.prevalence[c.prevalence["set"] == "exclusive"].drop(columns="set")
    page.table(shown, caption=f"Shares with {c.mass:.0%} credible intervals (exclusive categories)")

    if agreement is not None:
        k = agreement.kappa
        page.heading("Agreement with the intake measure")
        labels_text = (
            f"Cohen's kappa over the {k.n} participants with both a posterior label and an intake category: "
            f"{k.kappa:.3f} ({k.level:.0%} confidence interval {k.low:.3f} to {k.high:.3f}; observed agreement "
            f"{k.observed:.3f}, chance agreement {k.expected:.3f})." if k.kappa == k.kappa else
            f"Cohen's kappa of the labels is undefined over the {k.n} participants with both a posterior label "
            "and an intake category (none, or a single category on both sides).")
        page.paragraph(
            f"{labels_text} {agreement.n_undetermined} participants with "
            f"an intake answer have no posterior label; {agreement.n_missing} have no intake answer. "
            f"Computed draw by draw over all {agreement.posterior_kappa['n']} participants with an answer, so that "
            f"the uncertainty of the categories counts, kappa is {agreement.posterior_kappa['mean']:.3f} "
            f"({c.mass:.0%} credible interval {agreement.posterior_kappa['low']:.3f} to "
            f"{agreement.posterior_kappa['high']:.3f}).")
        page.figure(confusion_heatmap(agreement.table), caption="Posterior label (rows) by intake category "
                                                                "(columns).")
        page.table(agreement.table, index=True, caption="Confusion table")

    page.heading("Per-participant table")
    labels = c.labels[["participant", "label", "top_category", "top_probability", "top_mc_se"]]
    page.table(labels.merge(_wide_means(c), on="participant"), caption="Labels and posterior mean arm effects",
               max_rows=400)
    return page


def _wide_means(c) -> pd.DataFrame:
    eff = c.effects[c.effects["kind"] == "arm"]
    wide = eff.pivot(index="participant", columns="quantity", values="mean")[list(c.arms)]
    wide.columns = [f"mean {a}" for a in wide.columns]
    return wide.reset_index()
