"""The public names of poolbandit.analysis (style rule: __all__ lists exactly what is documented)."""

import importlib

import pytest

MODULES = ["poolbandit.analysis", "poolbandit.analysis.arm_values", "poolbandit.analysis.policy_values",
           "poolbandit.analysis.conditions", "poolbandit.analysis.outcome_models", "poolbandit.analysis.run",
           "poolbandit.analysis.report", "poolbandit.cli.analyse"]


@pytest.mark.parametrize("name", MODULES)
def test_all_names_exist_and_are_public(name):
    mod = importlib.import_module(name)
    assert mod.__all__, name
    for attr in mod.__all__:
        assert hasattr(mod, attr), (name, attr)
        assert not attr.startswith("_"), (name, attr)


def test_docstrings_name_the_sources():
    """The estimator modules cite their methods (style rule: References for methods from papers)."""
    # the package re-exports the function arm_values, which shadows the module attribute: use sys.modules
    av = importlib.import_module("poolbandit.analysis.arm_values")
    run = importlib.import_module("poolbandit.analysis.run")

    for source in ("Horvitz", "Robins, J. M., Rotnitzky, A. and Zhao", "Dudik, M., Langford, J. and Li",
                   "Nie, X., Tian, X., Taylor, J. and Zou", "Hadad, V., Hirshberg, D. A., Zhan, R., Wager"):
        assert source in av.__doc__, source
    assert "Nie" in run.ADAPTIVE_CAUTION and "Hadad" in run.ADAPTIVE_CAUTION
