"""One candidate design of a sweep: its grid values, its label and its own seed.

A candidate's seed depends on the sweep's seed and on the candidate's values
alone, never on its place in the grid, the order the candidates run in, or
the machine that runs it: the values are written as canonical JSON, hashed
with SHA-256, and the first 128 bits of the digest join the sweep's seed as
the entropy of a ``numpy.random.SeedSequence`` (O'Neill 2015 designed
SeedSequence so that nearby entropy gives independent streams).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from typing import Any

import numpy as np


def _canonical(key: str, value: Any) -> Any:
    """Grid values in one form: metres as floats, bands as a list of floats."""
    if key == "bands_m":
        return [float(v) for v in value]
    if key == "gap_m":
        return float(value)
    if key == "treated":
        return int(value)
    return str(value)


def candidate_key(values: dict[str, Any]) -> str:
    """Canonical JSON of a candidate's grid values (sorted keys): what its seed is derived from.

    Parameters
    ----------
    values : dict
        The candidate's grid values by parameter name.

    Returns
    -------
    str
        Compact JSON with sorted keys, the same for equal values whatever
        their order.
    """
    canonical = {str(k): _canonical(str(k), v) for k, v in values.items()}
    return json.dumps(canonical, sort_keys=True, separators=(",", ":"))


def candidate_seed(sweep_seed: int, values: dict[str, Any]) -> np.random.SeedSequence:
    """The candidate's own seed sequence, from the sweep's seed and its values alone.

    Parameters
    ----------
    sweep_seed
        The sweep's seed (a non-negative integer).
    values
        The candidate's grid values, e.g. ``{"treated": 40, "gap_m": 150.0}``.

    Returns
    -------
    numpy.random.SeedSequence
        Entropy: the sweep's seed followed by four 32-bit words of the SHA-256
        digest of :func:`candidate_key`.
    """
    digest = hashlib.sha256(candidate_key(values).encode("utf-8")).digest()
    words = np.frombuffer(digest[:16], dtype="<u4").tolist()
    return np.random.SeedSequence([int(sweep_seed), *words])


@dataclass(frozen=True)
class Candidate:
    """One design of a sweep: its grid values in the grid's key order, and its seeds."""

    values: tuple[tuple[str, Any], ...]
    sweep_seed: int

    @classmethod
    def from_values(cls, values: dict[str, Any], sweep_seed: int) -> Candidate:
        """A candidate from a dict of grid values (kept in the dict's order)."""
        items = []
        for k, v in values.items():
            v = _canonical(k, v)
            items.append((k, tuple(v) if isinstance(v, list) else v))
        return cls(tuple(items), int(sweep_seed))

    @property
    def label(self) -> str:
        """The values in words, e.g. ``"treated=40, gap_m=150, bands_m=150/300, method=complete"``."""
        parts = []
        for k, v in self.values:
            if isinstance(v, tuple):
                v = "/".join(f"{x:g}" for x in v)
            elif isinstance(v, float):
                v = f"{v:g}"
            parts.append(f"{k}={v}")
        return ", ".join(parts) or "the base design"

    @property
    def seed_sequence(self) -> np.random.SeedSequence:
        """See :func:`candidate_seed`."""
        return candidate_seed(self.sweep_seed, dict(self.values))

    @property
    def design_seed(self) -> int:
        """The integer seed of the candidate's design spec (below 2**63, a TOML integer)."""
        return int(self.seed_sequence.generate_state(1, np.uint64)[0] >> np.uint64(1))
