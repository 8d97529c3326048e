"""The HTML report toolkit and the classification page.

Outside references: the HTML5 parsing rules as implemented by Python's
``html.parser`` (the page must parse, every ``img`` must carry a ``data:``
URI that decodes to a PNG, checked with the PNG signature of the PNG
specification, ISO/IEC 15948, section 5.2) and pandas for the table cells.
"""

from __future__ import annotations

import base64
import html.parser

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from matplotlib.figure import Figure

from poolbandit.classify import agreement, classify
from poolbandit.report import Page, classification_page, forest_plot, prevalence_plot, probability_bars, \
    reliability_diagram

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


class _Collect(html.parser.HTMLParser):
    def __init__(self):
        super().__init__()
        self.imgs, self.tags, self.cells, self.text = [], [], [], []
        self._in_td = False

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag == "img":
            self.imgs.append(dict(attrs))
        self._in_td = tag in ("td", "th")

    def handle_endtag(self, tag):
        if tag in ("td", "th"):
            self._in_td = False

    def handle_data(self, data):
        self.text.append(data)
        if self._in_td:
            self.cells.append(data)


def _parse(text: str) -> _Collect:
    p = _Collect()
    p.feed(text)
    p.close()
    return p


def _decode_imgs(parsed: _Collect) -> list[bytes]:
    out = []
    for img in parsed.imgs:
        src = img["src"]
        assert src.startswith("data:image/png;base64,"), src[:40]
        out.append(base64.b64decode(src.split(",", 1)[1], validate=True))
    return out


@pytest.fixture(scope="module")
def small_classification(demo_design):
    """A seeded synthetic posterior for 12 participants of the demo design."""
    rng = np.random.default_rng(20261202)
    n = 12
    mu = rng.normal(2.4, 0.4, size=(n, 3))
    e = mu[None, None] + 0.2 * rng.standard_normal((2, 200, n, 3))
    ids = [f"p{i:03d}" for i in range(n)]
    eff = xr.DataArray(e, dims=("chain", "draw", "participant", "arm"),
                       coords={"participant": ids, "arm": list(demo_design.arms)})
    pop = xr.DataArray(2.4 + 0.4 * rng.standard_normal((2, 200, 30, 3)), dims=("chain", "draw", "participant", "arm"),
                       coords={"participant": [f"new{j}" for j in range(30)], "arm": list(demo_design.arms)})
    return classify(eff, demo_design.categories, population_effect=pop, context={"weekend": 0.0})


def test_page_blocks_escape_and_tables(tmp_path):
    """Check that a Page escapes text, writes a parseable file and shows table cells as pandas holds them.

    Source: Python's html.parser (HTML5 tokenizer rules) as the reference reader.
    """
    df = pd.DataFrame({"name": ["a<b", "c&d"], "value": [0.123456, 2.0], "n": [3, 4], "flag": [True, False]})
    fig = Figure()
    fig.subplots().plot([0, 1], [1, 0])
    page = (Page("Title <x>", subtitle="sub").heading("One").paragraph("1 < 2 & 3").note("careful", warning=True)
            .bullets(["x", "y"]).heading("Two").table(df, caption="cap").heading("Three").figure(fig, caption="f"))
    path = page.write(tmp_path / "page.html")
    text = path.read_text(encoding="utf-8")
    parsed = _parse(text)
    assert "<x>" not in text and "Title &lt;x&gt;" in text  # escaped, never raw markup
    assert "1 < 2 & 3" in "".join(parsed.text)  # the reader gets the original text back
    assert ["a<b", "0.123", "3", "yes", "c&d", "2.000", "4", "no"] == [c for c in parsed.cells
                                                                        if c not in df.columns]
    imgs = _decode_imgs(parsed)
    assert len(imgs) == 1 and imgs[0].startswith(PNG_SIGNATURE)
    assert "nav" in parsed.tags  # three sections get a table of contents
    assert not list(tmp_path.glob(".*.tmp"))  # the atomic write left no temporary file


def test_page_table_max_rows_says_what_is_left_out():
    """Check that a truncated table says how many rows are not shown (common practice for long tables)."""
    df = pd.DataFrame({"x": np.arange(10)})
    text = Page("t").table(df, max_rows=3).render()
    assert "7 more rows not shown" in text
    assert len(_parse(text).cells) == 1 + 3  # header + three rows


def test_classification_report_embeds_every_figure(small_classification, tmp_path, demo_design):
    """Check that the report embeds the forest plot, the probability bars, the shares and the confusion
    heatmap as PNG data URIs (self-contained file: no external src at all).

    Source: PNG signature from the PNG specification; HTML parsed by Python's html.parser.
    """
    c = small_classification
    intake = pd.Series([cat.name for cat in demo_design.categories] * 3, index=list(c.participants))
    agree = agreement(c, intake)
    path = classification_page(c, agreement=agree).write(tmp_path / "report.html")
    parsed = _parse(path.read_text(encoding="utf-8"))
    imgs = _decode_imgs(parsed)
    # forest plot, probability bars, population shares, confusion heatmap
    assert len(imgs) == 4
    assert all(i.startswith(PNG_SIGNATURE) for i in imgs)
    alts = [img["alt"] for img in parsed.imgs]
    assert any("HDI" in a for a in alts) and any("threshold" in a for a in alts)
    assert not any(t in parsed.tags for t in ("script", "link"))  # nothing fetched from elsewhere
    body = "".join(parsed.text)
    for p in c.participants:
        assert p in body
    assert "Cohen's kappa" in body


def test_figures_draw_one_mark_per_participant(small_classification):
    """Check the figures' content against the classification tables (pandas as reference)."""
    c = small_classification
    n, k = len(c.participants), len(c.arms)
    fig = forest_plot(c)
    axes = fig.get_axes()
    assert len(axes) == k
    for ax, arm in zip(axes, c.arms):
        pts = ax.collections[-1].get_offsets()  # the scatter of posterior means
        means = c.effects[c.effects["quantity"] == arm]["mean"].to_numpy()
        np.testing.assert_allclose(np.sort(pts[:, 0]), np.sort(means))
    bars = probability_bars(c).get_axes()[0]
    widths = np.array([p.get_width() for p in bars.patches]).reshape(len(c.names), n)
    np.testing.assert_allclose(widths.sum(axis=0), 1.0, atol=1e-12)  # exclusive probabilities sum to 1
    ax = prevalence_plot(c.prevalence, mass=c.mass).get_axes()[0]
    assert len(ax.containers) == 2  # studied participants and the population model
    table = pd.DataFrame({"mean_probability": [0.1, 0.5], "observed": [0.2, 0.4], "observed_se": [0.05, 0.1],
                          "n": [10, 20]})
    assert len(reliability_diagram(table).get_axes()) == 1
