"""A floor on the number of eligible pure controls, as a rule every draw must meet."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from geoexp._rng import RngLike, as_seed_sequence, child_sequence
from geoexp.design._draws import Draws
from geoexp.design._protocol import Sampler
from geoexp.errors import InfeasibleDesignError
from geoexp.exposure import BandedReach, ExposureMapping, condition_sums

if TYPE_CHECKING:
    from geoexp.graph import ExposureGraph

_PILOT = 400
_BATCH = 1_000


@dataclass(frozen=True, eq=False)
class PureControlFloor:
    """Keep only draws that leave at least ``floor`` eligible units as pure controls.

    The procedure is the base design conditioned on the rule: draws from the
    base sampler are taken in order and those that leave fewer than ``floor``
    eligible units outside every spillover band of every treated unit are
    skipped. (A kept-apart design with a buffer must keep enough pure
    controls to compare the treated units with.) The probabilities of the
    design are those of this conditioned procedure, estimated by Monte Carlo.
    """

    base: Sampler
    graph: ExposureGraph
    mapping: ExposureMapping
    eligible: np.ndarray
    floor: int
    _reach: BandedReach = field(init=False, repr=False)
    _pilot_rate: float = field(init=False, repr=False)

    def __post_init__(self) -> None:
        # the graph and its band codes, prepared once for every batch of draws
        object.__setattr__(self, "_reach", BandedReach.of(self.graph, self.mapping))
        counts = self._pure_controls(self.base.draw_many(_PILOT, 0))
        rate = float((counts >= self.floor).mean())
        object.__setattr__(self, "_pilot_rate", rate)
        if rate == 0.0:
            raise InfeasibleDesignError(
                f"no draw of {_PILOT} left {self.floor} eligible pure controls: draws of this design "
                f"leave between {int(counts.min())} and {int(counts.max())} (median "
                f"{int(np.median(counts))}). Lower min_pure_controls to at most {int(counts.max())}, "
                "treat fewer units, or narrow the spillover bands."
            )

    @property
    def n_units(self) -> int:
        """Number of units in the layer."""
        return self.base.n_units

    def describe(self) -> str:
        """Plain sentence describing the procedure."""
        return (
            f"{self.base.describe()} Draws that leave fewer than {self.floor} eligible pure controls "
            f"are redrawn (about {100 * self._pilot_rate:.0f}% of draws meet the floor)."
        )

    def _pure_controls(self, draws: Draws) -> np.ndarray:
        """Eligible units left as pure controls by each draw."""
        sums = condition_sums(draws, self._reach, self.eligible[:, None].astype(np.float64))
        # sums[r, c, 0]: eligible units in condition c in draw r (pure control left at zero)
        return int(self.eligible.sum()) - sums[:, : self.mapping.pure_control, 0].sum(axis=1)

    def iter_chunks(
        self, n_draws: int, rng: RngLike = None, *, chunk: int | None = None
    ) -> Iterator[Draws]:
        """Yield accepted draws in chunks; the same seed gives the same draws."""
        seq = as_seed_sequence(rng)
        pending: list[Draws] = []
        held = produced = batch = 0
        size = chunk or _BATCH
        while produced < n_draws:
            candidates = self.base.draw_many(size, child_sequence(seq, batch))
            batch += 1
            keep = np.flatnonzero(self._pure_controls(candidates) >= self.floor)
            if batch > 50 and produced == 0 and held == 0:
                raise InfeasibleDesignError("no draw met the pure-control floor in 50 batches")
            if keep.size:
                pending.append(candidates.take(keep))
                held += keep.size
            while held >= size or (held and produced + held >= n_draws):
                merged = Draws.concat(pending)
                want = min(size, n_draws - produced)
                yield merged.take(np.arange(want))
                rest = merged.take(np.arange(want, merged.n_draws))
                pending = [rest] if rest.n_draws else []
                held = rest.n_draws
                produced += want
                if produced >= n_draws:
                    return

    def draw_many(self, n_draws: int, rng: RngLike = None, *, chunk: int | None = None) -> Draws:
        """All accepted draws at once."""
        return Draws.concat(list(self.iter_chunks(n_draws, rng, chunk=chunk)))

    def draw(self, rng: RngLike = None) -> np.ndarray:
        """One accepted assignment (the first accepted draw of the stream)."""
        return self.draw_many(1, rng).treated(0)
