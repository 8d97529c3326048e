"""``poolbandit fit`` end to end on a small simulated study, both engines.

Outside references: the posterior file is read back with ArviZ
(``arviz.from_netcdf``), and the written diagnostics equal ArviZ's R-hat, ESS
and HDI recomputed on the draws read back (checks.md 10).
"""

from __future__ import annotations

import arviz as az
import numpy as np
import pandas as pd
import pytest

from poolbandit.cli.main import main
from poolbandit.log import write_log
from poolbandit.simulation import simulate
from poolbandit.spec import parse_design

DESIGN_TOML = """
[study]
arms = ["drill", "story", "roleplay"]
horizon = 8
outcome = "gaussian"
reward = "log_minutes"
seed = 17

[context]
features = ["weekend"]

[population]
size = 12
arm_means = [0.0, 0.3, -0.2]
arm_sd = [0.5, 0.5, 0.5]
noise_sd = 1.0
adherence = 0.9

[population.features.weekend]
kind = "weekend"

[policies.control]
kind = "random"
"""


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """A design file and a simulated log (seeded), with some missed sessions."""
    root = tmp_path_factory.mktemp("fit")
    design_path = root / "design.toml"
    design_path.write_text(DESIGN_TOML, encoding="utf-8")
    log = simulate(parse_design(DESIGN_TOML), "control", rng=4).log
    assert log["log_minutes"].isna().any()  # missed sessions are dropped by the fit
    log_path = root / "log.csv"
    write_log(log, log_path)
    return root, design_path, log_path, log


def _fit(files, out, *extra):
    root, design_path, log_path, _ = files
    return main(["fit", str(log_path), "--design", str(design_path), "--out", str(root / out), *extra])


@pytest.mark.parametrize("engine, extra", [
    ("fast", ["--chains", "2", "--draws", "200", "--tune", "50"]),
    ("full", ["--chains", "2", "--draws", "200", "--tune", "200"]),
])
def test_fit_writes_posterior_and_diagnostics(files, engine, extra, capsys):
    """Both engines: exit 0, a NetCDF posterior that ArviZ reads back with the contract's
    variables and labels, and a diagnostics.csv equal to ArviZ's numbers on those draws
    (to the 6 significant digits the CSV keeps)."""
    from poolbandit.models.diagnostics import diagnostics_table

    root, _, _, log = files
    assert _fit(files, engine, "--engine", engine, "--seed", "3", *extra) == 0
    out = capsys.readouterr().out
    assert f"{engine} engine: 12 participants, {int(log['log_minutes'].notna().sum())} observed rewards" in out
    assert "beta[story]" in out and "wrote" in out
    idata = az.from_netcdf(root / engine / "posterior.nc")
    post = idata.posterior
    assert {"beta", "tau", "sigma", "theta"} <= set(post.data_vars)
    assert list(post["coef"].to_numpy()) == ["drill", "drill:weekend", "story", "story:weekend", "roleplay",
                                            "roleplay:weekend"]
    assert post.sizes["participant"] == 12 and post.sizes["chain"] == 2
    assert post.attrs["engine"] == engine and post.attrs["seed"] == "3"
    written = pd.read_csv(root / engine / "diagnostics.csv")
    again = diagnostics_table(idata, warn=False)
    assert list(written["parameter"]) == list(again["parameter"])
    for col in ("mean", "sd", "hdi_low", "hdi_high", "r_hat", "ess_bulk", "ess_tail"):
        np.testing.assert_allclose(written[col], again[col], rtol=1e-5, atol=1e-12, err_msg=col)
    np.testing.assert_array_equal(written["flagged"].to_numpy(dtype=bool), again["flagged"].to_numpy())
    assert not list((root / engine).glob(".*.tmp"))  # no temporary files left behind


def test_same_seed_same_posterior(files):
    """Seeds (DEVELOPERS.md): the same --seed writes the same draws."""
    root = files[0]
    args = ["--chains", "2", "--draws", "50", "--tune", "10", "--seed", "9"]
    assert _fit(files, "a", *args) == 0 and _fit(files, "b", *args) == 0
    a = az.from_netcdf(root / "a" / "posterior.nc").posterior["theta"].to_numpy()
    b = az.from_netcdf(root / "b" / "posterior.nc").posterior["theta"].to_numpy()
    np.testing.assert_array_equal(a, b)


def test_bad_log_exits_2_and_writes_nothing(files, capsys):
    """A log with an unknown arm: exit status 2, the message names row, column and
    value, and no output file appears."""
    root, design_path, _, log = files
    bad = log.copy()
    bad.loc[4, "arm"] = "podcast"
    bad_path = root / "bad.csv"
    write_log(bad, bad_path)
    status = main(["fit", str(bad_path), "--design", str(design_path), "--out", str(root / "bad")])
    assert status == 2
    err = capsys.readouterr().err
    assert "row 5, column arm" in err and '"podcast"' in err
    assert not (root / "bad" / "posterior.nc").exists()


def test_bad_design_and_arguments_exit_2(files, capsys):
    root, design_path, log_path, _ = files
    assert main(["fit", str(log_path), "--design", str(root / "missing.toml"), "--out", str(root / "x")]) == 2
    assert "missing.toml" in capsys.readouterr().err
    assert _fit(files, "y", "--draws", "0") == 2
    assert "--draws: expected an integer >= 1, got 0" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:  # argparse usage error
        _fit(files, "z", "--engine", "slow")
    assert exc.value.code == 2


def test_fit_dispatcher_matches_the_engine_and_rejects_bad_calls(files):
    """``models.fit`` on a StudyLog is the fast engine on ``ModelData.from_log`` with the
    design's priors (same seed, same draws); bad calls raise with a clear message."""
    from poolbandit.errors import InputError
    from poolbandit.models.data import ModelData
    from poolbandit.models.fit import fit
    from poolbandit.models.gibbs import sample_fast

    design = parse_design(DESIGN_TOML)
    log = files[3]
    a = fit(log, design, chains=1, draws=20, tune=5, rng=np.random.default_rng(1))
    b = sample_fast(ModelData.from_log(log, design), design.priors, chains=1, draws=20, tune=5,
                    rng=np.random.default_rng(1))
    np.testing.assert_array_equal(a.posterior["theta"].to_numpy(), b.posterior["theta"].to_numpy())
    with pytest.raises(InputError, match="needs its design"):
        fit(log)
    with pytest.raises(InputError, match="engine: expected one of 'fast', 'full', got 'slow'"):
        fit(log, design, engine="slow")
    with pytest.raises(ValueError, match="participants applies to a StudyLog"):
        fit(ModelData.from_log(log, design), participants=["p001"])
