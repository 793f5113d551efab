"""The single place where user-supplied randomness is normalised.

Every public function that draws takes ``rng`` (None, an int seed, a
``numpy.random.SeedSequence`` or a ``numpy.random.Generator``) and calls
:func:`as_generator` once at its boundary. Child streams come from
``SeedSequence.spawn`` so that parallel or chunked work stays reproducible.
"""

from __future__ import annotations

from enum import IntEnum

import numpy as np

RngLike = None | int | np.random.SeedSequence | np.random.Generator


def as_seed_sequence(rng: RngLike) -> np.random.SeedSequence:
    """Return a SeedSequence for ``rng`` (a Generator contributes fresh entropy from itself)."""
    if isinstance(rng, np.random.SeedSequence):
        return rng
    if isinstance(rng, np.random.Generator):
        return np.random.SeedSequence(rng.integers(0, 2**63 - 1, size=4, dtype=np.int64))
    if rng is None or isinstance(rng, (int, np.integer)):
        if rng is not None and int(rng) < 0:
            raise ValueError(f"a seed must be a non-negative integer, got {rng}")
        return np.random.SeedSequence(None if rng is None else int(rng))
    raise TypeError(
        "rng must be None, an int seed, a numpy SeedSequence or a numpy Generator; "
        f"got {type(rng).__name__}"
    )


def as_generator(rng: RngLike) -> np.random.Generator:
    """Return a Generator for ``rng``; a Generator is passed through unchanged."""
    if isinstance(rng, np.random.Generator):
        return rng
    return np.random.default_rng(as_seed_sequence(rng))


def spawn_generators(rng: RngLike, n: int) -> list[np.random.Generator]:
    """Return ``n`` independent child Generators derived from ``rng``."""
    return [np.random.default_rng(s) for s in as_seed_sequence(rng).spawn(n)]


def child_sequence(seq: np.random.SeedSequence, *key: int) -> np.random.SeedSequence:
    """The child of ``seq`` at ``key``, without advancing ``seq``'s spawn counter.

    ``SeedSequence.spawn`` counts the children it has handed out, so calling it
    twice on the same object gives different streams; deriving children by an
    explicit key keeps a function that receives the same SeedSequence twice
    reproducible.
    """
    return np.random.SeedSequence(
        entropy=seq.entropy, spawn_key=(*seq.spawn_key, *key), pool_size=seq.pool_size
    )


class Stream(IntEnum):
    """What a random stream of a design is for: the first level of its key under the spec's seed.

    A design's streams are children of ``SeedSequence(spec.seed)``. The
    assignment and the Monte Carlo probabilities keep the one-level keys
    ``(0,)`` and ``(1,)`` they have always had, so a spec and seed give the same
    assignment and probabilities in every version. Every other purpose has a
    two-level key ``(purpose, index)`` (the index is a spillover band, a
    contrast, ...), so no two purposes or indices can share a stream however
    many bands a design has.
    """

    ASSIGNMENT = 0
    MONTE_CARLO = 1
    FISHER_TEST = 2
    SPILLOVER_TEST = 3
    INVERSION = 4
    FOCAL_UNITS = 5
    POWER = 6
    MORAN = 7
    RATE_RATIO = 8
    DISPLACEMENT = 9
    ROW_TESTS = 10


_ONE_LEVEL = (Stream.ASSIGNMENT, Stream.MONTE_CARLO)


def stream_key(purpose: Stream, index: int = 0) -> tuple[int, ...]:
    """The spawn key of stream ``(purpose, index)`` under a design's root seed sequence."""
    purpose = Stream(purpose)
    index = int(index)
    if index < 0:
        raise ValueError(f"a stream index must be non-negative, got {index}")
    if purpose in _ONE_LEVEL:
        if index:
            raise ValueError(f"the {purpose.name.lower()} stream has no index, got {index}")
        return (int(purpose),)
    return (int(purpose), index)


def purpose_sequence(
    root: np.random.SeedSequence, purpose: Stream, index: int = 0
) -> np.random.SeedSequence:
    """The child of ``root`` for stream ``(purpose, index)``; see :class:`Stream`."""
    return child_sequence(root, *stream_key(purpose, index))
