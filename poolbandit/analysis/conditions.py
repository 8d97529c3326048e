"""Adaptive against control: the difference in participant-level outcomes between conditions.

When a StudyLog has a ``condition`` column (``adaptive`` or ``control``, one
value per participant), the mean reward of the adaptive condition minus that
of the control condition is estimated two ways:

* ``welch``: each participant's mean observed reward is one observation; the
  two groups are compared by Welch's unequal-variance t statistic, with the
  Welch-Satterthwaite degrees of freedom and a t interval;
* ``mixed-model``: a linear mixed model of every observed reward with a
  random intercept per participant and the condition as a fixed effect
  (``statsmodels`` MixedLM, REML), with a normal (Wald) interval. It weights
  participants by how many rewards they contributed, shrunk by the
  intraclass correlation.

Participants are randomised to conditions, not adaptively, so these
comparisons need no propensity weighting; the adaptive condition's own mean
is that of the policy as run (its adaptivity is part of the treatment).

A second outcome given per participant (for example a pre/post change in a
rating, in a separate CSV) is compared the same way by Welch's test; with one
value per participant a random intercept cannot be separated from the
residual, so no mixed model is fitted for it.

References
----------
.. [1] Welch, B. L. (1947). The generalization of "Student's" problem when
   several different population variances are involved. *Biometrika* 34,
   28-35. doi:10.1093/biomet/34.1-2.28
.. [2] Laird, N. M. and Ware, J. H. (1982). Random-effects models for
   longitudinal data. *Biometrics* 38, 963-974. doi:10.2307/2529876
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from scipy import stats

from ..errors import LogError, format_value

__all__ = ["compare_conditions", "read_participant_outcomes", "CONDITION_COLUMNS", "CONDITIONS"]

#: The two condition values, treatment first.
CONDITIONS = ("adaptive", "control")

#: Columns of the table :func:`compare_conditions` returns.
CONDITION_COLUMNS = ["outcome", "method", "estimate", "se", "lower", "upper", "df", "p_value", "mean_adaptive",
                     "mean_control", "n_adaptive", "n_control", "status", "note"]


def read_participant_outcomes(path, participants: list[str] | None = None) -> pd.DataFrame:
    """Read a per-participant outcome table: a ``participant`` column and numeric outcome columns.

    Empty cells are missing values. A ``condition`` column, when present, is kept as text.

    Raises
    ------
    LogError
        Naming the file, row, column and value of every problem (unknown or
        repeated participant, a cell that is not a number).
    """
    src = str(path)
    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False, na_values=[""])
    except FileNotFoundError:
        raise LogError(["file not found"], source=src) from None
    except (pd.errors.EmptyDataError, pd.errors.ParserError, UnicodeDecodeError) as err:
        raise LogError([f"cannot parse CSV ({err})"], source=src) from None
    problems = []
    if "participant" not in df.columns:
        raise LogError([f"missing column \"participant\"; columns present: {', '.join(df.columns)}"], source=src)
    value_cols = [c for c in df.columns if c not in ("participant", "condition")]
    if not value_cols:
        raise LogError(["expected at least one outcome column besides participant and condition"], source=src)
    known = set(participants) if participants is not None else None
    for j, p in enumerate(df["participant"]):
        if not isinstance(p, str) or not p.strip():
            problems.append(f"row {j + 1}, column participant: expected a participant id, got \"\"")
        elif known is not None and p not in known:
            problems.append(f"row {j + 1}, column participant: not a participant of the log, got {format_value(p)}")
    for j in np.flatnonzero(df["participant"].duplicated().to_numpy()):
        problems.append(f"row {j + 1}, column participant: duplicate participant, got "
                        f"{format_value(df['participant'].iat[j])}")
    out = df[["participant"] + (["condition"] if "condition" in df.columns else [])].copy()
    for c in value_cols:
        num = pd.to_numeric(df[c], errors="coerce")
        for j in np.flatnonzero((num.isna() & df[c].notna()).to_numpy() | np.isinf(num.to_numpy(dtype=float))):
            problems.append(f"row {j + 1}, column {c}: expected a number or an empty cell, got "
                            f"{format_value(df[c].iat[j])}")
        out[c] = num.to_numpy(dtype=float)
    if problems:
        raise LogError(problems, source=src)
    return out


def _participant_conditions(log: pd.DataFrame) -> pd.Series | None:
    if "condition" not in log.columns:
        return None
    cond = log["condition"].astype("string").str.strip()
    bad = ~cond.isin(CONDITIONS).fillna(False).to_numpy()
    problems = [f"row {j + 1}, column condition: expected \"adaptive\" or \"control\", got "
                f"{format_value('' if pd.isna(log['condition'].iat[j]) else str(log['condition'].iat[j]))}"
                for j in np.flatnonzero(bad)[:20]]
    if problems:
        raise LogError(problems)
    per = pd.DataFrame({"participant": log["participant"], "condition": cond.astype(str)})
    varies = per.groupby("participant", sort=False)["condition"].nunique() > 1
    if varies.any():
        p = varies.index[varies.to_numpy()][0]
        j = int(np.flatnonzero(log["participant"].to_numpy() == p)[0])
        raise LogError([f"row {j + 1}, column condition: expected one condition per participant, participant "
                        f"{format_value(p)} has both"])
    return per.drop_duplicates("participant").set_index("participant")["condition"]


def compare_conditions(log: pd.DataFrame, design, *, participant_outcomes: pd.DataFrame | None = None,
                       level: float = 0.95) -> pd.DataFrame:
    """Adaptive minus control, by Welch's t and by a random-intercept mixed model.

    Parameters
    ----------
    log : DataFrame
        A validated StudyLog, optionally with a ``condition`` column.
    design : DesignSpec
    participant_outcomes : DataFrame, optional
        One row per participant (:func:`read_participant_outcomes`); each
        numeric column is compared by Welch's test.
    level : float, default=0.95

    Returns
    -------
    DataFrame
        Columns :data:`CONDITION_COLUMNS`; ``estimate`` is adaptive minus
        control. Without a condition column there is one row with status
        ``unavailable``.

    Raises
    ------
    LogError
        If a condition value is not ``adaptive``/``control`` or varies within a participant.
    """
    reward = design.study.reward
    cond = _participant_conditions(log)
    if cond is None:
        return pd.DataFrame([{**dict.fromkeys(CONDITION_COLUMNS, np.nan), "outcome": reward, "method": "welch",
                              "status": "unavailable", "note": "the log has no condition column"}],
                            columns=CONDITION_COLUMNS)
    rows = []
    obs = log[np.isfinite(log[reward].to_numpy(dtype=float))]
    means = obs.groupby("participant", sort=False)[reward].mean()
    rows.append(_welch(reward, means, cond, level, note="one value per participant: the mean of observed rewards"))
    rows.append(_mixed(reward, obs, cond, level))
    if participant_outcomes is not None:
        po = participant_outcomes.set_index("participant")
        pcond = cond
        if "condition" in po.columns:
            pcond = po["condition"].where(po["condition"].notna(), cond.reindex(po.index)).astype(str)
        for c in [c for c in po.columns if c != "condition"]:
            rows.append(_welch(c, po[c].dropna(), pcond, level, note="one value per participant (given)"))
            rows.append({**dict.fromkeys(CONDITION_COLUMNS, np.nan), "outcome": c, "method": "mixed-model",
                         "status": "refused", "note": "one value per participant: a random intercept cannot be "
                                                      "separated from the residual; see the Welch row"})
    return pd.DataFrame(rows, columns=CONDITION_COLUMNS)


def _welch(outcome: str, values: pd.Series, cond: pd.Series, level: float, *, note: str) -> dict:
    c = cond.reindex(values.index)
    a = values[c == "adaptive"].to_numpy(dtype=float)
    b = values[c == "control"].to_numpy(dtype=float)
    base = {**dict.fromkeys(CONDITION_COLUMNS, np.nan), "outcome": outcome, "method": "welch",
            "n_adaptive": len(a), "n_control": len(b),
            "mean_adaptive": a.mean() if len(a) else np.nan, "mean_control": b.mean() if len(b) else np.nan}
    if len(a) < 2 or len(b) < 2:
        return {**base, "status": "refused", "note": "each condition needs at least two participants"}
    va, vb = a.var(ddof=1) / len(a), b.var(ddof=1) / len(b)
    se = float(np.sqrt(va + vb))
    df = float((va + vb) ** 2 / (va**2 / (len(a) - 1) + vb**2 / (len(b) - 1)))
    est = float(a.mean() - b.mean())
    q = float(stats.t.ppf(0.5 + level / 2, df))
    p = float(2 * stats.t.sf(abs(est / se), df))
    return {**base, "estimate": est, "se": se, "lower": est - q * se, "upper": est + q * se, "df": df,
            "p_value": p, "status": "ok", "note": note}


def _mixed(outcome: str, obs: pd.DataFrame, cond: pd.Series, level: float) -> dict:
    import statsmodels.api as sm
    from statsmodels.regression.mixed_linear_model import MixedLM

    c = cond.reindex(obs["participant"]).to_numpy()
    y = obs[outcome].to_numpy(dtype=float)
    x = (c == "adaptive").astype(float)
    groups = obs["participant"].to_numpy()
    n_a = int(cond.eq("adaptive").sum())
    n_c = int(cond.eq("control").sum())
    base = {**dict.fromkeys(CONDITION_COLUMNS, np.nan), "outcome": outcome, "method": "mixed-model",
            "n_adaptive": n_a, "n_control": n_c,
            "mean_adaptive": float(y[x == 1].mean()) if (x == 1).any() else np.nan,
            "mean_control": float(y[x == 0].mean()) if (x == 0).any() else np.nan}
    if n_a < 2 or n_c < 2:
        return {**base, "status": "refused", "note": "each condition needs at least two participants"}
    notes = ["random intercept per participant, condition fixed effect (REML); means here are per decision"]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        res = MixedLM(y, sm.add_constant(x, has_constant="add"), groups=groups).fit(reml=True)
    if any("converge" in str(w.message).lower() or "boundary" in str(w.message).lower() for w in caught):
        notes.append("the optimiser reported a convergence or boundary problem")
    est, se = float(res.fe_params[1]), float(res.bse_fe[1])
    z = float(stats.norm.ppf(0.5 + level / 2))
    p = float(2 * stats.norm.sf(abs(est / se)))
    return {**base, "estimate": est, "se": se, "lower": est - z * se, "upper": est + z * se, "p_value": p,
            "status": "ok", "note": "; ".join(notes)}
