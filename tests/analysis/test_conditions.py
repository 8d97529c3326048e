"""Adaptive against control: Welch's t against statsmodels, the mixed model against balanced-design closed forms."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.weightstats import CompareMeans, DescrStatsW

from poolbandit import parse_design, simulate
from poolbandit.analysis import compare_conditions, read_participant_outcomes
from poolbandit.errors import LogError

BALANCED = """
[study]
arms = ["drill", "story"]
horizon = 6
reward = "log_minutes"
"""


@pytest.fixture(scope="module")
def two_arm_log(design):
    a = simulate(design, "solo", 11, size=25).log.assign(condition="adaptive")
    c = simulate(design, "control", 12, size=18).log.assign(condition="control")
    c["participant"] = "c" + c["participant"]
    return pd.concat([a, c], ignore_index=True)


def test_welch_matches_statsmodels(two_arm_log, design):
    """Welch (1947) t interval and p-value against statsmodels' CompareMeans (usevar="unequal")
    on the participant means; agreement to 1e-9 (same formula, independent code)."""
    res = compare_conditions(two_arm_log, design).set_index("method")
    obs = two_arm_log[np.isfinite(two_arm_log["log_minutes"])]
    means = obs.groupby("participant")["log_minutes"].mean()
    cond = obs.groupby("participant")["condition"].first()
    a, c = means[cond == "adaptive"].to_numpy(), means[cond == "control"].to_numpy()
    cm = CompareMeans(DescrStatsW(a), DescrStatsW(c))
    lo, hi = cm.tconfint_diff(alpha=0.05, usevar="unequal")
    row = res.loc["welch"]
    assert row["estimate"] == pytest.approx(a.mean() - c.mean(), abs=1e-12)
    assert row["lower"] == pytest.approx(lo, abs=1e-9) and row["upper"] == pytest.approx(hi, abs=1e-9)
    assert row["p_value"] == pytest.approx(stats.ttest_ind(a, c, equal_var=False).pvalue, rel=1e-9)
    assert (row["n_adaptive"], row["n_control"]) == (25, 18)


def test_mixed_model_balanced_closed_form():
    """Random-intercept model on a balanced design without missing values (Laird and Ware 1982; common
    practice): the REML condition effect equals the difference of condition means, and its standard
    error equals the pooled-variance two-sample standard error of participant means (the one-way
    random-effects ANOVA identity, valid when the between-participant variance is estimated inside the
    parameter space). Tolerance 1e-4 relative: the REML optimiser's convergence tolerance.
    """
    design = parse_design(BALANCED)
    rng = np.random.default_rng(5)
    n_per, t = 12, 6
    rows = []
    for j in range(2 * n_per):
        cond = "adaptive" if j < n_per else "control"
        b = rng.normal(scale=0.7)
        for d in range(1, t + 1):
            rows.append({"participant": f"q{j:02d}", "decision": d, "arm": "drill", "propensity": 0.5,
                         "log_minutes": 2.0 + 0.4 * (cond == "adaptive") + b + rng.normal(), "policy": "x",
                         "condition": cond})
    log = pd.DataFrame(rows)
    res = compare_conditions(log, design).set_index("method")
    means = log.groupby("participant")["log_minutes"].mean()
    cond = log.groupby("participant")["condition"].first()
    a, c = means[cond == "adaptive"], means[cond == "control"]
    assert res.loc["mixed-model", "estimate"] == pytest.approx(a.mean() - c.mean(), rel=1e-6)
    pooled = np.sqrt(((n_per - 1) * a.var() + (n_per - 1) * c.var()) / (2 * n_per - 2) * (2 / n_per))
    assert res.loc["mixed-model", "se"] == pytest.approx(pooled, rel=1e-4)


def test_no_condition_column_is_unavailable(one_log, design):
    res = compare_conditions(one_log.log, design)
    assert list(res["status"]) == ["unavailable"] and "no condition column" in res["note"].iat[0]


def test_bad_condition_value_names_row(one_log, design):
    log = one_log.log.assign(condition="adaptive")
    log.loc[6, "condition"] = "treatment"
    with pytest.raises(LogError, match=r'row 7, column condition: expected "adaptive" or "control", got "treatment"'):
        compare_conditions(log, design)


def test_participant_outcomes_file(two_arm_log, design, tmp_path):
    ids = list(pd.unique(two_arm_log["participant"]))
    rng = np.random.default_rng(1)
    table = pd.DataFrame({"participant": ids, "rating_change": rng.normal(size=len(ids))})
    table.loc[3, "rating_change"] = np.nan
    path = tmp_path / "o.csv"
    table.to_csv(path, index=False)
    po = read_participant_outcomes(path, ids)
    res = compare_conditions(two_arm_log, design, participant_outcomes=po).set_index(["outcome", "method"])
    row = res.loc[("rating_change", "welch")]
    assert row["n_adaptive"] + row["n_control"] == len(ids) - 1  # the empty cell is left out
    bad = table.astype({"rating_change": object})
    bad.loc[5, "rating_change"] = "lots"
    bad.loc[len(bad)] = ["stranger", 0.0]
    bad.to_csv(path, index=False)
    with pytest.raises(LogError, match=r'(?s)o.csv: .*row 6, column rating_change: expected a number.*"lots"'):
        read_participant_outcomes(path, ids)
    with pytest.raises(LogError, match=r'not a participant of the log, got "stranger"'):
        read_participant_outcomes(path, ids)
