"""The estimators on hand-worked data and against statsmodels' cluster-robust regressions."""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from poolbandit import parse_design
from poolbandit.analysis import arm_values, policy_values, ridge_outcome_model
from poolbandit.analysis._prepare import prepare, ratio_estimate
from poolbandit.analysis.outcome_models import OutcomePredictions

TINY = """
[study]
arms = ["drill", "story"]
horizon = 2
reward = "log_minutes"
"""


def _tiny_log():
    # two participants, two decisions each; p.. = propensity of the chosen arm
    return pd.DataFrame({
        "participant": ["a", "a", "b", "b"],
        "decision": [1, 2, 1, 2],
        "arm": ["drill", "story", "drill", "drill"],
        "propensity": [0.5, 0.25, 0.8, 0.4],
        "log_minutes": [2.0, 4.0, 1.0, 3.0],
        "policy": ["p"] * 4,
    })


def test_horvitz_thompson_by_hand():
    """Horvitz and Thompson (1952) on a hand-worked log.

    Participant a: drill at p=0.5 (reward 2), story at p=0.25 (reward 4).
    Participant b: drill at p=0.8 (reward 1), drill at p=0.4 (reward 3).
    IPW value of drill = mean over participants of (1/m_i) sum 1{drill} y / p
    = mean(2/0.5 / 2, (1/0.8 + 3/0.4) / 2) = mean(2, 4.375) = 3.1875.
    Hajek: numerators as above, denominators (1/0.5)/2 = 1 and (1/0.8 + 1/0.4)/2 = 1.875,
    so (2 + 4.375) / (1 + 1.875) = 2.2174. Naive: (2 + 1 + 3) / 3 = 2.
    Sandwich se of the IPW mean: sd(2, 4.375) / sqrt(2) = 1.1875 (hand computed).
    """
    design = parse_design(TINY)
    av = arm_values(_tiny_log(), design).set_index(["arm", "estimator"])
    assert av.loc[("drill", "ipw"), "estimate"] == pytest.approx(3.1875, abs=1e-12)
    assert av.loc[("drill", "ipw"), "se"] == pytest.approx(1.1875, abs=1e-12)
    assert av.loc[("drill", "hajek"), "estimate"] == pytest.approx(6.375 / 2.875, abs=1e-12)
    assert av.loc[("drill", "naive"), "estimate"] == pytest.approx(2.0, abs=1e-12)
    # story: only a's second decision, 4 / 0.25 / 2 = 8 for a, 0 for b -> 4
    assert av.loc[("story", "ipw"), "estimate"] == pytest.approx(4.0, abs=1e-12)


def test_doubly_robust_by_hand():
    """Augmented IPW (Robins, Rotnitzky and Zhao 1994; Dudik, Langford and Li 2011) with a fixed outcome model.

    With predictions muhat = 2.5 for drill everywhere, participant a's score is
    ((2.5 + (2 - 2.5)/0.5) + 2.5) / 2 = (1.5 + 2.5) / 2 = 2.0 and b's is
    ((2.5 + (1 - 2.5)/0.8) + (2.5 + (3 - 2.5)/0.4)) / 2 = (0.625 + 3.75) / 2 = 2.1875;
    the DR value is their mean 2.09375.
    """
    design = parse_design(TINY)
    pred = OutcomePredictions(np.column_stack([np.full(4, 2.5), np.full(4, 3.0)]), None, "fixed")
    av = arm_values(_tiny_log(), design, outcome_model=pred).set_index(["arm", "estimator"])
    assert av.loc[("drill", "dr"), "estimate"] == pytest.approx(2.09375, abs=1e-12)
    assert av.loc[("drill", "model"), "estimate"] == pytest.approx(2.5, abs=1e-12)


def _uniform_log(design, seed):
    from poolbandit import simulate

    log = simulate(design, "control", seed).log
    counts = log[np.isfinite(log["log_minutes"])].groupby("participant")["arm"].nunique()
    assert (counts == design.n_arms).all()  # precondition: every participant observed on every arm
    return log


def test_naive_and_hajek_match_statsmodels_cluster_robust(design):
    """statsmodels as reference: the naive mean is OLS on a constant among the arm's rows and the
    Hajek estimate is WLS on a constant with weights balance / propensity, both with
    cluster-robust (participant) standard errors (Liang and Zeger 1986; statsmodels'
    small-sample factor G/(G-1), the same as ours). Agreement to 1e-10: same formula,
    different code.
    """
    log = _uniform_log(design, 3)
    prep = prepare(log, design)
    av = arm_values(log, design).set_index(["arm", "estimator"])
    groups = prep.participant
    for k, arm in enumerate(design.arms):
        on = prep.arm == k
        ols = sm.OLS(prep.y[on], np.ones(on.sum())).fit(cov_type="cluster", cov_kwds={"groups": groups[on]})
        assert av.loc[(arm, "naive"), "estimate"] == pytest.approx(ols.params[0], abs=1e-10)
        assert av.loc[(arm, "naive"), "se"] == pytest.approx(ols.bse[0], rel=1e-10)
        w = prep.balance * on / prep.chosen
        wls = sm.WLS(prep.y, np.ones(len(w)), weights=w).fit(cov_type="cluster", cov_kwds={"groups": groups})
        assert av.loc[(arm, "hajek"), "estimate"] == pytest.approx(wls.params[0], abs=1e-10)
        assert av.loc[(arm, "hajek"), "se"] == pytest.approx(wls.bse[0], rel=1e-8)


def test_bootstrap_agrees_with_sandwich_and_is_seeded(one_log, design):
    """Participant bootstrap (Efron and Tibshirani 1993, cluster resampling: common practice) against
    the sandwich: standard errors within 15 percent (2000 resamples give a relative Monte Carlo error of
    about 1.6 percent, and with 40 clusters the two estimators differ by a few percent). Same seed,
    same numbers; another seed, other numbers.
    """
    log = one_log.log
    sand = arm_values(log, design)
    boot = arm_values(log, design, se="bootstrap", n_boot=2000, rng=1)
    ok = sand["estimator"].isin(["naive", "ipw", "hajek"])
    ratio = boot.loc[ok, "se"].to_numpy() / sand.loc[ok, "se"].to_numpy()
    assert np.all(np.abs(ratio - 1) < 0.15), ratio
    again = arm_values(log, design, se="bootstrap", n_boot=2000, rng=1)
    pd.testing.assert_frame_equal(boot, again)
    other = arm_values(log, design, se="bootstrap", n_boot=2000, rng=2)
    assert not np.allclose(other.loc[ok, "se"], boot.loc[ok, "se"])


def test_ratio_estimate_rejects_unknown_method():
    with pytest.raises(ValueError, match="se must be"):
        ratio_estimate(np.ones(3), se="jackknife")


def test_categories_give_group_rows(one_log, design):
    """Each category gets its own rows over its participants only; the classification's long table
    (participant, category, ..., label) is read by its label column."""
    truth = one_log.truth.drop_duplicates("participant")
    long = pd.DataFrame({"participant": np.repeat(truth["participant"].to_numpy(), 2),
                         "category": ["x", "y"] * len(truth),
                         "label": np.repeat(truth["type"].to_numpy(), 2)})
    av = arm_values(one_log.log, design, categories=long, outcome_model=ridge_outcome_model())
    counts = truth["type"].value_counts()
    for name, n in counts.items():
        sub = av[av["group"] == name]
        assert len(sub) == design.n_arms * 5
        assert (sub["participants"] == n).all()
    assert (av.loc[av["group"] == "all", "participants"] == len(truth)).all()


def test_categories_table_errors_name_row_and_value():
    from poolbandit.analysis import category_map
    from poolbandit.errors import LogError

    bad = pd.DataFrame({"participant": ["a", "a"], "label": ["x", "y"]})
    with pytest.raises(LogError, match=r"(?s)cats.csv: .*row 2, column label: participant \"a\" already has"):
        category_map(bad, source="cats.csv")


def test_posterior_draws_give_model_interval():
    """With posterior draws, the model row's interval is the equal-tailed quantile interval of the
    participant-averaged draws (numpy quantiles as reference)."""
    design = parse_design(TINY)
    rng = np.random.default_rng(0)
    draws = 2.0 + rng.standard_normal((400, 1, 1)) * 0.1 + np.zeros((400, 4, 2))
    pred = OutcomePredictions(draws.mean(axis=0), draws, "toy posterior")
    av = arm_values(_tiny_log(), design, outcome_model=pred).set_index(["arm", "estimator"])
    lo, hi = np.quantile(draws[:, 0, 0], [0.025, 0.975])
    assert av.loc[("drill", "model"), "lower"] == pytest.approx(lo, abs=1e-12)
    assert av.loc[("drill", "model"), "upper"] == pytest.approx(hi, abs=1e-12)


def test_policy_value_ipw_of_always_arm_equals_arm_value(one_log, design):
    """"Always arm k" as a target policy has exactly the arm value's IPW estimate (same estimand)."""
    av = arm_values(one_log.log, design).set_index(["arm", "estimator"])
    pv = policy_values(one_log.log, design, design_policies=False).set_index(["policy", "estimator"])
    for arm in design.arms:
        assert pv.loc[(f"always-{arm}", "ipw"), "estimate"] == pytest.approx(av.loc[(arm, "ipw"), "estimate"])
        assert pv.loc[(f"always-{arm}", "snipw"), "estimate"] == pytest.approx(av.loc[(arm, "hajek"), "estimate"])


BERNOULLI = """
[study]
arms = ["drill", "story"]
horizon = 15
outcome = "bernoulli"
reward = "met_goal"
[population]
size = 60
arm_means = [0.0, 0.8]
arm_sd = [0.3, 0.3]
[policies.solo]
kind = "thompson"
clip = [0.1, 0.9]
"""


def test_bernoulli_outcome_against_truth_scale():
    """A bernoulli outcome (Beta-Bernoulli Thompson): weighted estimates are proportions on the same scale
    as the truth. One study of 60 participants: the IPW interval for each arm must cover the true value
    (a 95 percent interval; the seed is fixed, so the check is deterministic), and the outcome model's
    predictions stay inside [0, 1]."""
    from poolbandit import simulate
    from poolbandit.analysis._prepare import prepare

    design = parse_design(BERNOULLI)
    res = simulate(design, "solo", 8)
    prep = prepare(res.log, design)
    pop = res.population
    code = pd.Index(pop.ids).get_indexer(res.log["participant"])
    truth = prep.per_participant(pop.expected(code, np.zeros((len(code), 0)))[prep.rows]).mean(axis=0)
    model = ridge_outcome_model()(res.log, design)
    assert (model.mean >= 0).all() and (model.mean <= 1).all()
    av = arm_values(res.log, design, outcome_model=model).set_index(["arm", "estimator"])
    for k, arm in enumerate(design.arms):
        row = av.loc[(arm, "ipw")]
        assert row["lower"] <= truth[k] <= row["upper"], (arm, truth[k], row.to_dict())
        assert 0 <= av.loc[(arm, "dr"), "estimate"] <= 1
