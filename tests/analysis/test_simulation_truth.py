"""Arm and policy values against the simulated truth over 200 seeded replicates.

Outside reference: the simulated truth itself (every participant's true
expected reward of every arm in every logged context, from
``poolbandit.simulation``), which no estimator sees. The claims tested are
those of the sources:

* naive means of adaptively collected data are biased (Nie, Tian, Taylor and
  Zou 2018, AISTATS, "Why adaptively collected data have negative bias and
  how to correct for it"); here the bias is upward, because participants who
  do well on an arm get it more often;
* inverse-propensity weighting is unbiased with exact propensities (Horvitz
  and Thompson 1952), whatever the adaptivity, since each term has
  conditional mean equal to the target given the past;
* the doubly robust estimator (Robins, Rotnitzky and Zhao 1994; Dudik,
  Langford and Li 2011) is unbiased when its outcome model is fixed before
  each decision (the sequential stand-in, the construction of Hadad,
  Hirshberg, Zhan, Wager and Athey 2021, PNAS) and has lower variance than
  IPW; the full-data model has a small bias, which is quantified.

The policy is unpooled Thompson sampling clipped to [0.05, 0.9] (adaptive and
with exact propensities).
"""

import pytest

from poolbandit.analysis._montecarlo import summarise_replicates

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def arm_summary(mc_tables):
    return summarise_replicates(mc_tables[0], by=["arm", "estimator"]).set_index(["arm", "estimator"])


@pytest.fixture(scope="module")
def policy_summary(mc_tables):
    return summarise_replicates(mc_tables[1], by=["policy", "estimator"]).set_index(["policy", "estimator"])


def test_naive_means_are_visibly_biased(arm_summary, design):
    """Nie et al. (2018): the naive mean is biased under adaptive assignment.

    For the two arms that a latent type favours (drill, story), the bias must
    exceed 5 Monte Carlo standard errors, and be at least 0.05 on the reward
    scale (a twentieth of the noise sd): visible, not a rounding artefact.
    """
    for arm in ("drill", "story"):
        row = arm_summary.loc[(arm, "naive")]
        assert abs(row["bias"]) > 5 * row["bias_mcse"], row
        assert abs(row["bias"]) > 0.05, row


@pytest.mark.parametrize("estimator", ["ipw", "hajek", "dr-sequential"])
def test_weighted_estimators_unbiased(arm_summary, design, estimator):
    """Horvitz-Thompson (1952), Hajek and the sequential doubly robust estimator are unbiased.

    Tolerance: 3 Monte Carlo standard errors of the mean error over 200
    replicates (a two-sided 99.7 percent band per arm). Hajek's ratio bias is
    of order 1/N and much smaller than this band at N = 40.
    """
    for arm in design.arms:
        row = arm_summary.loc[(arm, estimator)]
        assert abs(row["bias"]) < 3 * row["bias_mcse"], (arm, row.to_dict())


def test_full_data_doubly_robust_bias_is_small(arm_summary, design):
    """The full-data outcome model (no cross-fitting) leaves a small bias: the stated caveat.

    Quantified rather than hidden: the mean error is below a quarter of the
    estimator's own sampling sd for every arm (so it shifts a 95 percent
    interval's coverage by at most about one point), and the naive bias is
    at least twice as large for the favoured arms.
    """
    for arm in design.arms:
        row = arm_summary.loc[(arm, "dr-full")]
        assert abs(row["bias"]) < 0.25 * row["sd"], (arm, row.to_dict())
    for arm in ("drill", "story"):
        assert abs(arm_summary.loc[(arm, "naive"), "bias"]) > 2 * abs(arm_summary.loc[(arm, "dr-full"), "bias"])


def test_intervals_cover_true_arm_values(arm_summary, design):
    """Nominal 95 percent intervals of IPW and DR cover the true arm value at close to the nominal rate.

    Band 0.90-0.99 for the coverage pooled over arms and estimators (800
    intervals; the binomial sd at 0.95 is under 0.01), and 0.85-1.00 for each
    arm and estimator (200 intervals, sd 0.015). The standard error treats
    participants as a sample from a population, so for the value among these
    participants it is slightly conservative: coverage above 0.95 is expected.
    """
    est = ["ipw", "dr-full", "dr-sequential", "hajek"]
    cov = arm_summary.loc[(slice(None), est), "coverage"]
    assert 0.90 <= cov.mean() <= 0.99, cov
    assert ((cov >= 0.85) & (cov <= 1.0)).all(), cov
    # the naive mean's interval undercovers on a favoured arm: the bias is real
    assert arm_summary.loc[("drill", "naive"), "coverage"] < 0.85


def test_doubly_robust_has_lower_variance_than_ipw(arm_summary, design):
    """Dudik, Langford and Li (2011): the DR estimate varies less than IPW.

    Threshold: DR's sd at most 0.8 of IPW's for every arm (measured about
    0.65); the sd of 200 replicates has a relative Monte Carlo error near 5
    percent, so 0.8 leaves room for noise yet fails if the outcome model did
    not help.
    """
    for arm in design.arms:
        for est in ("dr-full", "dr-sequential"):
            assert arm_summary.loc[(arm, est), "sd"] < 0.8 * arm_summary.loc[(arm, "ipw"), "sd"], (arm, est)


@pytest.mark.parametrize("policy", ["uniform-random", "oracle"])
def test_off_policy_values_match_truth(policy_summary, policy):
    """Off-policy values of uniform random and of the oracle (true best arm in each context).

    The oracle's table is computed from the simulated truth; its true value and
    the uniform policy's are averages of the true expected rewards. IPW, SNIPW
    and the sequential DR estimate must lie within 3 Monte Carlo standard
    errors of the truth (99.7 percent band), with coverage of their 95
    percent intervals in 0.85-1.00 (200 intervals; conservative standard
    errors, see the arm value test).
    """
    for est in ("ipw", "snipw", "dr-sequential"):
        row = policy_summary.loc[(policy, est)]
        assert abs(row["bias"]) < 3 * row["bias_mcse"], (est, row.to_dict())
        assert 0.85 <= row["coverage"] <= 1.0, (est, row.to_dict())
    # DR again less variable than IPW
    assert policy_summary.loc[(policy, "dr-sequential"), "sd"] < policy_summary.loc[(policy, "ipw"), "sd"]
