"""Fixtures shared by the model tests."""

import pytest


@pytest.fixture
def both_sweep_paths(monkeypatch):
    """Run a Gibbs sampler class with the scalar-block sweep and with the general one, same streams.

    Returns ``run(cls, data, priors, attrs)``: for each path (scalar first), 2 dispersed lockstep
    chains from seed 3 make 25 sweeps and the named state attributes are returned, so a test can
    hold the closed forms for scalar blocks to the general block algebra.
    """
    from poolbandit._random import spawn
    from poolbandit.models import gibbs

    def run(cls, data, priors, attrs):
        out = []
        for scalar in (True, False):
            monkeypatch.setattr(gibbs, "_SCALAR_PATH", scalar)
            s = cls._chains(data, priors, spawn(3, 2), "dispersed")
            assert s._scalar is scalar
            s.sweep(25)
            out.append(tuple(getattr(s, a) for a in attrs))
        return out

    return run
