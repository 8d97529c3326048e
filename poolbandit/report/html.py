"""A small toolkit for self-contained HTML reports.

A :class:`Page` collects blocks (headings, paragraphs, notes, lists, tables,
figures) and writes one HTML file with its style sheet inline and every
figure embedded as a base64 PNG ``data:`` URI, so the file can be mailed or
archived on its own::

    Page("Classification").heading("Labels").paragraph("...").table(df).figure(fig).write(path)

Every text is HTML-escaped; tables come from :class:`pandas.DataFrame` with
numbers rounded for reading. The file is written atomically (a temporary file
moved into place), so a reader never sees half a report.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import os
import re
import sys
import tempfile
from pathlib import Path
from typing import Iterable

import numpy as np
import pandas as pd

__all__ = ["Page", "figure_to_png", "png_data_uri"]

_CSS = """
body { font-family: -apple-system, "Segoe UI", Helvetica, Arial, sans-serif; color: #1d1d1f;
       max-width: 1100px; margin: 2em auto; padding: 0 1.5em; line-height: 1.45; }
h1 { font-size: 1.7em; margin-bottom: 0.2em; }
h2 { font-size: 1.3em; margin-top: 1.8em; border-bottom: 1px solid #ddd; padding-bottom: 0.2em; }
h3 { font-size: 1.1em; margin-top: 1.4em; }
p.subtitle { color: #666; margin-top: 0; }
table { border-collapse: collapse; margin: 0.8em 0; font-size: 0.9em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: right; }
th { background: #f3f3f3; }
td.text, th.text { text-align: left; }
caption { caption-side: top; text-align: left; font-style: italic; color: #444; padding-bottom: 0.3em; }
figure { margin: 1em 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #eee; }
figcaption { font-size: 0.9em; color: #444; }
div.note { border-left: 4px solid #4a7ab5; background: #f2f6fb; padding: 0.5em 0.9em; margin: 0.8em 0; }
div.note.warning { border-left-color: #c77c0e; background: #fdf6ea; }
nav ul { columns: 2; }
footer { margin-top: 3em; color: #888; font-size: 0.8em; }
"""


def figure_to_png(fig, *, dpi: int = 110) -> bytes:
    """Render a matplotlib figure to PNG bytes (the figure is left open)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight")
    return buf.getvalue()


def png_data_uri(png: bytes) -> str:
    """A ``data:image/png;base64,...`` URI for PNG bytes."""
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _slug(text: str, taken: set[str]) -> str:
    base = re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-") or "section"
    slug, j = base, 2
    while slug in taken:
        slug, j = f"{base}-{j}", j + 1
    taken.add(slug)
    return slug


def _format_cell(value, digits: int) -> tuple[str, bool]:
    """Cell text and whether it is text (left-aligned)."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "", False
    if isinstance(value, (bool, np.bool_)):
        return ("yes" if value else "no"), True
    if isinstance(value, (int, np.integer)):
        return f"{int(value)}", False
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if v != 0 and (abs(v) < 10 ** (-digits) or abs(v) >= 1e6):
            return f"{v:.{digits}g}", False
        return f"{v:.{digits}f}", False
    return html.escape(str(value)), True


class Page:
    """An HTML page built block by block; every method but :meth:`render` and :meth:`write` returns ``self``.

    Parameters
    ----------
    title : str
        Page title (``<title>`` and the top heading).
    subtitle : str, optional
        A line under the title.
    contents : bool, default=True
        List the level-2 headings at the top when there are three or more.
    """

    def __init__(self, title: str, *, subtitle: str | None = None, contents: bool = True):
        self.title = title
        self.subtitle = subtitle
        self.contents = contents
        self._blocks: list[str] = []
        self._sections: list[tuple[str, str]] = []
        self._ids: set[str] = set()

    # -- blocks ---------------------------------------------------------------
    def heading(self, text: str, *, level: int = 2) -> "Page":
        """A section heading (level 2) or sub-heading (3, 4)."""
        if level not in (2, 3, 4):
            raise ValueError(f"level must be 2, 3 or 4, got {level}")
        slug = _slug(text, self._ids)
        if level == 2:
            self._sections.append((slug, text))
        self._blocks.append(f'<h{level} id="{slug}">{html.escape(text)}</h{level}>')
        return self

    def paragraph(self, text: str) -> "Page":
        """A paragraph of plain text."""
        self._blocks.append(f"<p>{html.escape(text)}</p>")
        return self

    def note(self, text: str, *, warning: bool = False) -> "Page":
        """A highlighted remark (``warning=True`` for a caution)."""
        cls = "note warning" if warning else "note"
        self._blocks.append(f'<div class="{cls}">{html.escape(text)}</div>')
        return self

    def bullets(self, items: Iterable[str]) -> "Page":
        """A bulleted list of plain-text items."""
        lis = "".join(f"<li>{html.escape(str(i))}</li>" for i in items)
        self._blocks.append(f"<ul>{lis}</ul>")
        return self

    def table(self, df: pd.DataFrame, *, caption: str | None = None, index: bool = False, digits: int = 3,
              max_rows: int | None = None) -> "Page":
        """A table from a DataFrame; floats shown with ``digits`` decimals.

        ``max_rows`` keeps the first rows and says how many were left out.
        """
        frame = df.reset_index() if index else df
        shown = frame if max_rows is None else frame.iloc[:max_rows]
        head = "".join(f'<th class="text">{html.escape(str(c))}</th>' for c in frame.columns)
        body = []
        for row in shown.itertuples(index=False):
            cells = []
            for v in row:
                text, is_text = _format_cell(v, digits)
                cells.append(f'<td class="text">{text}</td>' if is_text else f"<td>{text}</td>")
            body.append("<tr>" + "".join(cells) + "</tr>")
        cap = f"<caption>{html.escape(caption)}</caption>" if caption else ""
        self._blocks.append(f"<table>{cap}<thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>")
        if max_rows is not None and len(frame) > max_rows:
            self.paragraph(f"({len(frame) - max_rows} more rows not shown; see the CSV files.)")
        return self

    def image(self, png: bytes, *, alt: str = "figure", caption: str | None = None) -> "Page":
        """An embedded PNG image."""
        cap = f"<figcaption>{html.escape(caption)}</figcaption>" if caption else ""
        self._blocks.append(f'<figure><img src="{png_data_uri(png)}" alt="{html.escape(alt, quote=True)}">'
                            f"{cap}</figure>")
        return self

    def figure(self, fig, *, caption: str | None = None, alt: str | None = None, dpi: int = 110,
               close: bool = True) -> "Page":
        """An embedded matplotlib figure (rendered now; closed afterwards unless ``close=False``)."""
        png = figure_to_png(fig, dpi=dpi)
        if close and "matplotlib.pyplot" in sys.modules:  # figures made without pyplot need no closing
            sys.modules["matplotlib.pyplot"].close(fig)
        return self.image(png, alt=alt or caption or "figure", caption=caption)

    # -- output ---------------------------------------------------------------
    def render(self) -> str:
        """The whole page as a string."""
        parts = ["<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">',
                 f"<title>{html.escape(self.title)}</title>", f"<style>{_CSS}</style>", "</head>", "<body>",
                 f"<h1>{html.escape(self.title)}</h1>"]
        if self.subtitle:
            parts.append(f'<p class="subtitle">{html.escape(self.subtitle)}</p>')
        if self.contents and len(self._sections) >= 3:
            items = "".join(f'<li><a href="#{s}">{html.escape(t)}</a></li>' for s, t in self._sections)
            parts.append(f"<nav><ul>{items}</ul></nav>")
        parts.extend(self._blocks)
        from .. import __version__

        stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
        parts += [f"<footer>poolbandit {html.escape(__version__)}, {stamp}</footer>", "</body>", "</html>"]
        return "\n".join(parts) + "\n"

    def write(self, path: str | os.PathLike) -> Path:
        """Write the page to ``path`` atomically and return the path."""
        path = Path(path)
        text = self.render()
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as fh:
                fh.write(text)
            os.replace(tmp, path)
        finally:
            if os.path.exists(tmp):
                os.unlink(tmp)
        return path
