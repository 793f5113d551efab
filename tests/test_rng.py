"""Named random streams of a design: reproducible, and never shared by two purposes."""

from __future__ import annotations

import hashlib
import itertools

import numpy as np
import pytest

from geoexp._rng import Stream, child_sequence, purpose_sequence, stream_key

SEED = 20261202
MAX_BANDS = 10  # more bands than any design uses; 7 or more once made two tests share a stream


def _used_keys(n_bands: int) -> list[tuple[Stream, int]]:
    """Every (purpose, index) a design draws from, for a design with ``n_bands`` bands."""
    keys = [(p, 0) for p in Stream]
    for band in range(1, n_bands + 1):
        keys += [(Stream.SPILLOVER_TEST, band), (Stream.FOCAL_UNITS, band)]
    # inversion indexes by condition code: 0 treated, 1..K bands, K+1 pure control
    keys += [(Stream.INVERSION, k) for k in range(n_bands + 2)]
    return sorted(set(keys))


def _state(seq: np.random.SeedSequence) -> bytes:
    return seq.generate_state(8).tobytes()


@pytest.mark.parametrize("n_bands", [1, 2, 7, MAX_BANDS])
def test_no_two_streams_coincide(n_bands):
    root = np.random.SeedSequence(SEED)
    keys = _used_keys(n_bands)
    spawn_keys = [stream_key(p, i) for p, i in keys]
    assert len(set(spawn_keys)) == len(keys)
    states = [_state(purpose_sequence(root, p, i)) for p, i in keys]
    assert len(set(states)) == len(states)
    # samplers split a stream into chunks by a further key: those never meet either
    chunked = [
        _state(child_sequence(purpose_sequence(root, p, i), c))
        for (p, i), c in itertools.product(keys, range(4))
    ]
    assert len(set(chunked + states)) == len(chunked) + len(states)


def test_assignment_and_monte_carlo_keep_their_keys():
    # the one-level keys (0,) and (1,) under the spec's seed are what earlier versions used
    root = np.random.SeedSequence(SEED)
    assert _state(purpose_sequence(root, Stream.ASSIGNMENT)) == _state(child_sequence(root, 0))
    assert _state(purpose_sequence(root, Stream.MONTE_CARLO)) == _state(child_sequence(root, 1))
    assert stream_key(Stream.ASSIGNMENT) == (0,)
    assert stream_key(Stream.MONTE_CARLO) == (1,)


def test_bad_stream_index_is_refused():
    with pytest.raises(ValueError, match="no index"):
        stream_key(Stream.ASSIGNMENT, 1)
    with pytest.raises(ValueError, match="non-negative"):
        stream_key(Stream.SPILLOVER_TEST, -1)


def test_demo_assignment_is_reproducible_across_versions(region, tmp_path):
    from geoexp.design import Design
    from geoexp.quickstart import demo_spec

    design = Design.from_spec(demo_spec(region.path, tmp_path))
    assignment = design.draw()
    ids = sorted(str(x) for x in design.units.ids[assignment.treated])
    # Guards reproducibility across versions: the demo spec and seed must keep giving the
    # treated ids that geoexp has drawn for them since the demo was written (this hash was
    # computed by the code before the design's streams were named). A change here means a
    # published trial could no longer be re-drawn from its spec and seed.
    digest = hashlib.sha256(",".join(ids).encode()).hexdigest()
    assert len(ids) == 40
    assert digest == "e8037da9790964ebf24e1e39902a1b5678779cb6e38c185ee743bc1a00697554"
