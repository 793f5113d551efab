"""Line styles per exposure condition for printed maps.

Colours are the Okabe–Ito palette (Okabe & Ito, 2008, "Color Universal
Design"), chosen to stay apart for readers with colour-vision deficiencies.
Printed in black and white the colours collapse to greys, so each condition
also differs by line width and dash pattern: treated units are the widest solid
lines, the spillover bands dashed then dotted, pure controls thin and solid.

This table stands in until ``geoexp.maps._palette`` exists; when it does, the
briefing pack uses that one so the project keeps a single palette.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class LineStyle:
    """How one exposure condition is drawn on a printed map."""

    color: str
    linewidth: float
    linestyle: str | tuple[float, tuple[float, ...]]
    zorder: int


_TREATED = LineStyle("#D55E00", 3.4, "solid", 6)  # vermillion
_PURE_CONTROL = LineStyle("#999999", 0.6, "solid", 2)
# Spillover bands nearest first; a design with more bands reuses the list with finer dashes.
_BANDS = (
    LineStyle("#E69F00", 2.0, (0.0, (5.0, 1.6)), 5),  # orange, dashed
    LineStyle("#0072B2", 1.4, (0.0, (1.2, 1.2)), 4),  # blue, dotted
    LineStyle("#009E73", 1.1, (0.0, (4.0, 1.2, 1.2, 1.2)), 3),  # bluish green, dash-dot
    LineStyle("#CC79A7", 0.9, (0.0, (2.0, 2.0)), 3),  # reddish purple, short dashes
)


def line_style(condition: str) -> LineStyle:
    """Return the print style of a condition code (``treated``, ``spillover_k``, ``pure_control``)."""
    if condition == "treated":
        return _TREATED
    if condition.startswith("spillover_"):
        band = int(condition.rsplit("_", 1)[1]) - 1
        return _BANDS[band % len(_BANDS)]
    return _PURE_CONTROL
