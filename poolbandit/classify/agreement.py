"""Agreement between posterior labels and an intake measure (Cohen's kappa).

An intake questionnaire may sort participants into the same categories the
design declares ("which format do you think suits you?"). The agreement of
the posterior labels with it is summarised by a confusion table and Cohen's
kappa [1]_,

.. math::

    \\kappa = \\frac{p_o - p_e}{1 - p_e},

with ``p_o`` the observed share of agreement and ``p_e`` the share expected
from the margins alone, and the large-sample standard error of Fleiss, Cohen
and Everitt [2]_, which gives a Wald interval.

Participants labelled ``"undetermined"`` have no category to agree on and
are left out of kappa (they are counted, and the confusion table shows
them); so are participants without an intake answer.

References
----------
.. [1] Cohen, J. (1960). A coefficient of agreement for nominal scales.
   *Educational and Psychological Measurement* 20, 37-46.
   doi:10.1177/001316446002000104
.. [2] Fleiss, J. L., Cohen, J. and Everitt, B. S. (1969). Large sample
   standard errors of kappa and weighted kappa. *Psychological Bulletin* 72,
   323-327. doi:10.1037/h0028106
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from ..errors import LogError, format_value
from .rules import UNDETERMINED

__all__ = ["Kappa", "Agreement", "cohens_kappa", "confusion_table", "agreement", "read_intake"]


@dataclass(frozen=True)
class Kappa:
    """Cohen's kappa with its large-sample standard error and Wald interval.

    Attributes
    ----------
    kappa, se, low, high : float
    observed, expected : float
        Observed agreement ``p_o`` and chance agreement ``p_e``.
    n : int
        Number of rated items in the table.
    level : float
        Confidence level of ``[low, high]``.
    """

    kappa: float
    se: float
    low: float
    high: float
    observed: float
    expected: float
    n: int
    level: float


@dataclass(frozen=True)
class Agreement:
    """Posterior labels against an intake measure.

    Attributes
    ----------
    table : DataFrame
        Counts: rows are posterior labels (every category, then
        ``"undetermined"``), columns intake categories.
    kappa : Kappa
        Over participants with both a label other than ``"undetermined"`` and an intake answer
        (NaN when undefined: no such participant, or one category on both sides).
    n_undetermined : int
        Participants with an intake answer but no posterior label.
    n_missing : int
        Participants of the classification without an intake answer.
    posterior_kappa : dict
        Kappa computed draw by draw between each draw's exclusive category
        (draws matching no rule count as disagreement) and the intake answer,
        over every participant with an answer: ``mean``, ``low``, ``high``
        (HDI at the classification's mass). It carries the uncertainty of the
        categories themselves, which the labels' kappa ignores.
    """

    table: pd.DataFrame
    kappa: Kappa
    n_undetermined: int
    n_missing: int
    posterior_kappa: dict


def cohens_kappa(table, *, level: float = 0.95) -> Kappa:
    """Cohen's kappa of a square table of counts (rows: rater 1, columns: rater 2).

    The variance is the large-sample formula of Fleiss, Cohen and Everitt
    (1969), equation (13),

    .. math::

        \\mathrm{Var}(\\hat\\kappa) = \\frac{A + B - C}{n (1 - p_e)^2},\\;
        A = \\sum_i p_{ii}[1 - (p_{i.} + p_{.i})(1 - \\kappa)]^2,\\;
        B = (1 - \\kappa)^2 \\sum_{i \\ne j} p_{ij} (p_{.i} + p_{j.})^2,\\;
        C = [\\kappa - p_e (1 - \\kappa)]^2.

    Parameters
    ----------
    table : array-like of shape (C, C)
        Counts.
    level : float, default=0.95
        Confidence level of the Wald interval ``kappa +- z se``.

    Raises
    ------
    ValueError
        If the table is not square, has negative entries or no counts, or the
        margins make chance agreement 1 (kappa undefined).
    """
    t = np.asarray(table, dtype=float)
    if t.ndim != 2 or t.shape[0] != t.shape[1]:
        raise ValueError(f"kappa needs a square table, got shape {t.shape}")
    if (t < 0).any() or t.sum() <= 0:
        raise ValueError("kappa needs a table of non-negative counts with at least one item")
    n = t.sum()
    p = t / n
    row, col = p.sum(axis=1), p.sum(axis=0)
    p_o = np.trace(p)
    p_e = float(row @ col)
    if np.isclose(p_e, 1.0):
        raise ValueError("kappa is undefined: both raters put every item in one category")
    kappa = (p_o - p_e) / (1 - p_e)
    a = np.sum(np.diag(p) * (1 - (row + col) * (1 - kappa)) ** 2)
    off = p * (col[:, None] + row[None, :]) ** 2
    np.fill_diagonal(off, 0.0)
    b = (1 - kappa) ** 2 * off.sum()
    c = (kappa - p_e * (1 - kappa)) ** 2
    var = max((a + b - c) / ((1 - p_e) ** 2 * n), 0.0)
    se = float(np.sqrt(var))
    z = stats.norm.ppf(0.5 + level / 2)
    return Kappa(float(kappa), se, float(kappa - z * se), float(kappa + z * se), float(p_o), p_e, int(round(n)),
                 float(level))


def confusion_table(labels: pd.Series, intake: pd.Series, names: Sequence[str]) -> pd.DataFrame:
    """Counts of posterior label (rows) by intake category (columns), aligned by participant.

    ``names`` lists the categories in order; rows add ``"undetermined"``.
    Participants missing from either side are left out.
    """
    both = pd.concat({"label": labels, "intake": intake}, axis=1, join="inner").dropna()
    rows = list(names) + ([UNDETERMINED] if UNDETERMINED not in names else [])
    t = pd.crosstab(pd.Categorical(both["label"], categories=rows), pd.Categorical(both["intake"], categories=names),
                    dropna=False)
    t = t.reindex(index=rows, columns=list(names), fill_value=0).astype(np.int64)
    t.index.name, t.columns.name = "posterior label", "intake"
    return t


def agreement(classification, intake: pd.Series | Mapping[str, str], *, level: float = 0.95) -> Agreement:
    """Confusion table and Cohen's kappa of posterior labels against an intake measure.

    Parameters
    ----------
    classification : Classification
    intake : Series or mapping
        Intake category by participant id (missing answers as NaN/None).
    level : float, default=0.95
        Confidence level of kappa's interval.

    Raises
    ------
    LogError
        If an answer is not one of the category names (each bad answer by participant and value).
    """
    intake = pd.Series(intake, dtype=object) if not isinstance(intake, pd.Series) else intake.astype(object)
    intake = intake.dropna()
    names = [c.name for c in classification.categories]
    bad = intake[~intake.isin(names)]
    if len(bad):
        raise LogError([f"participant {format_value(p)}: expected one of {', '.join(names)}, got {format_value(v)}"
                        for p, v in bad.iloc[:20].items()]
                       + ([f"{len(bad) - 20} more answers that are not categories"] if len(bad) > 20 else []),
                       source="intake")
    labels = classification.labels.set_index("participant")["label"]
    table = confusion_table(labels, intake, names)
    square = table.loc[names, names].to_numpy()
    try:
        kappa = cohens_kappa(square, level=level)
    except ValueError:  # no labelled participant with an answer, or a single category on both sides
        nan = float("nan")
        kappa = Kappa(nan, nan, nan, nan, float(np.trace(square) / square.sum()) if square.sum() else nan, nan,
                      int(square.sum()), float(level))
    n_missing = int((~labels.index.isin(intake.index)).sum())
    return Agreement(table, kappa, int(table.loc[UNDETERMINED].sum()), n_missing,
                     _posterior_kappa(classification, intake, names))


def _posterior_kappa(classification, intake: pd.Series, names: list[str]) -> dict:
    """Cohen's kappa of every posterior draw's exclusive categories against the intake answers."""
    from .posterior import hdi_table

    ids = [p for p in classification.participants if p in intake.index]
    if not ids:
        return {"mean": float("nan"), "low": float("nan"), "high": float("nan"), "n": 0}
    pos = pd.Index(classification.participants).get_indexer(ids)
    codes = classification.exclusive.to_numpy()[:, :, pos]  # (chain, draw, n); len(names) = no rule
    answer = pd.Index(names).get_indexer(intake.loc[ids].to_numpy())  # (n,)
    p_o = (codes == answer).mean(axis=-1)
    col = np.bincount(answer, minlength=len(names) + 1) / len(ids)
    row = np.stack([(codes == j).mean(axis=-1) for j in range(len(names) + 1)], axis=-1)
    p_e = row @ col
    with np.errstate(invalid="ignore", divide="ignore"):
        k = (p_o - p_e) / (1 - p_e)
    low, high = hdi_table(k[..., None], mass=classification.mass)
    return {"mean": float(np.nanmean(k)), "low": float(low[0]), "high": float(high[0]), "n": len(ids)}


def read_intake(path: str | Path, column: str, names: Sequence[str], *,
                participant_column: str = "participant") -> pd.Series:
    """Read an intake table: one row per participant, the category in ``column``.

    Empty cells are missing answers. Every other value must be one of
    ``names``.

    Raises
    ------
    LogError
        If the file cannot be read, a column is missing, a participant repeats
        or a value is not a category (the message names row, column and value).
    """
    path = Path(path)
    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False, na_values=[""])
    except FileNotFoundError:
        raise LogError(["file not found"], source=str(path)) from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as err:
        raise LogError([f"cannot parse CSV ({err})"], source=str(path)) from None
    missing = [c for c in (participant_column, column) if c not in df.columns]
    if missing:
        raise LogError([f"missing column {format_value(c)}" for c in missing]
                       + [f"columns present: {', '.join(map(str, df.columns))}"], source=str(path))
    problems = []
    ids = df[participant_column]
    for j in np.flatnonzero(ids.isna().to_numpy())[:20]:
        problems.append(f"row {j + 1}, column {participant_column}: expected a participant id, got \"\"")
    for j in np.flatnonzero(ids.duplicated().to_numpy() & ids.notna().to_numpy())[:20]:
        problems.append(f"row {j + 1}, column {participant_column}: duplicate participant, "
                        f"got {format_value(ids.iat[j])}")
    values = df[column]
    bad = values.notna().to_numpy() & ~values.isin(list(names)).to_numpy()
    for j in np.flatnonzero(bad)[:20]:
        problems.append(f"row {j + 1}, column {column}: expected one of {', '.join(names)} or an empty cell, "
                        f"got {format_value(values.iat[j])}")
    if problems:
        raise LogError(problems, source=str(path))
    return pd.Series(values.to_numpy(dtype=object), index=ids.to_numpy(dtype=object), name=column)
