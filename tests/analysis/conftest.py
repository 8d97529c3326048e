"""Shared fixtures of the analysis tests: one batch of simulated studies with known truth."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

HERE = Path(__file__).parent

#: Replicates and participants per replicate of the Monte Carlo checks. With 200
#: replicates the Monte Carlo standard error of a bias is sd / sqrt(200), about
#: 0.007 here, against naive biases of 0.06 to 0.17.
REPLICATES = 200
SIZE = 40
SEED = 20261202


@pytest.fixture(scope="session")
def design():
    from poolbandit import load_design

    return load_design(HERE / "adaptive.toml")


@pytest.fixture(scope="session")
def replicates(design):
    """200 independent studies of 40 participants under clipped unpooled Thompson sampling.

    Simulated as one study of 8000 participants split into groups of 40: exact,
    because the unpooled policy decides for each participant from that
    participant's data alone and the design has one enrolment wave.
    """
    from poolbandit.analysis._montecarlo import replicate_studies

    return replicate_studies(design, "solo", REPLICATES, SIZE, SEED)


@pytest.fixture(scope="session")
def mc_tables(design, replicates):
    """Arm and policy estimates of every replicate next to their true values."""
    from poolbandit.analysis import arm_values, policy_values, ridge_outcome_model

    full, seq = ridge_outcome_model(), ridge_outcome_model(sequential=True)
    arms, pols = [], []
    k = design.n_arms
    for r, rep in enumerate(replicates):
        truth = dict(zip(design.arms, rep.arm_truth))
        for kind, fitter in (("full", full), ("sequential", seq)):
            model = fitter(rep.log, design)  # fitted once, shared by both tables
            a = arm_values(rep.log, design, outcome_model=model)
            a = a[a["group"] == "all"]
            if kind == "sequential":  # the weighting-only rows do not depend on the model
                a = a[a["estimator"] == "dr"]
            a = a.assign(estimator=np.where(a["estimator"] == "dr", f"dr-{kind}", a["estimator"]),
                         truth=a["arm"].map(truth), replicate=r)
            arms.append(a)
            oracle = rep.oracle_table()
            uniform = np.full((len(rep.log), k), 1.0 / k)
            p = policy_values(rep.log, design, outcome_model=model, policies={"oracle": oracle},
                              design_policies=False)
            p = p[p["policy"].isin(["uniform-random", "oracle"]) & (p["estimator"] != "model")]
            if kind == "sequential":
                p = p[p["estimator"] == "dr"]
            truths = {"uniform-random": rep.policy_truth(design, uniform), "oracle": rep.policy_truth(design, oracle)}
            p = p.assign(estimator=np.where(p["estimator"] == "dr", f"dr-{kind}", p["estimator"]),
                         truth=p["policy"].map(truths), replicate=r)
            pols.append(p)
    return pd.concat(arms, ignore_index=True), pd.concat(pols, ignore_index=True)


@pytest.fixture(scope="session")
def one_log(design):
    """One simulated study (solo policy) with its result object."""
    from poolbandit import simulate

    return simulate(design, "solo", 5)
