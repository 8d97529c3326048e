"""Reading and validating the CSV files a live study takes in.

Every check collects its problems as lines ``row R, column C: why, got V``
(rows numbered from 1 after the header, as in :mod:`poolbandit.log`), and the
caller raises one :class:`~poolbandit.errors.LogError` with all of them, so a
user fixes a file in one pass. Cells are read as text, with surrounding
spaces removed; an empty cell is the empty string.
"""

from __future__ import annotations

import csv
import hashlib
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import LogError, format_value

__all__ = ["Table", "Problems", "read_table", "as_numbers", "nonempty", "duplicates"]

#: Problems listed per column and kind before summarising the rest.
_LIMIT = 20


@dataclass(frozen=True)
class Table:
    """A CSV file read as text.

    Attributes
    ----------
    frame : DataFrame
        One column per header name, cells as stripped strings.
    source : str
        The path, for messages.
    sha256 : str
        Hash of the file's bytes (logged with the batch that imported it).
    """

    frame: pd.DataFrame
    source: str
    sha256: str

    def __len__(self) -> int:
        return len(self.frame)


class Problems:
    """Collects problem lines for one file and raises them together."""

    def __init__(self, source: str):
        self.source = source
        self.lines: list[str] = []

    def __bool__(self) -> bool:
        return bool(self.lines)

    def add(self, line: str) -> None:
        self.lines.append(line)

    def rows(self, frame: pd.DataFrame, mask: np.ndarray, column: str, why: str, *,
             shown: str | None = None) -> None:
        """Add one line per row where ``mask`` is true (up to a limit, then a count)."""
        idx = np.flatnonzero(np.asarray(mask, dtype=bool))
        values = frame[shown or column].to_numpy()
        for j in idx[:_LIMIT]:
            self.add(f"row {j + 1}, column {column}: {why}, got {format_value(values[j])}")
        if len(idx) > _LIMIT:
            self.add(f"column {column}: {len(idx) - _LIMIT} more rows like these")

    def raise_if_any(self) -> None:
        """Raise one LogError with every problem, row problems in row order."""
        if self.lines:
            raise LogError(sorted(self.lines, key=_row_of), source=self.source)


def _row_of(line: str) -> int:
    """Sort key: lines about row N by N (stable), other lines first."""
    if line.startswith("row "):
        head = line[4:].split(",", 1)[0].split(":", 1)[0]
        if head.isdigit():
            return int(head)
    return 0


def read_table(path: str | Path, *, required: list[str], optional: list[str] = (),
               what: str = "file") -> Table:
    """Read a CSV file whose header must hold ``required`` and may hold ``optional``.

    Raises
    ------
    LogError
        The file is missing, unreadable, empty, has no data rows, a ragged
        row, a duplicate or unknown column name, or lacks a required column.
    """
    source = str(path)
    try:
        raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise LogError([f"{what} not found"], source=source) from None
    except OSError as err:
        raise LogError([f"cannot read the {what} ({err.strerror})"], source=source) from None
    sha = hashlib.sha256(raw).hexdigest()
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        raise LogError([f"not UTF-8 text (byte {err.start}: {raw[err.start:err.start + 1]!r})"],
                       source=source) from None
    if not text.strip():
        raise LogError([f"the {what} is empty (expected a header row: {', '.join(required)})"], source=source)
    reader = csv.reader(io.StringIO(text))
    header = [h.strip() for h in next(reader)]
    problems = Problems(source)
    seen: set[str] = set()
    allowed = list(required) + [c for c in optional if c not in required]
    for j, name in enumerate(header):
        col = f"header, column {j + 1}"
        if name == "":
            problems.add(f"{col}: expected a column name, got an empty name")
        elif name in seen:
            problems.add(f"{col}: duplicate column name {format_value(name)}")
        elif name not in allowed:
            problems.add(f"{col}: unknown column {format_value(name)} (allowed: {', '.join(allowed)})")
        seen.add(name)
    for name in required:
        if name not in seen:
            problems.add(f"header: missing column {format_value(name)} (found: {', '.join(header) or 'none'})")
    problems.raise_if_any()
    rows = list(reader)
    while rows and not any(c.strip() for c in rows[-1]):
        rows.pop()  # trailing blank lines are harmless
    body = []
    for i, row in enumerate(rows):
        if not any(c.strip() for c in row):
            problems.add(f"row {i + 1}: an empty row")
            continue
        if len(row) != len(header):
            problems.add(f"row {i + 1}: expected {len(header)} fields ({', '.join(header)}), got {len(row)}: "
                         f"{format_value(','.join(row))}")
            continue
        body.append([c.strip() for c in row])
    problems.raise_if_any()
    if not body:
        raise LogError([f"the {what} has a header but no rows"], source=source)
    frame = pd.DataFrame(body, columns=header, dtype=object)
    return Table(frame, source, sha)


def as_numbers(table: Table, column: str, problems: Problems, *, allow_empty: bool = False,
               integer: bool = False, low: float | None = None) -> np.ndarray:
    """Parse a text column as floats (NaN where empty and ``allow_empty``), adding problems."""
    cells = table.frame[column].astype(str)
    empty = (cells == "").to_numpy()
    num = pd.to_numeric(cells.where(~empty, None), errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    bad_text = ~empty & np.isnan(num)
    lowered = cells.str.lower().to_numpy()
    spelled_nan = np.isin(lowered, ["nan", "+nan", "-nan"])  # parsed as NaN by to_numeric: not a number here
    bad_text |= spelled_nan
    problems.rows(table.frame, bad_text, column, "expected a number")
    if not allow_empty:
        problems.rows(table.frame, empty, column, "expected a number, the cell is empty")
    nonfinite = ~bad_text & ~empty & ~np.isfinite(num)
    problems.rows(table.frame, nonfinite, column, "expected a finite number")
    ok = ~bad_text & ~empty & np.isfinite(num)
    if integer:
        frac = ok & (np.floor(np.where(ok, num, 0)) != np.where(ok, num, 0))
        problems.rows(table.frame, frac, column, "expected a whole number")
        ok &= ~frac
    if low is not None:
        under = ok & (num < low)
        problems.rows(table.frame, under, column, f"expected a number >= {low:g}")
    num = np.where(ok, num, np.nan)
    return num


def nonempty(table: Table, column: str, problems: Problems) -> np.ndarray:
    """Mark empty cells of a text column as problems; return the column as an object array."""
    cells = table.frame[column].astype(str).to_numpy(dtype=object)
    problems.rows(table.frame, cells == "", column, "expected a non-empty value")
    return cells


def duplicates(table: Table, columns: list[str], problems: Problems, *, what: str) -> np.ndarray:
    """Mark every repeat of a key (after its first row) as a problem; returns the mask of repeats."""
    dup = table.frame.duplicated(columns, keep="first").to_numpy()
    if dup.any():
        order = pd.Series(np.arange(len(table.frame)))
        first = order.groupby([table.frame[c] for c in columns], sort=False).transform("min").to_numpy()
        idx = np.flatnonzero(dup)
        for j in idx[:_LIMIT]:
            problems.add(f"row {j + 1}, column {columns[-1]}: duplicate {what} (first on row {first[j] + 1}), "
                         f"got {format_value(table.frame[columns[-1]].iat[j])}")
        if len(idx) > _LIMIT:
            problems.add(f"column {columns[-1]}: {len(idx) - _LIMIT} more duplicate rows")
    return dup
