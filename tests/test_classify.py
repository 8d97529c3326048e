"""Classification: category probabilities, Monte Carlo errors, intervals, shares, agreement, calibration.

Outside references, named per test:

* ArviZ (``arviz.hdi``, ``arviz.mcse``, ``arviz.ess``) for intervals and Monte
  Carlo standard errors (checks.md 10);
* statsmodels (``statsmodels.stats.inter_rater.cohens_kappa``) for Cohen's
  kappa and its standard error (checks.md 12; Cohen 1960; Fleiss, Cohen and
  Everitt 1969);
* scipy (``scipy.integrate.quad`` over ``scipy.stats.norm``) for exact
  category probabilities of independent normal effects;
* Murphy (1973) and Brier (1950) for the Brier score partition, checked on
  forecasts where the partition is exact;
* the calibration of an exact conjugate posterior (Cook, Gelman and Rubin
  2006; Talts et al. 2018: draws from the true posterior are calibrated by
  construction).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import integrate, stats

import arviz as az
from poolbandit.classify import (UNDETERMINED, agreement, brier_decomposition, calibrate, category_indicators,
                                 classify, cohens_kappa, population_effects, read_intake, reliability_table,
                                 rule_contrasts, true_categories)
from poolbandit.errors import InputError, LogError
from poolbandit.spec import CategorySpec

ARMS = ["drill", "story", "roleplay"]
DIMS = ("chain", "draw", "participant", "arm")


def _effect(values, ids=None) -> xr.DataArray:
    values = np.asarray(values, dtype=float)
    ids = ids or [f"p{i}" for i in range(values.shape[2])]
    return xr.DataArray(values, dims=DIMS, coords={"participant": ids, "arm": ARMS})


RULES = (
    CategorySpec("drill-leaning", "best", "drill", None, 0.25),
    CategorySpec("story-over-drill", "beats", "story", "drill", 0.125),
    CategorySpec("no-clear-preference", "within", None, None, 0.25),
)


@pytest.fixture(scope="module")
def hand_built():
    """Ten draws of two participants whose category probabilities are known by counting.

    Participant A: 4 draws drill best by 0.5 (drill-leaning only); 3 draws all equal
    (no-clear-preference only); 2 draws story 0.125 + 0.0625 above drill with range 0.1875
    (story-over-drill AND no-clear-preference: an overlap); 1 draw matching nothing (drill ahead by exactly the margin 0.25, range 0.375).
    Participant B: drill best by 2 in every draw. All numbers are exact binary fractions.
    """
    a = [[1.0, 0.5, 0.5]] * 4 + [[0.5, 0.5, 0.5]] * 3 + [[0.5, 0.6875, 0.5]] * 2 + [[0.875, 0.5, 0.625]]
    b = [[2.0, 0.0, 0.0]] * 10
    values = np.stack([np.array(a), np.array(b)], axis=1)[None]  # (1, 10, 2, 3)
    return _effect(values, ["A", "B"])


def test_category_probabilities_exact_on_hand_built_draws(hand_built):
    """Check probabilities, exclusive probabilities, overlap and labels against counting by hand."""
    c = classify(hand_built, RULES, threshold=0.8)
    p = c.probabilities.set_index(["participant", "category"])
    # per rule on its own: A 4/10, 2/10, 5/10 and 1/10 matching none
    assert p.loc[("A", "drill-leaning"), "probability"] == 4 / 10
    assert p.loc[("A", "story-over-drill"), "probability"] == 2 / 10
    assert p.loc[("A", "no-clear-preference"), "probability"] == 5 / 10
    assert p.loc[("A", UNDETERMINED), "probability"] == 1 / 10
    # exclusive set, first matching rule in design order: the two overlapping draws go to story-over-drill
    assert p.loc[("A", "no-clear-preference"), "exclusive_probability"] == 3 / 10
    assert p.loc[("A", "story-over-drill"), "exclusive_probability"] == 2 / 10
    assert p.loc[("B", "drill-leaning"), "exclusive_probability"] == 1.0
    assert p.loc[("B", "drill-leaning"), "mc_se"] == 0.0  # every draw agrees
    lab = c.labels.set_index("participant")
    assert lab.loc["A", "overlap_probability"] == 2 / 10
    assert lab.loc["A", "label"] == UNDETERMINED and lab.loc["A", "top_category"] == "drill-leaning"
    assert lab.loc["B", "label"] == "drill-leaning"
    assert c.overlapping
    pair = c.overlap_pairs.set_index(["category_a", "category_b"]).loc[("story-over-drill", "no-clear-preference")]
    assert pair["max_probability"] == 2 / 10 and pair["mean_probability"] == 1 / 10
    # shares draw by draw: drill-leaning holds for B always and for A in draws 0-3
    share = c.prevalence.set_index(["set", "category"]).loc[("exclusive", "drill-leaning"), "share"]
    assert share == pytest.approx((4 * 1.0 + 6 * 0.5) / 10, abs=1e-15)


def test_rule_boundaries_are_strict_for_margins_and_inclusive_for_within():
    """Check the design's wording: "more than margin" is strict, "inside [-delta, delta]" is closed."""
    values = np.array([[0.75, 0.5, 0.5], [0.5, 0.625, 0.5], [0.5, 0.5, 0.75]])  # exact binary fractions
    truth = xr.DataArray(values, dims=("participant", "arm"), coords={"participant": ["x", "y", "z"], "arm": ARMS})
    ind = category_indicators(truth, RULES).to_pandas()
    assert not ind.loc["x", "drill-leaning"]  # 0.75 - 0.5 = 0.25 is not more than 0.25
    assert not ind.loc["y", "story-over-drill"]  # 0.125 is not more than 0.125
    assert ind.loc["z", "no-clear-preference"]  # a range of exactly 0.25 is within 0.25
    assert true_categories(truth, RULES)["category"].tolist() == [
        "no-clear-preference", "no-clear-preference", "no-clear-preference"]


def test_contrasts_named_by_rules_once_each():
    """Check that each pair of arms appears once, in the orientation a rule names first."""
    assert rule_contrasts(RULES, ARMS) == [("drill", "story"), ("drill", "roleplay"), ("story", "roleplay")]
    assert rule_contrasts(RULES[1:2], ARMS) == [("story", "drill")]


@pytest.fixture(scope="module")
def autocorrelated():
    """Four AR(1) chains (phi = 0.9) of 5 participants' effects, so that ESS is far below the draw count."""
    rng = np.random.default_rng(11)
    n_chain, n_draw, n = 4, 500, 5
    z = rng.standard_normal((n_chain, n_draw, n, 3))
    x = np.empty_like(z)
    x[:, 0] = z[:, 0]
    for t in range(1, n_draw):
        x[:, t] = 0.9 * x[:, t - 1] + np.sqrt(1 - 0.81) * z[:, t]
    centre = np.array([[0.4, 0.0, 0.0], [0.0, 0.3, 0.0], [0.0, 0.0, 0.0], [0.1, 0.2, 0.3], [-0.3, 0.3, 0.0]])
    return _effect(centre + 0.25 * x)


def test_mcse_and_hdi_equal_arviz(autocorrelated):
    """checks.md 10: the package's HDIs and Monte Carlo standard errors equal ArviZ's on the same draws.

    Reference: ``arviz.hdi`` and ``arviz.mcse(method="mean")`` (the latter is sd / sqrt(ESS of the mean)).
    Tolerance 1e-12: the same arithmetic, only floating-point reordering differs.
    """
    eff = autocorrelated
    c = classify(eff, RULES, mass=0.8)
    ind = category_indicators(eff, RULES).astype(float)
    ref = az.mcse(xr.Dataset({"i": ind}), method="mean")["i"].to_pandas()
    got = c.probabilities.pivot(index="participant", columns="category", values="mc_se")
    np.testing.assert_allclose(got.loc[ref.index, ref.columns].to_numpy(), ref.to_numpy(), rtol=1e-12)
    # the autocorrelation matters: the iid formula sqrt(p(1-p)/n) would be far too small (for probabilities
    # that are not near 0 or 1, where a handful of matching draws carry little autocorrelation)
    p = c.probabilities.pivot(index="participant", columns="category", values="probability")
    iid = np.sqrt(p * (1 - p) / (4 * 500)).loc[ref.index, ref.columns].to_numpy()
    ok = (p.loc[ref.index, ref.columns].to_numpy() > 0.05) & (p.loc[ref.index, ref.columns].to_numpy() < 0.95)
    assert ok.sum() >= 5
    assert np.all(got.loc[ref.index, ref.columns].to_numpy()[ok] > 1.5 * iid[ok])
    # and the brief's form sqrt(p(1-p)/ESS) agrees up to ArviZ's ddof=1 sd: factor sqrt(n/(n-1))
    ess = az.ess(xr.Dataset({"i": ind}), method="mean")["i"].to_pandas()
    brief = np.sqrt(p * (1 - p) / ess).loc[ref.index, ref.columns].to_numpy()
    np.testing.assert_allclose(brief * np.sqrt(2000 / 1999), ref.to_numpy(), rtol=1e-9)

    hdi = az.hdi(xr.Dataset({"e": eff}), hdi_prob=0.8)["e"]
    arms = c.effects[c.effects["kind"] == "arm"]
    for row in arms.itertuples():
        ref_lo, ref_hi = hdi.sel(participant=row.participant, arm=row.quantity).to_numpy()
        assert (row.hdi_low, row.hdi_high) == pytest.approx((ref_lo, ref_hi), rel=1e-12, abs=1e-12)
    diff = eff.sel(arm="story") - eff.sel(arm="roleplay")
    dh = az.hdi(xr.Dataset({"d": diff}), hdi_prob=0.8)["d"]
    rows = c.effects[c.effects["quantity"] == "story - roleplay"].set_index("participant")
    np.testing.assert_allclose(rows.loc[[str(p) for p in dh["participant"].to_numpy()], ["hdi_low", "hdi_high"]],
                               dh.to_numpy(), rtol=1e-12)
    means = arms.pivot(index="participant", columns="quantity", values="mean")
    np.testing.assert_allclose(means.loc[list(eff["participant"].to_numpy()), ARMS],
                               eff.mean(("chain", "draw")).to_numpy(), rtol=1e-12)


def test_labels_follow_threshold(autocorrelated):
    """Check that a label is given exactly when the top exclusive probability reaches the threshold."""
    for threshold in (0.3, 0.6, 0.95):
        c = classify(autocorrelated, RULES, threshold=threshold)
        lab = c.labels
        expect = np.where(lab["top_probability"] >= threshold, lab["top_category"], UNDETERMINED)
        assert (lab["label"].to_numpy() == expect).all()


@pytest.mark.parametrize("bad", [{"mass": 1.0}, {"mass": 0}, {"threshold": 0.0}, {"threshold": 1.2}])
def test_bad_options_raise_input_error(autocorrelated, bad):
    """Check that out-of-range options name the option and the value."""
    name, value = next(iter(bad.items()))
    with pytest.raises(InputError, match=f"{name}: expected a number in .*got {value!r}"):
        classify(autocorrelated, RULES, **bad)


def _fake_posterior(beta, tau, *, draws=400, gamma=None, corr=None, coef=("drill", "story", "roleplay")):
    post = {"beta": (("chain", "draw", "coef"), np.broadcast_to(beta, (1, draws, len(beta))).copy()),
            "tau": (("chain", "draw", "coef"), np.broadcast_to(tau, (1, draws, len(tau))).copy())}
    coords = {"coef": list(coef)}
    if gamma is not None:
        post["gamma"] = (("chain", "draw", "coef", "covariate"), np.broadcast_to(gamma, (1, draws, *np.shape(gamma))))
        coords["covariate"] = [f"w{j}" for j in range(np.shape(gamma)[1])]
    if corr is not None:
        post["corr"] = (("chain", "draw", "coef", "coef_"), np.broadcast_to(corr, (1, draws, *np.shape(corr))))
        coords["coef_"] = list(coef)
    return xr.Dataset(post, coords=coords)


def _p_best(means, sd, a, margin):
    """P(X_a - max_{j != a} X_j > margin) for independent normals: one-dimensional quadrature."""
    others = [j for j in range(len(means)) if j != a]
    f = lambda x: stats.norm.pdf(x, means[a], sd) * np.prod([stats.norm.cdf(x - margin, means[j], sd)
                                                             for j in others])
    return integrate.quad(f, -np.inf, np.inf)[0]


def _p_within(means, sd, d):
    """P(max - min <= d) for independent normals: sum over which arm is the minimum."""
    total = 0.0
    for k in range(len(means)):
        others = [j for j in range(len(means)) if j != k]
        f = lambda x: stats.norm.pdf(x, means[k], sd) * np.prod(
            [stats.norm.cdf(x + d, means[j], sd) - stats.norm.cdf(x, means[j], sd) for j in others])
        total += integrate.quad(f, -np.inf, np.inf)[0]
    return total


def test_population_shares_match_exact_normal_probabilities():
    """Check the population-model shares against exact probabilities of independent normal effects.

    With beta and tau fixed in every draw, a new participant's arm effects are independent
    N(beta_k, tau^2); the probability of each rule is a one-dimensional integral computed with
    scipy.integrate.quad. Tolerance: 4 Monte Carlo standard errors of the simulated share
    (400 draws x 200 new participants).
    """
    beta = np.array([0.3, 0.1, 0.0])
    rules = (CategorySpec("drill-leaning", "best", "drill", None, 0.2),
             CategorySpec("story-leaning", "best", "story", None, 0.2),
             CategorySpec("flat", "within", None, None, 0.3))
    pop = population_effects(_fake_posterior(beta, np.full(3, 0.4)), ARMS, n_new=200, rng=5)
    eff = _effect(np.zeros((1, 4, 1, 3)))
    c = classify(eff, rules, population_effect=pop)
    shares = c.prevalence.query("source == 'new participant (population model)' and set == 'marginal'")
    shares = shares.set_index("category")
    exact = {"drill-leaning": _p_best(beta, 0.4, 0, 0.2), "story-leaning": _p_best(beta, 0.4, 1, 0.2),
             "flat": _p_within(beta, 0.4, 0.3)}
    for name, value in exact.items():
        assert abs(shares.loc[name, "share"] - value) < 4 * shares.loc[name, "mc_se"], name


def test_population_shares_of_a_mixture_match_exact_probabilities():
    """Check the population-model shares under the mixture population model against exact probabilities.

    With the weights, component means and tau fixed in every draw, a new participant's arm effects
    follow the mixture sum_c pi_c N(mu_c, tau^2 I) (law of total probability), so each rule's
    probability is the weighted sum of the normal ones, each computed with scipy.integrate.quad.
    ``beta`` is deliberately set to a value no component has: the shares must not depend on it.
    Tolerance: 4 Monte Carlo standard errors of the simulated share (400 draws x 200 new participants).
    """
    weight = np.array([0.5, 0.3, 0.2])
    mu = np.array([[0.8, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 0.7, 0.0]])
    post = _fake_posterior(np.full(3, 5.0), np.full(3, 0.2))
    post["weight"] = (("chain", "draw", "component"), np.broadcast_to(weight, (1, 400, 3)).copy())
    post["component_mean"] = (("chain", "draw", "component", "coef"), np.broadcast_to(mu, (1, 400, 3, 3)).copy())
    rules = (CategorySpec("drill-leaning", "best", "drill", None, 0.2),
             CategorySpec("story-leaning", "best", "story", None, 0.2),
             CategorySpec("flat", "within", None, None, 0.3))
    pop = population_effects(post, ARMS, n_new=200, rng=6)
    c = classify(_effect(np.zeros((1, 4, 1, 3))), rules, population_effect=pop)
    shares = c.prevalence.query("source == 'new participant (population model)' and set == 'marginal'")
    shares = shares.set_index("category")
    exact = {"drill-leaning": sum(w * _p_best(m, 0.2, 0, 0.2) for w, m in zip(weight, mu)),
             "story-leaning": sum(w * _p_best(m, 0.2, 1, 0.2) for w, m in zip(weight, mu)),
             "flat": sum(w * _p_within(m, 0.2, 0.3) for w, m in zip(weight, mu))}
    for name, value in exact.items():
        assert abs(shares.loc[name, "share"] - value) < 4 * shares.loc[name, "mc_se"], name


def test_population_effects_use_covariates_and_correlation():
    """Check the moments of simulated new participants: mean beta + Gamma E[w], covariance
    D R D + Gamma Var(w) Gamma' (normal theory, common practice).

    Tolerance: 5 standard errors of a sample mean / covariance of 400 x 100 = 40000 draws.
    """
    beta = np.array([1.0, 0.0, -1.0])
    tau = np.array([0.5, 0.2, 0.3])
    gamma = np.array([[0.4], [0.0], [-0.2]])
    corr = np.array([[1.0, 0.6, 0.0], [0.6, 1.0, 0.0], [0.0, 0.0, 1.0]])
    w = np.array([[-1.0], [0.0], [2.0]])  # observed covariates: mean 1/3, variance 14/9
    pop = population_effects(_fake_posterior(beta, tau, gamma=gamma, corr=corr), ARMS, covariates=w, rng=9)
    x = pop.to_numpy().reshape(-1, 3)
    mean_w, var_w = w.mean(), w.var()
    cov = np.diag(tau) @ corr @ np.diag(tau) + gamma @ gamma.T * var_w
    se_mean = np.sqrt(np.diag(cov) / len(x))
    np.testing.assert_array_less(np.abs(x.mean(axis=0) - (beta + gamma[:, 0] * mean_w)), 5 * se_mean)
    se_cov = np.sqrt((cov ** 2 + np.outer(np.diag(cov), np.diag(cov))) / len(x))
    np.testing.assert_array_less(np.abs(np.cov(x.T) - cov), 5 * se_cov)


# --------------------------------------------------------------------------
# Agreement (checks.md 12)
# --------------------------------------------------------------------------
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_kappa_matches_statsmodels(seed):
    """checks.md 12: Cohen's kappa, its large-sample SE and 95% interval equal statsmodels' cohens_kappa.

    Reference: statsmodels.stats.inter_rater.cohens_kappa (Fleiss, Cohen and Everitt 1969 variance).
    Tables: seeded random counts, one with an empty row. Tolerance 1e-12: same formula, reordered sums.
    """
    from statsmodels.stats.inter_rater import cohens_kappa as sm_kappa

    rng = np.random.default_rng(seed)
    table = rng.integers(0, 12, size=(4, 4)) + np.diag(rng.integers(5, 20, size=4))
    if seed == 2:
        table[1] = 0
    ours = cohens_kappa(table)
    ref = sm_kappa(table)
    assert ours.kappa == pytest.approx(ref["kappa"], abs=1e-12)
    assert ours.se == pytest.approx(ref["std_kappa"], abs=1e-12)
    assert (ours.low, ours.high) == pytest.approx((ref["kappa_low"], ref["kappa_upp"]), abs=1e-12)


def test_agreement_table_and_kappa_from_labels(hand_built):
    """Check that the confusion table counts labels against intake answers (pandas crosstab as reference)
    and that kappa is statsmodels' kappa of that table."""
    from statsmodels.stats.inter_rater import cohens_kappa as sm_kappa

    rng = np.random.default_rng(4)
    n = 40
    kinds = rng.integers(0, 3, size=n)
    centre = np.zeros((n, 3))
    centre[kinds == 0, 0] = 3.0  # drill-leaning
    centre[kinds == 1, 1] = 3.0  # story over drill
    values = centre[None, None] + 0.01 * rng.standard_normal((1, 20, n, 3))
    ids = [f"q{i}" for i in range(n)]
    c = classify(_effect(values, ids), RULES)
    names = [r.name for r in RULES]
    flip = rng.random(n) < 0.3
    intake_codes = np.where(flip, rng.integers(0, 3, size=n), kinds)
    intake = pd.Series(np.asarray(names, dtype=object)[intake_codes], index=ids)
    intake.iloc[0] = None  # one missing answer
    a = agreement(c, intake)
    labels = c.labels.set_index("participant")["label"]
    ref = pd.crosstab(labels.loc[ids[1:]], intake.iloc[1:]).reindex(index=names, columns=names, fill_value=0)
    np.testing.assert_array_equal(a.table.loc[names, names].to_numpy(), ref.to_numpy())
    assert a.n_missing == 1
    assert a.kappa.kappa == pytest.approx(sm_kappa(ref.to_numpy())["kappa"], abs=1e-12)


def test_read_intake_names_row_column_and_value(tmp_path):
    """Check that bad intake files raise LogError naming file, row, column and value."""
    names = [r.name for r in RULES]
    good = tmp_path / "intake.csv"
    good.write_text("participant,answer\nA,drill-leaning\nB,\n", encoding="utf-8")
    s = read_intake(good, "answer", names)
    assert s["A"] == "drill-leaning" and pd.isna(s["B"])
    bad = tmp_path / "bad.csv"
    bad.write_text("participant,answer\nA,drill-leaning\nB,chatty\nB,flat\n", encoding="utf-8")
    with pytest.raises(LogError, match=r'(?s)bad.csv.*row 2, column answer: expected one of .*got "chatty"') as err:
        read_intake(bad, "answer", names)
    assert 'row 3, column participant: duplicate participant, got "B"' in str(err.value)
    with pytest.raises(LogError, match='missing column "answer2"'):
        read_intake(good, "answer2", names)


# --------------------------------------------------------------------------
# Calibration (checks.md 11)
# --------------------------------------------------------------------------
def test_murphy_partition_is_exact_for_discrete_forecasts():
    """Murphy (1973): with forecasts taking one value per bin, BS = REL - RES + UNC exactly.

    Reference values are recomputed independently with a pandas groupby over the distinct forecasts.
    Tolerance 1e-12: the same sums in another order.
    """
    rng = np.random.default_rng(3)
    values = np.arange(10) / 10 + 0.05
    p = rng.choice(values, size=2000)
    o = (rng.random(2000) < np.clip(p + 0.1, 0, 1)).astype(float)  # a biased forecaster: REL > 0
    d = brier_decomposition(p, o)
    assert d["within_bin"] == pytest.approx(0.0, abs=1e-12)
    g = pd.DataFrame({"p": p, "o": o}).groupby("p")["o"].agg(["mean", "size"])
    base = o.mean()
    rel = np.sum(g["size"] * (g.index.to_numpy() - g["mean"]) ** 2) / len(p)
    res = np.sum(g["size"] * (g["mean"] - base) ** 2) / len(p)
    assert d["reliability"] == pytest.approx(rel, abs=1e-12)
    assert d["resolution"] == pytest.approx(res, abs=1e-12)
    assert d["uncertainty"] == pytest.approx(base * (1 - base), abs=1e-12)
    assert d["brier"] == pytest.approx(np.mean((p - o) ** 2), abs=1e-12)
    assert d["reliability"] > 0.005  # the bias of 0.1 shows (expected about 0.01)


def test_climatology_forecast_has_no_reliability_or_resolution():
    """Brier (1950), Murphy (1973): always forecasting the base rate gives REL = RES = 0 and BS = UNC.

    A categorical forecast's score is the sum of its categories' binary scores.
    """
    rng = np.random.default_rng(8)
    cat = rng.choice(3, size=500, p=[0.5, 0.3, 0.2])
    o = np.eye(3)[cat]
    p = np.broadcast_to(o.mean(axis=0), o.shape)
    d = brier_decomposition(p, o)
    assert d["reliability"] == pytest.approx(0.0, abs=1e-15)
    assert d["resolution"] == pytest.approx(0.0, abs=1e-15)
    assert d["brier"] == pytest.approx(d["uncertainty"], abs=1e-12)
    per = sum(brier_decomposition(p[:, j], o[:, j])["brier"] for j in range(3))
    assert d["brier"] == pytest.approx(per, abs=1e-12)


def _conjugate_study(rng, n, shrink=1.0):
    """True effects from N(m0, s0^2); one noisy mean per arm; draws from the exact normal posterior.

    ``shrink`` < 1 makes the posterior overconfident (sd multiplied by ``shrink``).
    """
    m0, s0, se = np.array([0.1, 0.0, 0.0]), 0.3, 0.2
    theta = m0 + s0 * rng.standard_normal((n, 3))
    ybar = theta + se * rng.standard_normal((n, 3))
    prec = 1 / s0**2 + 1 / se**2
    mean = (m0 / s0**2 + ybar / se**2) / prec
    draws = mean + shrink * rng.standard_normal((1, 1000, n, 3)) / np.sqrt(prec)
    ids = [f"c{i:03d}" for i in range(n)]
    truth = xr.DataArray(theta, dims=("participant", "arm"), coords={"participant": ids, "arm": ARMS})
    return _effect(draws, ids), truth


def test_exact_posterior_is_calibrated_and_overconfidence_is_caught():
    """checks.md 11 (Brier 1950; Murphy 1973): draws from the exact conjugate posterior give calibrated
    category probabilities and 90% intervals that cover the truth 90% of the time; a posterior with
    half the correct spread does not.

    Bounds: coverage within 3.5 binomial SEs of 0.9 over 900 participant-arm pairs (SE 0.010). With
    300 participants and 4 categories, binning noise alone gives a calibrated forecaster a reliability
    term of about 0.0175 here (``reliability_chance``; measured 0.016 to 0.023 over seeds 21, 23, 24),
    so the bound is 0.03; the overconfident posterior measures 0.054 with coverage 0.59.
    """
    rules = (CategorySpec("drill-leaning", "best", "drill", None, 0.1),
             CategorySpec("story-leaning", "best", "story", None, 0.1),
             CategorySpec("flat", "within", None, None, 0.2))
    eff, truth = _conjugate_study(np.random.default_rng(21), 300)
    good = calibrate(classify(eff, rules), truth).summary()
    eff, truth = _conjugate_study(np.random.default_rng(22), 300, shrink=0.5)
    bad = calibrate(classify(eff, rules), truth).summary()
    se = np.sqrt(0.9 * 0.1 / 900)
    assert abs(good["coverage"] - 0.9) < 3.5 * se
    assert good["reliability"] < 0.03
    assert bad["coverage"] < 0.8
    assert bad["reliability"] > 2 * good["reliability"]
    assert good["brier"] == pytest.approx(good["reliability"] - good["resolution"] + good["uncertainty"]
                                          + good["within_bin"], abs=1e-12)


def test_reliability_table_counts_and_frequencies():
    """Check the binned table against numpy histogram counts and per-bin means (numpy as reference)."""
    rng = np.random.default_rng(2)
    p = rng.random(300)
    o = (rng.random(300) < p).astype(float)
    t = reliability_table(p, o, bins=5)
    counts, _ = np.histogram(p, bins=np.linspace(0, 1, 6))
    np.testing.assert_array_equal(t["n"].to_numpy(), counts[counts > 0])
    k = np.minimum((p * 5).astype(int), 4)
    np.testing.assert_allclose(t["observed"], [o[k == j].mean() for j in t["bin"]], rtol=1e-12)


def test_chance_level_of_reliability_matches_simulation():
    """Check ``reliability_chance`` (the reliability term expected of a perfectly calibrated forecaster)
    against its definition by simulation: outcomes drawn from the forecasts themselves (common practice,
    a consistency resampling check). Tolerance: 4 Monte Carlo SEs of the average over 400 resamples.
    """
    rng = np.random.default_rng(12)
    p = rng.dirichlet([1.0, 1.0, 1.0], size=150)
    rels = []
    for _ in range(400):
        cat = (rng.random(150)[:, None] > np.cumsum(p, axis=1)).sum(axis=1)
        rels.append(brier_decomposition(p, np.eye(3)[cat])["reliability"])
    chance = brier_decomposition(p, np.eye(3)[cat])["reliability_chance"]
    assert abs(np.mean(rels) - chance) < 4 * np.std(rels, ddof=1) / np.sqrt(400)


# --------------------------------------------------------------------------
# With the fast engine on a simulated study (pooled Thompson sampling collects the data)
# --------------------------------------------------------------------------
# The calibration scenario of benchmarks/classification_calibration.py
# (poolbandit.simulation.scenarios.latent_types_scenario): 80 participants in 4 waves, horizon 28,
# four latent types in equal shares, heterogeneity 0.25, noise sd 0.8, adherence 0.85; policies
# "pooled" (pooled Thompson sampling) and "solo"; the three "arm-leaning" categories (margin 0.2)
# and "no-clear-preference" (within 0.2).


def _fast_replicate(design, rng, *, silence: str | None = None):
    """Simulate with pooled Thompson sampling, fit the fast engine, classify pooled and unpooled."""
    from poolbandit._random import spawn
    from poolbandit.models.effects import arm_effects
    from poolbandit.models.fit import fit
    from poolbandit.simulation import simulate
    from poolbandit.classify import true_effects, unpooled_effects

    g_sim, g_fit, g_pop, g_un = spawn(rng, 4)
    result = simulate(design, "pooled", g_sim)
    log = result.log.copy()
    if silence is not None:  # a participant whose sessions were all missed: no data at all
        log.loc[log["participant"] == silence, design.study.reward] = np.nan
    idata = fit(log, design, engine="fast", chains=2, draws=300, tune=100, rng=g_fit)
    effect = arm_effects(idata, design.arms, design.features)
    truth = true_effects(result.population)
    pooled = classify(effect, design.categories)
    un = classify(unpooled_effects(log, design, draws=600, rng=g_un), design.categories)
    return {"idata": idata, "effect": effect, "pooled": pooled, "unpooled": un, "truth": truth, "g_pop": g_pop,
            "log": log}


@pytest.fixture(scope="module")
def fast_study():
    from poolbandit.simulation.scenarios import latent_types_scenario

    design = latent_types_scenario()
    return design, _fast_replicate(design, 20261203, silence="p080")


def test_participant_without_data_gets_population_shares_and_no_label(fast_study):
    """A participant with no observations has the population predictive as posterior, so its category
    probabilities equal the shares implied by the fitted population distribution (hierarchical model,
    BDA3 section 5.3: a new group's parameters are drawn from the population distribution), and it
    stays unlabelled. Tolerance: 4 combined Monte Carlo SEs (ArviZ ESS-based) of the two estimates.
    """
    design, rep = fast_study
    pop = population_effects(rep["idata"], design.arms, design.features, n_new=200, rng=rep["g_pop"])
    silent = rep["effect"].sel(participant=["p080"])
    c = classify(silent, design.categories, population_effect=pop)
    p = c.probabilities.set_index("category")
    shares = c.prevalence.query("source == 'new participant (population model)' and set == 'exclusive'")
    shares = shares.set_index("category")
    for name in c.names:
        tol = 4 * np.hypot(p.loc[name, "exclusive_mc_se"], shares.loc[name, "mc_se"])
        assert abs(p.loc[name, "exclusive_probability"] - shares.loc[name, "share"]) < tol, name
    assert c.labels["label"].iloc[0] == UNDETERMINED
    assert c.labels["top_probability"].iloc[0] < 0.5  # four types in equal shares: nobody near 0.8
    # and participants with data are labelled too: the test is not passing because everyone is undetermined
    assert (rep["pooled"].labels["label"] != UNDETERMINED).mean() > 0.2


@pytest.fixture(scope="module")
def fast_reps(fast_study):
    """The three replicates of the latent-types scenario (seeds 20261203, 7, 8), normal population model."""
    design, rep0 = fast_study
    return [rep0] + [_fast_replicate(design, seed) for seed in (7, 8)]


def test_fast_engine_calibration_in_simulation(fast_study, fast_reps):
    """checks.md 11, small seeded version of benchmarks/classification_calibration.py: three replicates of
    the N = 80, K = 3, horizon 28 scenario with four latent types, data from pooled Thompson sampling,
    fast engine.

    Bounds: 90% effect intervals cover the truth for 85-95% of the 720 participant-arm pairs (the
    brief's band; binomial SE about 0.011), and labels given at probability 0.8 are right for more
    than 85% of labelled participants (chance would be about 1/4). Measured at these seeds: coverage
    0.918, labelled accuracy 1.0. The reliability term is not bounded here: over 20 replicates the
    benchmark measures 0.0365 against a chance level of 0.004 for both engines (probabilities too
    moderate: the normal population model is misspecified for four discrete types), so the brief's
    0.02 is not met by the normal population model in this scenario; the next test meets it on the same
    data with the mixture population model, and the one after checks the normal model where it is right.
    """
    from poolbandit.classify import Calibration

    s = Calibration.combine([calibrate(r["pooled"], r["truth"]) for r in fast_reps]).summary()
    assert 0.85 <= s["coverage"] <= 0.95
    assert s["labelled_accuracy"] > 0.85


def test_mixture_population_model_calibrated_with_latent_types(fast_reps):
    """checks.md 11 (Brier 1950; Murphy 1973), small seeded version of
    ``benchmarks/classification_calibration.py --engine fast --population-model mixture``: on the same three
    replicates as the previous test (four latent types, data from pooled Thompson sampling), the fast
    engine with the mixture population model (four components, ``[priors] population = "mixture"``)
    gives calibrated category probabilities and beats the normal population model on the same data.

    Bounds: reliability at most 0.02 above its chance level (``reliability_chance``, about 0.024 with
    240 participants; as in the next test, the brief's 0.02 applied to the excess); coverage 85-95%;
    paired per-participant Brier difference normal - mixture above 2 SEs; and the mixture's Brier below
    the unpooled posteriors' (a point estimate: over 20 replicates the benchmark measures the difference
    at about 1.5 SEs, so three replicates cannot show it beyond noise). Measured at these seeds: excess
    0.006 (the normal model's 0.026, above the bound), coverage 0.914, normal - mixture 0.029 (SE
    0.007), unpooled - mixture 0.010 (SE 0.008).
    """
    from poolbandit.classify import Calibration
    from poolbandit.models.effects import arm_effects
    from poolbandit.models.fit import fit
    from poolbandit.simulation.scenarios import latent_types_scenario

    design = latent_types_scenario(population_model="mixture")
    cals = []
    for j, rep in enumerate(fast_reps):
        idata = fit(rep["log"], design, engine="fast", chains=2, draws=300, tune=100, rng=1000 + j)
        assert idata.posterior["weight"].sizes["component"] == 4
        cals.append(calibrate(classify(arm_effects(idata, design.arms, design.features), design.categories),
                              rep["truth"]))
    mix = Calibration.combine(cals)
    normal = Calibration.combine([calibrate(r["pooled"], r["truth"]) for r in fast_reps])
    unpooled = Calibration.combine([calibrate(r["unpooled"], r["truth"]) for r in fast_reps])
    s = mix.summary()
    assert s["reliability"] - s["reliability_chance"] <= 0.02
    assert 0.85 <= s["coverage"] <= 0.95
    d = (normal.per_participant_brier() - mix.per_participant_brier()).to_numpy()
    assert d.mean() > 2 * d.std(ddof=1) / np.sqrt(len(d))
    assert unpooled.summary()["brier"] > s["brier"]


def test_pooled_posteriors_calibrated_and_better_than_unpooled_when_model_is_right():
    """checks.md 11 (Brier 1950; Murphy 1973): when participants differ as the hierarchical model
    assumes (normal heterogeneity, sd 0.3 per arm, no latent types), the fast engine's category
    probabilities are calibrated and beat each participant's own conjugate posterior (the unpooled
    Thompson policy's) on the same data. Three replicates of 80 participants, pooled Thompson sampling.

    Bounds: reliability at most 0.02 above its chance level (``reliability_chance``, about 0.026 with
    240 participants; the brief's 0.02 applied to the excess, since the raw term needs the benchmark's
    1600 participants); paired Brier difference unpooled - pooled above 2 SEs; coverage 85-95%.
    Measured: excess 0.008, difference 0.056 (SE 0.015), coverage 0.871; the unpooled posteriors'
    excess is 0.059 (overconfident labels, accuracy 0.77).
    """
    from poolbandit.classify import Calibration
    from poolbandit.simulation.scenarios import latent_types_scenario

    design = latent_types_scenario(population="normal")
    reps = [_fast_replicate(design, seed) for seed in (11, 12, 13)]
    pooled = Calibration.combine([calibrate(r["pooled"], r["truth"]) for r in reps])
    unpooled = Calibration.combine([calibrate(r["unpooled"], r["truth"]) for r in reps])
    s = pooled.summary()
    assert s["reliability"] - s["reliability_chance"] <= 0.02
    assert 0.85 <= s["coverage"] <= 0.95
    d = (unpooled.per_participant_brier() - pooled.per_participant_brier()).to_numpy()
    assert d.mean() > 2 * d.std(ddof=1) / np.sqrt(len(d))


# --------------------------------------------------------------------------
# The command line
# --------------------------------------------------------------------------
@pytest.fixture(scope="module")
def cli_files(tmp_path_factory):
    """A small simulated log (12 participants, unpooled Thompson sampling) with its design and an intake file."""
    from poolbandit.log import write_log
    from poolbandit.simulation import simulate
    from poolbandit.simulation.scenarios import latent_types_scenario

    root = tmp_path_factory.mktemp("cli")
    design = latent_types_scenario(size=12)
    (root / "design.toml").write_text(design.source_text, encoding="utf-8")
    result = simulate(design, "solo", 5)
    write_log(result.log, root / "log.csv")
    names = [c.name for c in design.categories]
    ids = result.population.ids
    intake = pd.DataFrame({"participant": ids, "answer": [names[i % 4] for i in range(len(ids))]})
    intake.loc[0, "answer"] = ""
    intake.to_csv(root / "intake.csv", index=False)
    return root, design


def test_cli_classify_writes_tables_and_report(cli_files):
    """Check the command's outputs: the documented columns, probabilities that sum to 1 per participant,
    and a report whose figures are all embedded (PNG data URIs)."""
    from poolbandit.cli.main import main

    root, design = cli_files
    out = root / "out"
    rc = main(["classify", str(root / "log.csv"), "--design", str(root / "design.toml"), "--chains", "2",
               "--draws", "60", "--tune", "30", "--seed", "3", "--intake", str(root / "intake.csv"),
               "--intake-column", "answer", "--out", str(out)])
    assert rc == 0
    cats = pd.read_csv(out / "categories.csv")
    assert list(cats.columns[:5]) == ["participant", "category", "probability", "mc_se", "exclusive_probability"]
    assert "label" in cats.columns
    sums = cats.groupby("participant")["exclusive_probability"].sum()
    np.testing.assert_allclose(sums, 1.0, atol=1e-12)
    eff = pd.read_csv(out / "effects.csv")
    assert {"participant", "quantity", "mean", "hdi_low", "hdi_high"} <= set(eff.columns)
    assert set(eff["quantity"]) == set(design.arms) | {"drill - story", "drill - roleplay", "story - roleplay"}
    assert (eff["hdi_low"] <= eff["mean"]).all() and (eff["mean"] <= eff["hdi_high"]).all()
    prev = pd.read_csv(out / "prevalence.csv")
    assert set(prev["source"]) == {"studied participants", "new participant (population model)"}
    conf = pd.read_csv(out / "agreement.csv", index_col=0)
    assert conf.to_numpy().sum() == 11  # one participant has no intake answer
    text = (out / "report.html").read_text(encoding="utf-8")
    assert text.count('<img src="data:image/png;base64,') == 4  # forest, bars, shares, confusion


@pytest.mark.parametrize("extra, message", [
    (["--context", "weekend=1"], 'unknown feature "weekend"'),
    (["--intake-column", "answer"], "--intake and --intake-column go together"),
    (["--mass", "1.5"], "--mass: expected a number in"),
])
def test_cli_classify_bad_input_exits_2_and_writes_nothing(cli_files, capsys, extra, message):
    """Check that bad arguments exit with status 2, name the offending value and leave no output."""
    from poolbandit.cli.main import main

    root, _ = cli_files
    out = root / "bad-out"
    rc = main(["classify", str(root / "log.csv"), "--design", str(root / "design.toml"), "--out", str(out), *extra])
    assert rc == 2
    assert message in capsys.readouterr().err
    assert not out.exists()


def test_cli_classify_bad_intake_names_row_and_value(cli_files, capsys, tmp_path):
    """Check that an intake value outside the categories is reported with row, column and value."""
    from poolbandit.cli.main import main

    root, _ = cli_files
    bad = tmp_path / "intake.csv"
    bad.write_text("participant,answer\np001,drill-leaning\np002,sometimes\n", encoding="utf-8")
    rc = main(["classify", str(root / "log.csv"), "--design", str(root / "design.toml"), "--intake", str(bad),
               "--intake-column", "answer", "--out", str(tmp_path / "o")])
    assert rc == 2
    assert 'row 2, column answer: expected one of' in capsys.readouterr().err


def test_blockwise_summaries_equal_one_pass(autocorrelated, monkeypatch):
    """Check that processing participants in blocks (bounded memory) gives the same tables as one pass."""
    import poolbandit.classify.posterior as post

    whole = classify(autocorrelated, RULES)
    original = post._blocks
    monkeypatch.setattr(post, "_blocks", lambda s, n, w: original(s, n, w, budget=2 * s * w))  # two per block
    assert len(post._blocks(2000, 5, 3)) == 3
    parts = classify(autocorrelated, RULES)
    pd.testing.assert_frame_equal(whole.probabilities, parts.probabilities, rtol=1e-12)
    pd.testing.assert_frame_equal(whole.effects, parts.effects, rtol=1e-12)
    pd.testing.assert_frame_equal(whole.labels, parts.labels, rtol=1e-12)


def test_posterior_kappa_draw_by_draw(hand_built):
    """Check the draw-by-draw kappa against statsmodels' cohens_kappa of each draw's own table
    (rows: the draw's exclusive category, the no-rule remainder as an extra row and column)."""
    from statsmodels.stats.inter_rater import cohens_kappa as sm_kappa

    rng = np.random.default_rng(6)
    values = hand_built.to_numpy()[:, :, [0, 1] * 4, :] + 0.0  # 8 participants: A, B, A, B, ...
    values = values + rng.normal(0, 0.05, size=values.shape)
    ids = [f"r{i}" for i in range(8)]
    c = classify(_effect(values, ids), RULES, mass=0.5)
    names = [r.name for r in RULES]
    intake = pd.Series([names[i % 3] for i in range(8)], index=ids)
    a = agreement(c, intake)
    codes = c.exclusive.to_numpy()[0]
    answer = np.array([i % 3 for i in range(8)])
    ref = []
    for s in range(codes.shape[0]):
        t = np.zeros((4, 4))
        np.add.at(t, (codes[s], answer), 1)
        ref.append(sm_kappa(t, return_results=False))
    assert a.posterior_kappa["mean"] == pytest.approx(np.mean(ref), abs=1e-12)
    assert a.posterior_kappa["low"] <= a.posterior_kappa["mean"] <= a.posterior_kappa["high"]


def test_agreement_with_undefined_kappa_is_nan_not_an_error(hand_built):
    """Check that kappa is reported as undefined (NaN) when a single category appears on both sides,
    where its formula divides by zero (Cohen 1960: 1 - p_e = 0)."""
    c = classify(hand_built, RULES)  # only B is labelled, drill-leaning
    a = agreement(c, pd.Series({"A": "drill-leaning", "B": "drill-leaning"}))
    assert np.isnan(a.kappa.kappa) and a.kappa.n == 1 and a.n_undetermined == 1
    with pytest.raises(ValueError, match="kappa is undefined"):
        cohens_kappa([[3, 0], [0, 0]])


def test_population_effects_with_correlation_over_some_coefficients():
    """Check the full engine's layout, a correlation over the random coefficients only
    (``corr (random_coef, random_coef_bis)``): the sample covariance of new participants equals
    D R D with R the identity outside those coefficients (normal theory). Tolerance: 5 SEs of a
    sample covariance of 40000 draws.
    """
    beta, tau = np.zeros(3), np.array([0.5, 0.4, 0.3])
    post = _fake_posterior(beta, tau)
    r = np.array([[1.0, -0.5], [-0.5, 1.0]])
    post["corr"] = (("chain", "draw", "random_coef", "random_coef_bis"), np.broadcast_to(r, (1, 400, 2, 2)))
    post = post.assign_coords(random_coef=["drill", "roleplay"], random_coef_bis=["drill", "roleplay"])
    x = population_effects(post, ARMS, rng=4).to_numpy().reshape(-1, 3)
    full = np.eye(3)
    full[0, 2] = full[2, 0] = -0.5
    cov = np.diag(tau) @ full @ np.diag(tau)
    se_cov = np.sqrt((cov ** 2 + np.outer(np.diag(cov), np.diag(cov))) / len(x))
    np.testing.assert_array_less(np.abs(np.cov(x.T) - cov), 5 * se_cov)
