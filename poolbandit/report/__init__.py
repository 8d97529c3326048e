"""Figures and self-contained HTML reports.

* :mod:`.html`: :class:`Page`, a small builder of one-file HTML reports
  (figures embedded as base64 PNG);
* :mod:`.figures`: matplotlib figures of classification results;
* :mod:`.classification`: the page written by ``poolbandit classify``.
"""

from .classification import classification_page
from .figures import category_colors, confusion_heatmap, forest_plot, participant_order, prevalence_plot, \
    probability_bars, reliability_diagram
from .html import Page, figure_to_png, png_data_uri

__all__ = [
    "Page", "category_colors", "classification_page", "confusion_heatmap", "figure_to_png", "forest_plot",
    "participant_order", "png_data_uri", "prevalence_plot", "probability_bars", "reliability_diagram",
]
