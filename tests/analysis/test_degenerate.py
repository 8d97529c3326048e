"""Logs without propensities or with deterministic choices: refuse what cannot be estimated, give the rest.

Common practice (micro-randomised trials; Horvitz and Thompson 1952 for the
positivity requirement): a weighted estimate needs every arm's probability
logged and positive. UCB1 (Auer, Cesa-Bianchi and Fischer 2002) is
deterministic and logs propensity 1 for its choice, so the other arms had
probability 0 there.
"""

import warnings

import numpy as np
import pandas as pd
import pytest

from poolbandit import simulate
from poolbandit.analysis import analyse, arm_values, policy_values, read_analysis_log, ridge_outcome_model
from poolbandit.cli.main import main
from poolbandit.errors import LogError, OverlapWarning

HERE = __import__("pathlib").Path(__file__).parent
DESIGN = str(HERE / "adaptive.toml")


@pytest.fixture(scope="module")
def ucb_log(design):
    return simulate(design, "ucb", 9, size=30).log


def test_deterministic_policy_refuses_weighted_arm_values(ucb_log, design):
    """Positivity fails for UCB1: IPW, Hajek and DR are refused with a reason; naive and model remain."""
    av = arm_values(ucb_log, design, outcome_model=ridge_outcome_model())
    weighted = av[av["estimator"].isin(["ipw", "hajek", "dr"])]
    assert (weighted["status"] == "refused").all()
    assert weighted["note"].str.contains("positivity fails").all()
    assert weighted["estimate"].isna().all()
    rest = av[av["estimator"].isin(["naive", "model"])]
    assert (rest["status"] == "ok").all() and rest["estimate"].notna().all()


def test_deterministic_policy_values(ucb_log, design):
    """Off the logging policy: refused. On it (the replayed UCB1 reproduces the log): weights 1, estimable."""
    pv = policy_values(ucb_log, design, design_policies=True).set_index(["policy", "estimator"])
    assert pv.loc[("uniform-random", "ipw"), "status"] == "refused"
    assert "positivity fails" in pv.loc[("uniform-random", "ipw"), "note"]
    assert pv.loc[("ucb", "ipw"), "status"] == "ok"
    assert pv.loc[("ucb", "ipw"), "max_weight"] == pytest.approx(1.0)
    assert pv.loc[("ucb", "ipw"), "estimate"] == pytest.approx(pv.loc[("logged", "observed"), "estimate"])
    assert pv.loc[("oracle", "ipw"), "status"] == "unavailable"  # reads the truth: cannot be replayed


def test_forced_exploration_blocks_use_marginal_probability(design):
    """Forced exploration shows the arms of a block in random order: conditional probability 0 for arms
    already shown, marginal 1/K. The analysis weights those decisions with 1/K, so nothing is refused."""
    log = simulate(design, "explore", 4, size=30).log
    assert (log.loc[log["decision"] <= 3, ["prob_drill", "prob_story", "prob_roleplay"]].to_numpy() == 0).any()
    res = analyse(log, design, outcome_model=ridge_outcome_model(), design_policies=False)
    assert (res.arm_values["status"] == "ok").all()
    assert any("forced-exploration" in n for n in res.notes)


def test_thin_overlap_warns(one_log, design):
    """OverlapWarning when Kish's effective sample size falls below the stated share of decisions."""
    with pytest.warns(OverlapWarning, match=r"always-roleplay.*effective sample size"):
        pv = policy_values(one_log.log, design, design_policies=False, min_ess_share=0.5)
    row = pv.set_index(["policy", "estimator"]).loc[("always-roleplay", "ipw")]
    assert row["ess_share"] < 0.5 and "thin overlap" in row["note"]
    # Kish's formula checked by hand on the weights
    log = one_log.log[np.isfinite(one_log.log["log_minutes"])]
    w = (log["arm"] == "roleplay") / log["propensity"]
    # participant balancing does not enter the weights' ESS
    assert row["ess"] == pytest.approx(w.sum() ** 2 / (w**2).sum())


def _write(df, path):
    df.to_csv(path, index=False)
    return str(path)


def test_cli_without_propensities_exit_0(one_log, tmp_path, capsys):
    """No propensity column at all: exit 0, weighted rows refused with a clear note, naive rows given."""
    log = one_log.log.drop(columns=["propensity", "prob_drill", "prob_story", "prob_roleplay"])
    path = _write(log, tmp_path / "log.csv")
    status = main(["analyse", path, "--design", DESIGN, "--out", str(tmp_path / "out"), "--outcome-model", "none"])
    assert status == 0
    av = pd.read_csv(tmp_path / "out" / "arm_values.csv")
    ipw = av[av["estimator"] == "ipw"]
    assert (ipw["status"] == "refused").all() and ipw["note"].str.contains("no propensities").all()
    assert (av.loc[av["estimator"] == "naive", "status"] == "ok").all()
    out = capsys.readouterr().out
    assert "no propensities" in out
    for name in ("policy_values.csv", "conditions.csv", "report.html"):
        assert (tmp_path / "out" / name).exists()


def test_cli_ucb_log_exit_0(ucb_log, tmp_path):
    path = _write(ucb_log, tmp_path / "log.csv")
    assert main(["analyse", path, "--design", DESIGN, "--out", str(tmp_path / "out"), "--outcome-model", "none"]) == 0
    av = pd.read_csv(tmp_path / "out" / "arm_values.csv")
    assert av.loc[av["estimator"] == "ipw", "note"].str.contains("positivity fails").all()


def test_partly_empty_propensities_are_an_error(one_log, tmp_path, capsys):
    log = one_log.log.copy().astype({"propensity": object})
    log.loc[4, "propensity"] = ""
    path = _write(log, tmp_path / "log.csv")
    assert main(["analyse", path, "--design", DESIGN, "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert "row 5, column propensity" in err
    assert not (tmp_path / "out" / "arm_values.csv").exists()


def test_invalid_log_exit_2(one_log, tmp_path, capsys):
    log = one_log.log.copy()
    log.loc[2, "arm"] = "karaoke"
    path = _write(log, tmp_path / "log.csv")
    assert main(["analyse", path, "--design", DESIGN, "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert 'row 3, column arm' in err and '"karaoke"' in err and "log.csv" in err


def test_read_analysis_log_round_trip(one_log, tmp_path, design):
    path = _write(one_log.log, tmp_path / "log.csv")
    log = read_analysis_log(path, design)
    assert np.allclose(log["propensity"], one_log.log["propensity"])
    empty = one_log.log.assign(propensity="")
    log2 = read_analysis_log(_write(empty, tmp_path / "log2.csv"), design)
    assert log2["propensity"].isna().all() and not any(c.startswith("prob_") for c in log2.columns)
    with pytest.raises(LogError, match="file not found"):
        read_analysis_log(tmp_path / "nope.csv", design)


def test_cli_full_run_with_categories_conditions_and_outcomes(design, tmp_path):
    """A log with a condition column, a classification-style categories CSV and a per-participant outcome CSV."""
    a = simulate(design, "solo", 1, size=20).log
    c = simulate(design, "control", 2, size=20).log
    c["participant"] = "c" + c["participant"]
    log = pd.concat([a.assign(condition="adaptive"), c.assign(condition="control")], ignore_index=True)
    ids = pd.unique(log["participant"])
    cats = pd.DataFrame({"participant": ids, "label": np.where(np.arange(len(ids)) % 2, "x", "y")})
    rng = np.random.default_rng(0)
    outcomes = pd.DataFrame({"participant": ids, "rating_change": rng.normal(size=len(ids))})
    args = ["analyse", _write(log, tmp_path / "log.csv"), "--design", DESIGN, "--out", str(tmp_path / "out"),
            "--categories", _write(cats, tmp_path / "cats.csv"),
            "--participant-outcomes", _write(outcomes, tmp_path / "outcomes.csv"), "--seed", "3"]
    with warnings.catch_warnings():
        warnings.simplefilter("error", OverlapWarning)  # the CLI reports overlap in its tables, not as warnings
        assert main(args) == 0
    av = pd.read_csv(tmp_path / "out" / "arm_values.csv")
    assert set(av["group"]) == {"all", "x", "y"}
    cond = pd.read_csv(tmp_path / "out" / "conditions.csv").set_index(["outcome", "method"])
    assert cond.loc[("log_minutes", "welch"), "status"] == "ok"
    assert cond.loc[("log_minutes", "mixed-model"), "status"] == "ok"
    assert cond.loc[("rating_change", "welch"), "status"] == "ok"
    assert cond.loc[("rating_change", "mixed-model"), "status"] == "refused"
    html = (tmp_path / "out" / "report.html").read_text()
    assert "Nie, Tian, Taylor and Zou 2018" in html and "Hadad, Hirshberg, Zhan, Wager and Athey 2021" in html
    assert (av.loc[av["estimator"] == "dr", "status"] == "ok").all()  # the default outcome model ran
    from poolbandit.analysis.outcome_models import hierarchical_available

    if hierarchical_available():  # the hierarchical model's posterior gives the model rows an interval
        model = av[(av["estimator"] == "model") & (av["group"] == "all")]
        assert np.isfinite(model["lower"]).all() and (model["lower"] < model["upper"]).all()


def test_cli_same_seed_same_tables(one_log, tmp_path):
    path = _write(one_log.log, tmp_path / "log.csv")
    args = ["analyse", path, "--design", DESIGN, "--outcome-model", "none", "--se", "bootstrap", "--seed", "4"]
    assert main(args + ["--out", str(tmp_path / "a")]) == 0
    assert main(args + ["--out", str(tmp_path / "b")]) == 0
    for name in ("arm_values.csv", "policy_values.csv"):
        pd.testing.assert_frame_equal(pd.read_csv(tmp_path / "a" / name), pd.read_csv(tmp_path / "b" / name))
