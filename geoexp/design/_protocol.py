"""What every sampler provides, so that the Monte Carlo engine can draw from any design.

A sampler is a definite random procedure over the units of a layer. The
exposure probabilities, the design check, power simulations and
randomization tests only ever use the members named here.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Protocol, runtime_checkable

from geoexp._rng import RngLike
from geoexp.design._draws import Draws

__all__ = ["Sampler", "fixed_treated"]


@runtime_checkable
class Sampler(Protocol):
    """The sampler protocol.

    Attributes
    ----------
    n_units : int
        Number of units in the layer; draws hold positions in ``range(n_units)``.

    Notes
    -----
    ``draw_many(n, rng)`` returns :class:`~geoexp.design.Draws`: for each draw
    the positions of its treated units; the same ``rng`` gives the same draws
    whatever the chunk size. ``iter_chunks`` yields the same draws in pieces.
    ``describe`` is one plain sentence for reports. Samplers whose every draw
    treats the same number of units also have ``n_treated``
    (see :func:`fixed_treated`).
    """

    @property
    def n_units(self) -> int:
        """Number of units in the layer."""
        ...

    def draw_many(self, n_draws: int, rng: RngLike = None, *, chunk: int | None = None) -> Draws:
        """``n_draws`` assignments as CSR rows of treated positions."""
        ...

    def iter_chunks(
        self, n_draws: int, rng: RngLike = None, *, chunk: int | None = None
    ) -> Iterator[Draws]:
        """The draws of :meth:`draw_many`, chunk by chunk."""
        ...

    def describe(self) -> str:
        """The procedure in one plain sentence."""
        ...


def fixed_treated(sampler: object) -> int | None:
    """Number of units every draw of ``sampler`` treats, or None when it varies.

    Parameters
    ----------
    sampler : object
        A sampler; one that wraps another (a ``base`` attribute) is looked
        through.

    Returns
    -------
    int or None
        Its ``n_treated``, or None if it has none.
    """
    count = getattr(sampler, "n_treated", None)
    if count is None and hasattr(sampler, "base"):
        return fixed_treated(sampler.base)
    return None if count is None else int(count)
