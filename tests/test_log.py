"""The StudyLog: exact CSV round trip and validation messages with row, column and value."""


import pandas as pd
import pytest

from poolbandit import LogError, read_log, simulate, validate_log, write_log
from poolbandit.log import log_columns


@pytest.fixture(scope="module")
def sim(demo_design):
    return simulate(demo_design, "greedy", 11, size=12)


def test_round_trip_is_exact(sim, demo_design, tmp_path):
    """Check that write_log then read_log returns the same table, float bits included."""
    path = tmp_path / "log.csv"
    write_log(sim.log, path)
    back = read_log(path, demo_design)
    pd.testing.assert_frame_equal(back, sim.log, check_exact=True)
    assert list(back.columns) == log_columns(demo_design, simulated=True)
    # and writing again gives the same bytes
    path2 = tmp_path / "log2.csv"
    write_log(back, path2)
    assert path.read_bytes() == path2.read_bytes()


def _corrupt(sim, row, column, value):
    df = sim.log.astype({column: object}).copy()
    df.loc[row - 1, column] = value
    return df


@pytest.mark.parametrize("column, value, fragment", [
    ("arm", "dance", 'row 3, column arm: expected one of drill, story, roleplay, got "dance"'),
    ("propensity", 0.0, "row 3, column propensity: expected a probability in (0, 1], got 0.0"),
    ("propensity", 1.5, "row 3, column propensity: expected a probability in (0, 1], got 1.5"),
    ("decision", "x", 'row 3, column decision: expected an integer >= 1, got "x"'),
    ("log_minutes", "lots", 'row 3, column log_minutes: expected a number, got "lots"'),
    ("weekend", None, 'row 3, column weekend: expected a finite number, got ""'),
    ("participant", None, 'row 3, column participant: expected a non-empty value, got ""'),
])
def test_bad_cells_are_named(sim, demo_design, column, value, fragment):
    """Check that a bad cell is reported with its 1-based row, column and value."""
    with pytest.raises(LogError) as err:
        validate_log(_corrupt(sim, 3, column, value), demo_design)
    assert fragment in str(err.value)


def test_missing_column(sim, demo_design):
    """Check that a missing column is named."""
    with pytest.raises(LogError, match='missing column "propensity"'):
        validate_log(sim.log.drop(columns="propensity"), demo_design)


def test_duplicate_and_nonincreasing_decisions(sim, demo_design):
    """Check duplicate participant-decision pairs and decisions that do not increase."""
    dup = sim.log.copy()
    dup.loc[1, "decision"] = dup.loc[0, "decision"]
    with pytest.raises(LogError, match=r"row 2, column decision: duplicate decision for participant \"p001\", got 1"):
        validate_log(dup, demo_design)
    swapped = sim.log.copy()
    swapped.loc[[1, 2], "decision"] = [3, 2]
    with pytest.raises(LogError, match=r"row 3, column decision: expected decisions that increase"):
        validate_log(swapped, demo_design)


def test_probability_table_must_match_propensity(sim, demo_design):
    """Check that a propensity disagreeing with the logged probability table is refused."""
    bad = sim.log.copy()
    k = bad.loc[4, "arm"]
    bad.loc[4, "propensity"] = min(1.0, bad.loc[4, f"prob_{k}"] + 0.01) if bad.loc[4, f"prob_{k}"] < 1 else 0.5
    with pytest.raises(LogError, match="row 5, column propensity: expected the chosen arm's prob_ value"):
        validate_log(bad, demo_design)


def test_missing_rewards_are_allowed(sim, demo_design):
    """Check that empty rewards (missed sessions) are valid and stay NaN."""
    assert sim.log["log_minutes"].isna().any()
    out = validate_log(sim.log, demo_design)
    assert out["log_minutes"].isna().sum() == sim.log["log_minutes"].isna().sum()


def test_cli_bad_log_exit_status_2(sim, demo_design, tmp_path):
    """Check that `poolbandit`'s log readers map a bad log to exit 2 naming row, column and value."""
    bad = _corrupt(sim, 7, "arm", "dance")
    path = tmp_path / "log.csv"
    write_log(bad, path)
    with pytest.raises(LogError) as err:
        read_log(path, demo_design)
    assert str(err.value).startswith(str(path))
    assert 'row 7, column arm' in str(err.value)
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    with pytest.raises(LogError, match="the file is empty"):
        read_log(empty, demo_design)
