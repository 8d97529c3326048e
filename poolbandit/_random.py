"""One helper that turns ``rng`` arguments into a :class:`numpy.random.Generator`.

Every stochastic function in poolbandit takes ``rng: Generator | int | None``
and passes it through :func:`as_generator`. Independent streams (replicates,
chains, decision steps) are made with :func:`spawn` from a
:class:`numpy.random.SeedSequence`, so the same root seed gives the same
numbers on any machine and with any number of workers.
"""

from __future__ import annotations

import numpy as np

__all__ = ["as_generator", "spawn", "seed_sequence"]

RngLike = np.random.Generator | np.random.SeedSequence | int | None


def seed_sequence(rng: RngLike) -> np.random.SeedSequence:
    """Return a :class:`~numpy.random.SeedSequence` for ``rng``.

    An int or None gives a new sequence with that entropy; a Generator gives a
    sequence seeded from one draw of it (so the caller's stream advances).
    """
    if isinstance(rng, np.random.SeedSequence):
        return rng
    if isinstance(rng, np.random.RandomState):
        raise TypeError(
            "numpy.random.RandomState is not accepted: its seeding cannot spawn "
            "independent streams. Pass an int or a numpy.random.Generator."
        )
    if isinstance(rng, np.random.Generator):
        return np.random.SeedSequence(int(rng.integers(0, 2**63 - 1)))
    if rng is None or isinstance(rng, (int, np.integer)):
        return np.random.SeedSequence(None if rng is None else int(rng))
    raise TypeError(f"rng must be a numpy Generator, an int or None; got {type(rng).__name__}")


def as_generator(rng: RngLike) -> np.random.Generator:
    """Turn ``rng`` into a Generator (a Generator passes through unchanged)."""
    if isinstance(rng, np.random.Generator):
        return rng
    return np.random.default_rng(seed_sequence(rng))


def spawn(rng: RngLike, n: int) -> list[np.random.Generator]:
    """Return ``n`` independent Generators derived from ``rng``."""
    return [np.random.default_rng(s) for s in seed_sequence(rng).spawn(n)]
