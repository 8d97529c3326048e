"""The StudyLog: one tidy row per scheduled decision.

The same table comes out of a simulation and out of a live study, so fitting,
classification and analysis never care which one produced it.

Columns (in this order; the first six always, the rest as the design asks):

============================  ======  ==============================================
column                        type    meaning
============================  ======  ==============================================
participant                   str     participant id
decision                      int     1-based index of this decision for the participant
arm                           str     one of the design's arms
propensity                    float   probability with which this arm was drawn, in (0, 1]
<reward>                      float   the outcome (column named by ``study.reward``); empty = missed
policy                        str     name of the policy in the design
step                          int     study day on which the decision was made (optional)
prob_<arm>                    float   the whole probability table (optional, one per arm)
<feature> ...                 float   decision-time context
<covariate> ...               float   participant covariate, constant per participant
condition                     str     ``adaptive`` or ``control`` (optional)
expected_reward               float   simulation only: true expected reward of the chosen arm
best_expected_reward          float   simulation only: that of the best arm in the same context
============================  ======  ==============================================

Rows are numbered from 1 in messages (row 1 is the first row after the header).
"""

from __future__ import annotations

import io
import math
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from .errors import LogError, format_value

if TYPE_CHECKING:  # pragma: no cover
    from .spec import DesignSpec

__all__ = ["log_columns", "validate_log", "read_cells", "read_log", "write_log", "prob_columns"]

_CORE = ["participant", "decision", "arm", "propensity"]
_SIM = ["expected_reward", "best_expected_reward"]


def prob_columns(design: DesignSpec) -> list[str]:
    """Names of the optional probability-table columns, one per arm."""
    return [f"prob_{a}" for a in design.arms]


def log_columns(design: DesignSpec, *, simulated: bool = False, probabilities: bool = True,
                step: bool = True, condition: bool = False) -> list[str]:
    """The ordered columns of a StudyLog for ``design``."""
    cols = _CORE + [design.study.reward, "policy"]
    if step:
        cols.append("step")
    if probabilities:
        cols += prob_columns(design)
    cols += list(design.features) + list(design.covariates)
    if condition:
        cols.append("condition")
    if simulated:
        cols += _SIM
    return cols


def validate_log(df: pd.DataFrame, design: DesignSpec, *, source: str | None = None) -> pd.DataFrame:
    """Check a StudyLog against its design and return it with canonical dtypes.

    Every problem is collected and reported at once, each with its row (1-based,
    not counting the header), column and offending value.

    Raises
    ------
    LogError
        If a required column is missing, an arm is unknown, a propensity lies
        outside (0, 1], a participant-decision pair repeats, decisions of a
        participant do not increase, or a numeric cell does not parse.
    """
    problems: list[str] = []
    reward = design.study.reward
    required = _CORE + [reward, "policy"] + list(design.features) + list(design.covariates)
    missing = [c for c in required if c not in df.columns]
    if missing:
        raise LogError([f"missing column {format_value(c)}" for c in missing]
                       + [f"columns present: {', '.join(map(str, df.columns))}"], source=source)
    if len(df) == 0:
        raise LogError(["the log has no rows"], source=source)
    out = df.copy()
    rows = np.arange(1, len(df) + 1)

    def bad(mask: np.ndarray, column: str, why: str, limit: int = 20) -> None:
        idx = np.flatnonzero(mask)
        for j in idx[:limit]:
            problems.append(f"row {rows[j]}, column {column}: {why}, got {format_value(_cell(df, j, column))}")
        if len(idx) > limit:
            problems.append(f"column {column}: {len(idx) - limit} more rows like these")

    # participant and policy: non-empty strings
    for col in ("participant", "policy"):
        s = df[col].astype("string")
        bad(s.isna().to_numpy() | (s.str.strip() == "").fillna(True).to_numpy(), col, "expected a non-empty value")
        out[col] = s.astype(object).where(s.notna(), "")
        out[col] = out[col].astype(str)

    # integer columns
    for col in ["decision"] + (["step"] if "step" in df.columns else []):
        num = pd.to_numeric(df[col], errors="coerce")
        ok = num.notna().to_numpy() & np.isfinite(num.to_numpy(dtype=float, na_value=np.nan))
        v = num.to_numpy(dtype=float, na_value=np.nan)
        integral = ok & (np.floor(np.where(ok, v, 0)) == np.where(ok, v, 0))
        low = 1 if col == "decision" else 0
        bad(~integral | (np.where(ok, v, low) < low), col, f"expected an integer >= {low}")
        out[col] = np.where(integral, v, 0).astype(np.int64)

    # arm
    arms = df["arm"].astype("string")
    bad(~arms.isin(design.arms).fillna(False).to_numpy(), "arm",
        "expected one of " + ", ".join(design.arms))
    out["arm"] = arms.astype(object).where(arms.notna(), "").astype(str)

    # propensity in (0, 1]
    prop = pd.to_numeric(df["propensity"], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    bad(~((prop > 0) & (prop <= 1)), "propensity", "expected a probability in (0, 1]")
    out["propensity"] = prop

    # float columns: reward (NaN allowed = missed session), context, covariates, probabilities
    floats = [reward] + [c for c in df.columns if c.startswith("prob_")] + list(design.features) \
        + list(design.covariates) + [c for c in _SIM if c in df.columns]
    for col in floats:
        raw = df[col]
        num = pd.to_numeric(raw, errors="coerce")
        unparsed = num.isna().to_numpy() & raw.notna().to_numpy() & (raw.astype("string").str.strip() != "").fillna(
            False).to_numpy()
        bad(unparsed, col, "expected a number")
        v = num.to_numpy(dtype=float, na_value=np.nan)
        if col != reward and col not in _SIM:
            bad(~np.isfinite(v) & ~unparsed, col, "expected a finite number")
        elif col == reward:
            bad(np.isinf(v), col, "expected a finite number or an empty cell")
        if col == reward and design.study.outcome == "bernoulli":
            bad(np.isfinite(v) & (v != 0) & (v != 1), col, "expected 0 or 1 for a bernoulli outcome")
        out[col] = v

    # probability tables sum to 1 and agree with the propensity
    pcols = [c for c in out.columns if c.startswith("prob_")]
    if pcols:
        unknown = [c for c in pcols if c[5:] not in design.arms]
        for c in unknown:
            problems.append(f"column {c}: not an arm of the design (arms: {', '.join(design.arms)})")
        if not unknown and len(pcols) == design.n_arms:
            table = out[[f"prob_{a}" for a in design.arms]].to_numpy()
            bad(np.abs(table.sum(axis=1) - 1) > 1e-9, "prob_*", "expected probabilities that sum to 1")
            code = pd.Index(design.arms).get_indexer(out["arm"])
            chosen = table[np.arange(len(out)), np.clip(code, 0, None)]
            bad((code >= 0) & (np.abs(chosen - prop) > 1e-9), "propensity", "expected the chosen arm's prob_ value")

    # uniqueness and order of decisions within a participant
    if not problems:
        dup = out.duplicated(["participant", "decision"], keep="first").to_numpy()
        for j in np.flatnonzero(dup)[:20]:
            problems.append(f"row {rows[j]}, column decision: duplicate decision for participant "
                            f"{format_value(out['participant'].iat[j])}, got {format_value(_cell(df, j, 'decision'))}")
        prev = out.groupby("participant", sort=False)["decision"].shift(1)
        nonincreasing = (prev.notna() & (out["decision"] <= prev)).to_numpy() & ~dup
        bad(nonincreasing, "decision", "expected decisions that increase within each participant")
        for col in design.covariates:
            varies = out.groupby("participant", sort=False)[col].transform("nunique") > 1
            first = varies.to_numpy() & ~out.duplicated(["participant"]).to_numpy()
            bad(first, col, "expected a covariate that is constant per participant")
    if problems:
        raise LogError(problems, source=source)
    ordered = [c for c in log_columns(design, simulated=True, condition=True) if c in out.columns]
    extra = [c for c in out.columns if c not in ordered]
    return out[ordered + extra].reset_index(drop=True)


def _cell(df: pd.DataFrame, j: int, col: str) -> object:
    v = df[col].iat[j]
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return ""
    if isinstance(v, np.generic):
        return v.item()
    return v if v is not pd.NA else ""


def read_cells(path: str | Path) -> pd.DataFrame:
    """Read a CSV as text cells (empty cells missing), with LogError naming the file on failure."""
    path = Path(path)
    try:
        return pd.read_csv(path, dtype=str, keep_default_na=False, na_values=[""])
    except FileNotFoundError:
        raise LogError(["file not found"], source=str(path)) from None
    except pd.errors.EmptyDataError:
        raise LogError(["the file is empty (no header)"], source=str(path)) from None
    except (pd.errors.ParserError, UnicodeDecodeError) as err:
        raise LogError([f"cannot parse CSV ({err})"], source=str(path)) from None


def read_log(path: str | Path, design: DesignSpec) -> pd.DataFrame:
    """Read a StudyLog CSV and validate it (see :func:`validate_log`)."""
    return validate_log(read_cells(path), design, source=str(path))


def write_log(df: pd.DataFrame, path: str | Path | io.TextIOBase) -> None:
    """Write a StudyLog as CSV so that :func:`read_log` returns it exactly.

    Floats are written with the shortest representation that round-trips
    (Python's ``repr``); missing rewards are empty cells.
    """
    df.to_csv(path, index=False, float_format=None, lineterminator="\n")
