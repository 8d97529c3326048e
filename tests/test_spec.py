"""Design files: the embedded design parses, and mistakes name their key path and value."""

import subprocess
import sys
from pathlib import Path

import pytest

from poolbandit import DesignError, default_design, load_design, parse_design

ROOT = Path(__file__).resolve().parents[1]

MINIMAL = """
[study]
arms = ["a", "b"]
horizon = 5
[policies.ucb]
kind = "ucb1"
c = 1.0
"""


def test_example_equals_embedded_design():
    """Check that examples/practice-formats.toml is the embedded demo design, byte for byte."""
    shipped = (ROOT / "examples" / "practice-formats.toml").read_text()
    assert shipped == default_design().source_text
    d = load_design(ROOT / "examples" / "practice-formats.toml")
    assert d.arms == ("drill", "story", "roleplay")
    assert d.features == ("weekend", "yesterday") and d.covariates == ("proficiency",)
    assert [c.name for c in d.categories] == ["drill-leaning", "story-leaning", "roleplay-leaning",
                                               "no-clear-preference"]
    assert d.policy("ucb").params["c"] == 0.5
    assert len(d.sha256) == 64


def test_defaults_are_filled():
    """Check that omitted policy parameters take their documented defaults."""
    d = parse_design(MINIMAL)
    assert d.policy("ucb").params == {"explore_first": 0, "clip": None, "c": 1.0}
    assert d.study.outcome == "gaussian" and d.study.reward == "reward"


# (mutation of MINIMAL, expected fragment of the message) — each a distinct mistake
BAD = [
    ('[policies.ucb]\nkind = "ucb1"\nc = "two"', 'policies.ucb.c: expected a number >= 0, got "two"'),
    ('[policies.ucb]\nkind = "ucb1"\nc = -1', "policies.ucb.c: expected a number >= 0, got -1"),
    ('[policies.ucb]\nkind = "ucb9"', 'policies.ucb.kind: expected one of'),
    ('[policies.ucb]\nkind = "ucb1"\nbonus = 1', "policies.ucb.bonus: unknown key"),
    ('[policies.eg]\nkind = "epsilon-greedy"\nepsilon = 1.5', "policies.eg.epsilon: expected a number in [0, 1], got 1.5"),
    ('[policies.ts]\nkind = "thompson"\nclip = [0.6, 0.9]', "policies.ts.clip: expected a band that contains 1/K"),
    ('[policies.ts]\nkind = "thompson"\nclip = [0.9, 0.1]', "policies.ts.clip: expected a pair [low, high]"),
    ('[policies.ts]\nkind = "thompson"\nexplore_first = 9', "policies.ts.explore_first: expected at most study.horizon = 5"),
    ('[population]\nadherence = 1.2', "population.adherence: expected a number in (0, 1], got 1.2"),
    ('[population]\narm_sd = [0.1]', "population.arm_sd: expected 2 values (one per arm), got 1"),
    ('[[population.types]]\nname = "x"\nshare = 0.5\narm_means = [0, 1]',
     "population.types: expected shares that sum to 1, got 0.5"),
    ('[[categories]]\nname = "a-best"\nbest = "c"', 'categories[0].best: expected one of "a", "b", got "c"'),
    ('[[categories]]\nname = "x"\nbest = "a"\nwithin = 0.1', "categories[0]: expected exactly one of best, beats or within"),
    ('[[categories]]\nname = "x"\nbeats = "a"\nover = "a"', 'categories[0].over: expected an arm other than "a"'),
    ('[context]\nfeatures = ["w", "w"]', 'context.features[1]: duplicate name "w"'),
    ('[context]\nfeatures = ["arm"]', 'context.features[0]: name "arm" clashes with a study log column'),
    ('[priors]\ntau_scale = 0', "priors.tau_scale: expected a number > 0, got 0"),
    ('[study2]\nx = 1', "study2: unknown key"),
    ('[priors]\npopulation = "types"', 'priors.population: expected one of "normal", "mixture", got "types"'),
    ('[priors]\npopulation = "mixture"\ncomponents = 1', "priors.components: expected an integer in [2, 1000], got 1"),
    ('[priors]\npopulation = "mixture"\ncomponents = 2.5',
     "priors.components: expected an integer in [2, 1000], got 2.5"),
    ('[priors]\ncomponents = 3', 'priors.components: applies only with priors.population = "mixture", got 3'),
    ('[priors]\nmixture_concentration = 2', "priors.mixture_concentration: applies only with priors.population"),
    ('[priors]\npopulation = "mixture"\nmixture_concentration = 0',
     "priors.mixture_concentration: expected a number > 0, got 0"),
]


def test_mixture_population_keys_and_defaults():
    """Check the [priors] keys of the mixture population model: the normal model by default (so designs
    without the keys keep their meaning), 4 components and concentration 1 when only population is set."""
    assert parse_design(MINIMAL).priors.population == "normal"
    pri = parse_design(MINIMAL + '[priors]\npopulation = "mixture"\n').priors
    assert (pri.population, pri.components, pri.mixture_concentration) == ("mixture", 4, 1.0)
    pri = parse_design(MINIMAL + '[priors]\npopulation = "mixture"\ncomponents = 3\nmixture_concentration = 0.5\n'
                       'covariance = "full"\n').priors
    assert (pri.components, pri.mixture_concentration, pri.covariance) == (3, 0.5, "full")
    assert isinstance(pri.components, int)


@pytest.mark.parametrize("extra, message", BAD)
def test_bad_design_names_key_path_and_value(extra, message):
    """Check that each kind of mistake raises DesignError naming the key path and the value."""
    text = MINIMAL.replace('[policies.ucb]\nkind = "ucb1"\nc = 1.0\n', "") + "\n" + extra + "\n"
    with pytest.raises(DesignError) as err:
        parse_design(text, source="d.toml")
    assert message in str(err.value)
    assert str(err.value).startswith("d.toml: ")


@pytest.mark.parametrize("study, message", [
    ('arms = []\nhorizon = 5', "study.arms: expected a non-empty list of names, got []"),
    ('arms = ["a"]\nhorizon = 5', 'study.arms: expected at least two arms, got ["a"]'.replace('["a"]', "['a']")),
    ('arms = ["a", "a"]\nhorizon = 5', 'study.arms[1]: duplicate name "a"'),
    ('arms = ["a", "b"]\nhorizon = 0', "study.horizon: expected an integer in [1, 10000], got 0"),
    ('arms = ["a", "b"]\nhorizon = 2.5', "study.horizon: expected an integer in [1, 10000], got 2.5"),
    ('arms = ["a", "b"]\nhorizon = 5\noutcome = "poisson"', 'study.outcome: expected one of "gaussian", "bernoulli", got "poisson"'),
    ('arms = ["a", "b"]', "study.horizon: required key is missing"),
])
def test_bad_study_table(study, message):
    """Check the [study] table's mistakes: empty or duplicate arms, horizon, outcome."""
    with pytest.raises(DesignError, match=None) as err:
        parse_design("[study]\n" + study + "\n")
    assert message in str(err.value)


def test_not_toml_and_missing_file(tmp_path):
    """Check that unreadable files give DesignError with the file name."""
    bad = tmp_path / "bad.toml"
    bad.write_text("[study\narms = 1")
    with pytest.raises(DesignError, match="bad.toml: not valid TOML"):
        load_design(bad)
    with pytest.raises(DesignError, match="nope.toml: file not found"):
        load_design(tmp_path / "nope.toml")


def test_cli_bad_design_exit_status_2(tmp_path):
    """Check that the command line turns a bad design into exit status 2 with the message on stderr."""
    bad = tmp_path / "d.toml"
    bad.write_text(MINIMAL.replace("c = 1.0", 'c = "two"'))
    out = subprocess.run([sys.executable, "-m", "poolbandit.cli.main", "simulate", str(bad), "--policy", "ucb",
                          "--out", str(tmp_path / "o")], capture_output=True, text=True)
    assert out.returncode == 2
    assert 'policies.ucb.c: expected a number >= 0, got "two"' in out.stderr
    assert not (tmp_path / "o").exists()
