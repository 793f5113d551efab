"""Several randomization tests from one set of draws of the design.

Every test of the analysis that draws the whole design (the additive and
rate-ratio tests with their inverted intervals, Fisher's test, the spread of
the displacement quotient) reads its per-draw statistic from per-draw sums of
weight columns by exposure condition. The exposure engine's cost of a pass
over the draws hardly grows with the number of columns, so summing every
test's columns over the same draws in one pass is several times cheaper than a
pass per test. Each test stays exact on its own: its draws come from the
design's sampler whatever else is summed beside it. Only the Monte Carlo
errors of tests sharing the draws are correlated, which no single p-value,
interval or Holm adjustment depends on.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Generic, TypeVar, cast

import numpy as np

from geoexp._rng import RngLike, as_seed_sequence
from geoexp._significance import Alternative, RandomizationTest
from geoexp.errors import InputError
from geoexp.inference._conditional import spillover_contrast
from geoexp.inference._draws import (
    ContrastSpec,
    draw_sums,
    null_test_from_sums,
    sharp_null_columns,
    weight_columns,
)
from geoexp.inference._models import InvertedTest, _additive, _ratio, _ratio_columns
from geoexp.inference._statistic import Statistic

if TYPE_CHECKING:
    from collections.abc import Callable

    from geoexp.design import Design

T = TypeVar("T")

# Bytes of weight columns summed in one pass (n_units x columns x 8). Above it the columns are
# split over several passes of the very same draws (the same seed), so memory stays bounded at
# a million units while the results do not change.
MAX_COLUMN_BYTES = 512 * 2**20


@dataclass(eq=False)
class Pending(Generic[T]):
    """The result of a queued test, available once :meth:`SharedDraws.run` has run."""

    _value: T | None = None
    _done: bool = False

    def result(self) -> T:
        """The test's result.

        Raises
        ------
        geoexp.errors.InputError
            The shared draws have not been run yet.
        """
        if not self._done:
            raise InputError("the shared draws have not been run yet; call SharedDraws.run()")
        return cast(T, self._value)

    def _set(self, value: T) -> None:
        self._value, self._done = value, True


@dataclass(eq=False)
class _Queued:
    """A queued test: its blocks of weight columns (n_units, q_b) and what to do with their sums."""

    blocks: list[np.ndarray]
    finish: Callable[[np.ndarray], None]

    @property
    def width(self) -> int:
        return sum(b.shape[1] for b in self.blocks)


@dataclass(eq=False)
class SharedDraws:
    """Randomization tests queued against one set of ``n_draws`` draws of ``design``.

    Queue the tests (:meth:`additive`, :meth:`rate_ratio`, :meth:`fisher`,
    :meth:`spillover`, :meth:`sums`), call :meth:`run` once, then read each handle's
    ``result()``. Every result equals what the corresponding stand-alone
    function (:func:`constant_effect_tests`, :func:`rate_ratio_tests`,
    :func:`fisher_test`, :func:`spillover_test` on units that are never
    treated) gives for the same ``rng``: a column's sums do not
    depend on the other columns summed beside it.

    Parameters
    ----------
    design : geoexp.design.Design
        The trial's design; its sampler gives the randomization distribution.
    n_draws : int
        Draws of the design shared by every queued test.
    rng : None, int, SeedSequence or Generator
        The stream of the draws (normalised once, so that several passes, when
        memory asks for them, see the very same draws).
    max_bytes : int
        Largest weight-column matrix summed in one pass
        (:data:`MAX_COLUMN_BYTES`).
    """

    design: Design
    n_draws: int
    rng: RngLike = None
    max_bytes: int = MAX_COLUMN_BYTES
    _queue: list[_Queued] = field(default_factory=list)
    _ran: bool = False

    def _enqueue(self, blocks: list[np.ndarray], finish: Callable[[np.ndarray], None]) -> None:
        if self._ran:
            raise InputError("these shared draws have already been run; queue tests before run()")
        self._queue.append(_Queued([np.asarray(b, dtype=np.float64) for b in blocks], finish))

    def additive(
        self,
        observed: np.ndarray,
        y: np.ndarray,
        probabilities: np.ndarray,
        contrasts: Sequence[ContrastSpec],
        effects: np.ndarray,
        *,
        level: float = 0.95,
        centers: Sequence[float | None] | None = None,
        scales: Sequence[float] | None = None,
        nulls: Sequence[str | None] | None = None,
        interval: bool = True,
    ) -> Pending[list[InvertedTest]]:
        """Queue :func:`constant_effect_tests` (Rosenbaum 2002, test inversion).

        The arguments are those of :func:`constant_effect_tests` (without the
        draws and the stream, which are shared).
        """
        k, l = same_condition(contrasts)
        y = np.asarray(y, dtype=float)
        n = len(contrasts)
        centers = [None] * n if centers is None else list(centers)
        scales = [1.0] * n if scales is None else list(scales)
        nulls = [None] * n if nulls is None else list(nulls)
        blocks = [weight_columns(y, probabilities, c, observed) for c in contrasts]
        effects = np.asarray(effects, dtype=float).copy()
        out: Pending[list[InvertedTest]] = Pending()
        design, n_draws = self.design, self.n_draws

        seen = [_observed_sums(cols, observed, k, l) for cols in blocks]
        widths = [cols.shape[1] for cols in blocks]

        def finish(sums: np.ndarray) -> None:
            parts = _split(sums, widths)
            out._set(
                [
                    _additive(design, o, s, k, l, effects, n_draws, level, c, sc, nu, interval)
                    for o, s, c, sc, nu in zip(seen, parts, centers, scales, nulls, strict=True)
                ]
            )

        self._enqueue(blocks, finish)
        return out

    def rate_ratio(
        self,
        observed: np.ndarray,
        y: np.ndarray,
        probabilities: np.ndarray,
        contrasts: Sequence[ContrastSpec],
        ratios: np.ndarray,
        *,
        level: float = 0.95,
        nulls: Sequence[str | None] | None = None,
        interval: bool = True,
        baselines: Sequence[np.ndarray | None] | None = None,
    ) -> Pending[list[InvertedTest]]:
        """Queue :func:`rate_ratio_tests` (Rosenbaum 2002, ch. 5, multiplicative effects).

        The arguments are those of :func:`rate_ratio_tests` (without the draws
        and the stream, which are shared).

        Raises
        ------
        ValueError
            ``y`` has negative values.
        """
        k, l = same_condition(contrasts)
        y = np.asarray(y, dtype=float)
        if (y < 0).any():
            raise ValueError("rate ratios need counts (non-negative outcomes)")
        n = len(contrasts)
        nulls = [None] * n if nulls is None else list(nulls)
        baselines = [None] * n if baselines is None else list(baselines)
        blocks = [
            _ratio_columns(y, probabilities, c, observed, b)
            for c, b in zip(contrasts, baselines, strict=True)
        ]
        ratios = np.asarray(ratios, dtype=float).copy()
        out: Pending[list[InvertedTest]] = Pending()
        design, n_draws = self.design, self.n_draws

        seen = [_observed_sums(cols, observed, k, l) for cols in blocks]
        widths = [cols.shape[1] for cols in blocks]

        def finish(sums: np.ndarray) -> None:
            parts = _split(sums, widths)
            out._set(
                [
                    _ratio(design, o, s, k, l, ratios, n_draws, level, nu, interval)
                    for o, s, nu in zip(seen, parts, nulls, strict=True)
                ]
            )

        self._enqueue(blocks, finish)
        return out

    def fisher(
        self,
        observed: np.ndarray,
        y: np.ndarray,
        probabilities: np.ndarray,
        contrast: ContrastSpec,
        *,
        null: str,
        estimator: Statistic = "hajek",
        alternative: Alternative = "two-sided",
        keep_null: bool = False,
        n_focal: int = 0,
    ) -> Pending[RandomizationTest]:
        """Queue a test of a sharp null under which ``y`` is fixed (Fisher 1935).

        With ``y`` the observed outcomes this is :func:`fisher_test`, the test
        of no effect at all.
        """
        cols, t_obs, n = sharp_null_columns(
            np.asarray(y, dtype=float), observed, probabilities, contrast, estimator
        )
        out: Pending[RandomizationTest] = Pending()
        n_draws = self.n_draws

        def finish(sums: np.ndarray) -> None:
            out._set(
                null_test_from_sums(
                    sums,
                    contrast,
                    t_obs,
                    n,
                    null,
                    estimator,
                    n_draws,
                    alternative,
                    n_focal,
                    keep_null,
                )
            )

        self._enqueue([cols], finish)
        return out

    def spillover(
        self,
        observed: np.ndarray,
        y: np.ndarray,
        probabilities: np.ndarray,
        band: int,
        focal: np.ndarray | None = None,
        *,
        estimator: Statistic = "hajek",
        alternative: Alternative = "two-sided",
    ) -> Pending[RandomizationTest]:
        """Queue :func:`spillover_test` on focal units that can never be treated.

        Athey, Eckles & Imbens (2018): the test holds the focal units' own
        assignments fixed. Units that are not eligible are never treated, so
        holding them fixed leaves the design's own distribution, and the
        shared draws serve the test exactly.

        Raises
        ------
        geoexp.errors.InputError
            Fewer than :data:`MIN_FOCAL` focal units, or an eligible focal unit
            (its test needs the design conditional on its assignment:
            :func:`spillover_test` draws that).
        """
        spec, focal, null = spillover_contrast(self.design, probabilities, band, focal)
        if self.design.eligible[focal].any():
            raise InputError(
                "eligible focal units need the design conditional on their assignment; "
                "run spillover_test for them"
            )
        return self.fisher(
            observed,
            y,
            probabilities,
            spec,
            null=null,
            estimator=estimator,
            alternative=alternative,
            n_focal=int(focal.size),
        )

    def sums(self, columns: np.ndarray) -> Pending[np.ndarray]:
        """Queue plain per-draw sums of ``columns`` (n_units, q) by condition: (R, C, q)."""
        out: Pending[np.ndarray] = Pending()
        self._enqueue([np.asarray(columns, dtype=float).reshape(self.design.graph.n, -1)], out._set)
        return out

    def run(self) -> None:
        """Sum every queued column over the shared draws and finish every queued test.

        The columns go through in as few passes as :attr:`max_bytes` allows;
        each pass redraws the same draws from the same seed.
        """
        if self._ran:
            raise InputError("these shared draws have already been run")
        self._ran = True
        if not self._queue:
            return
        seq = as_seed_sequence(self.rng)
        d = self.design
        for group in _passes(self._queue, self.max_bytes, d.graph.n):
            # Only distinct columns that are not all zero go through the engine (a band's rows
            # over units that are never treated have all-zero columns for the treated
            # condition; Fisher's columns repeat those of the direct row's additive test). A
            # column's sums do not depend on the others, so this changes no number.
            columns = [c for q in group for b in q.blocks for c in b.T]
            keep, source = _distinct_columns(columns)
            unique = np.empty((d.graph.n, keep.size))
            for j, c in enumerate(keep):
                unique[:, j] = columns[c]
            del columns
            for q in group:
                q.blocks = [np.empty((0, b.shape[1])) for b in q.blocks]  # let the columns go
            sums = np.zeros((self.n_draws, d.mapping.n_conditions, source.size))
            if keep.size:
                found = draw_sums(d.sampler, d.graph, d.mapping, unique, self.n_draws, seq)
                has = source >= 0
                sums[:, :, has] = found[:, :, source[has]]
            del unique
            for q, part in zip(group, _split(sums, [q.width for q in group]), strict=True):
                q.finish(part)
        self._queue.clear()


def _distinct_columns(columns: Sequence[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """The first of each set of identical columns that are not all zero, and for every column
    the position of its copy among those (-1 for an all-zero column)."""
    q = len(columns)
    source = np.full(q, -1)
    keep: list[int] = []
    seen: dict[bytes, list[int]] = {}  # digest -> positions in keep
    for j in range(q):
        col = columns[j]
        if not col.any():
            continue
        key = hashlib.blake2b(np.ascontiguousarray(col).tobytes(), digest_size=16).digest()
        same = [u for u in seen.get(key, []) if np.array_equal(columns[keep[u]], col)]
        if same:
            source[j] = same[0]
            continue
        seen.setdefault(key, []).append(len(keep))
        source[j] = len(keep)
        keep.append(j)
    return np.asarray(keep, dtype=np.int64), source


def _observed_sums(
    cols: np.ndarray, observed: np.ndarray, k: int, l: int
) -> tuple[np.ndarray, np.ndarray]:
    """Column sums over the units observed in ``k`` and in ``l``."""
    return cols[observed == k].sum(axis=0), cols[observed == l].sum(axis=0)


def _split(sums: np.ndarray, widths: Sequence[int]) -> list[np.ndarray]:
    """The per-draw sums (R, C, q) cut into consecutive blocks of ``widths`` columns."""
    edges = np.cumsum([0, *widths])
    return [
        np.ascontiguousarray(sums[:, :, a:b]) for a, b in zip(edges[:-1], edges[1:], strict=True)
    ]


def _passes(queue: list[_Queued], max_bytes: int, n_units: int) -> list[list[_Queued]]:
    """Consecutive groups of queued tests whose columns fit ``max_bytes`` (at least one each)."""
    groups: list[list[_Queued]] = [[]]
    used = 0
    for q in queue:
        size = n_units * q.width * 8
        if groups[-1] and used + size > max_bytes:
            groups.append([])
            used = 0
        groups[-1].append(q)
        used += size
    return groups


def same_condition(contrasts: Sequence[ContrastSpec]) -> tuple[int, int]:
    """The conditions ``k`` and ``l`` that every contrast of a batch shares."""
    if not contrasts:
        raise InputError("at least one contrast is needed")
    pairs = {(c.k, c.l) for c in contrasts}
    if len(pairs) != 1:
        raise InputError(
            f"the contrasts of one batch must share their conditions (one stream of draws "
            f"serves them), got {sorted(pairs)}"
        )
    return pairs.pop()
