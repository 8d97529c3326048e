"""Shared fixtures."""

import warnings

import pytest

warnings.filterwarnings("ignore", message=".*ArviZ is undergoing a major refactor.*")


@pytest.fixture(scope="session")
def demo_design():
    """The embedded practice-formats design."""
    from poolbandit import default_design

    return default_design()
