"""Placing text and map furniture on a briefing map without covering the numbered places.

Every candidate position is measured with the renderer (the extent matplotlib
will draw) and kept only if it overlaps nothing already placed and stays
inside the map. What does not fit is left off the map and listed beside it.
Artists carry a ``gid`` so that their extents can be checked afterwards:
``place`` (the markers), ``place-number``, ``street-label``, ``scale-bar``,
``north-arrow`` and ``district-label``.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import TypeVar

import numpy as np
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.text import Annotation, Text
from matplotlib.transforms import Bbox, offset_copy

from geoexp.maps import halo_text

C = TypeVar("C")  # a candidate position of map furniture
MARKER_SIZE = 22.0  # scatter size of a numbered place's marker, points squared
MARKER_PAD = 1.5  # points kept clear around a marker
# Offsets (points) of a number from its marker, nearest first: the eight compass points,
# then the same farther out.
_STEPS = ((1, 1), (1, -1), (-1, 1), (-1, -1), (1, 0), (-1, 0), (0, 1), (0, -1))
NUMBER_OFFSETS = tuple((4.5 * sx, 4.5 * sy) for sx, sy in _STEPS) + tuple(
    (9.0 * sx, 9.0 * sy) for sx, sy in _STEPS
)


def artist_box(artist, renderer) -> Bbox:
    """Display extent of a text, patch or annotation (its arrow included)."""
    if isinstance(artist, Annotation):
        artist.update_positions(renderer)
        boxes = [artist.arrow_patch.get_window_extent(renderer)] if artist.arrow_patch else []
        if artist.get_text():
            boxes.append(Text.get_window_extent(artist, renderer))
        return Bbox.union(boxes)
    return artist.get_window_extent(renderer)


def marker_boxes(ax: Axes, xy: np.ndarray) -> list[Bbox]:
    """Display boxes of the place markers (scatter size ``MARKER_SIZE``) with a small margin."""
    fig = ax.figure
    half = (np.sqrt(MARKER_SIZE) / 2 + MARKER_PAD) * fig.dpi / 72
    centres = ax.transData.transform(xy)
    return [Bbox.from_extents(x - half, y - half, x + half, y + half) for x, y in centres]


class Placer:
    """Keeps the boxes already taken on one map and places new artists around them."""

    def __init__(self, ax: Axes, taken: Sequence[Bbox] = ()) -> None:
        fig = ax.figure
        assert isinstance(fig, Figure)  # briefing maps are drawn on whole figures
        canvas = fig.canvas
        if not isinstance(canvas, FigureCanvasAgg):
            canvas = FigureCanvasAgg(fig)  # a renderer to measure text with; the PDF is drawn later
        self.ax = ax
        self.figure = fig
        self.renderer = canvas.get_renderer()
        inner = ax.get_window_extent(self.renderer)
        self.frame = Bbox.from_extents(inner.x0 + 2, inner.y0 + 2, inner.x1 - 2, inner.y1 - 2)
        self.taken: list[Bbox] = list(taken)

    def free(self, box: Bbox) -> bool:
        """True when ``box`` lies inside the map and overlaps nothing taken."""
        inside = (
            box.x0 >= self.frame.x0
            and box.y0 >= self.frame.y0
            and box.x1 <= self.frame.x1
            and box.y1 <= self.frame.y1
        )
        return inside and not any(box.overlaps(t) for t in self.taken)

    def text(
        self,
        x: float,
        y: float,
        text: str,
        offsets: Sequence[tuple[float, float]] = ((0.0, 0.0),),
        *,
        gid: str,
        halo: float = 2.6,
        ha: str | None = None,
        va: str | None = None,
        **kwargs,
    ) -> bool:
        """Write ``text`` at the first offset (points) where it fits; False if none does.

        Without ``ha``/``va`` the text is anchored on the side facing its point,
        so that it grows away from the point in the offset's direction.
        """
        ax = self.ax
        for dx, dy in offsets:
            transform = offset_copy(ax.transData, fig=self.figure, x=dx, y=dy, units="points")
            h = ha or ("left" if dx > 0 else "right" if dx < 0 else "center")
            v = va or ("bottom" if dy > 0 else "top" if dy < 0 else "center")
            probe = ax.text(x, y, text, transform=transform, ha=h, va=v, **kwargs)
            box = probe.get_window_extent(self.renderer)
            probe.remove()
            if self.free(box):
                n_before = len(ax.texts)
                halo_text(ax, x, y, text, transform=transform, ha=h, va=v, halo=halo, **kwargs)
                for artist in ax.texts[n_before:]:
                    artist.set_gid(gid)
                self.taken.append(box)
                return True
        return False

    def furniture(self, candidates: Sequence[C], draw: Callable[[C], object], gid: str) -> bool:
        """Draw furniture at the first candidate where all it draws fits; False if none fits.

        ``draw(candidate)`` adds artists to the axes; they are measured and, when
        they overlap something taken or leave the map, removed again.
        """
        ax = self.ax
        for candidate in candidates:
            before = set(map(id, ax.get_children()))
            draw(candidate)
            added = [a for a in ax.get_children() if id(a) not in before]
            boxes = [artist_box(a, self.renderer) for a in added]
            if all(self.free(b) for b in boxes):
                for a in added:
                    a.set_gid(gid)
                self.taken.extend(boxes)
                return True
            for a in added:
                a.remove()
        return False
