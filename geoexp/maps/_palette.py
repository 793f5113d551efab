"""One look per exposure condition, shared by every map geoexp draws.

Colours come from the Okabe–Ito palette (Okabe & Ito, 2008, *Color Universal
Design*), chosen so that the common forms of colour blindness still tell them
apart. Colour alone is not enough on a black-and-white printout, so each
condition also has its own line width and dash pattern: treated units are the
thickest solid lines, spillover bands get thinner and more broken with
distance, pure controls are thin and solid. The same style serves the web map
(``dash_array``) and matplotlib (``mpl_linestyle``).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Literal

from geoexp.errors import InputError

# Okabe & Ito (2008): the eight colours of their colour-universal palette.
OKABE_ITO: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}

_SPILLOVER = re.compile(r"spillover_([1-9][0-9]*)")

# Band k (1-based) of the spillover: colour, width (px / pt) and dash pattern.
# Widths fall and gaps grow with distance, so the order reads in grey too.
_BAND_LOOKS: tuple[tuple[str, float, tuple[float, ...]], ...] = (
    (OKABE_ITO["orange"], 4.0, (9.0, 4.0)),
    (OKABE_ITO["sky_blue"], 3.0, (4.0, 4.0)),
    (OKABE_ITO["reddish_purple"], 2.5, (9.0, 3.0, 2.0, 3.0)),
    (OKABE_ITO["yellow"], 2.5, (2.0, 3.0)),
    (OKABE_ITO["black"], 2.0, (9.0, 3.0, 2.0, 3.0, 2.0, 3.0)),
)


@dataclass(frozen=True)
class ConditionStyle:
    """How one condition is drawn.

    Attributes
    ----------
    code : str
        Condition code (``"treated"``, ``"spillover_1"``, ..., ``"pure_control"``,
        or ``"eligible"`` for the eligibility halo).
    colour : str
        Hex colour from the Okabe–Ito palette.
    width : float
        Line width, in CSS pixels on the web map and points in matplotlib.
    dash : tuple of float
        On/off dash lengths in the same unit as ``width``; empty for a solid line.
    opacity : float
        Stroke opacity.
    """

    code: str
    colour: str
    width: float
    dash: tuple[float, ...] = ()
    opacity: float = 1.0

    @property
    def dash_array(self) -> str | None:
        """Dash pattern as an SVG ``stroke-dasharray`` string, or None for solid."""
        return " ".join(f"{d:g}" for d in self.dash) if self.dash else None

    @property
    def mpl_linestyle(self) -> Literal["solid"] | tuple[float, tuple[float, ...]]:
        """Dash pattern as a matplotlib linestyle (``"solid"`` or ``(0, dashes)``).

        matplotlib scales dashes by the line width, so the lengths are divided
        by it to keep the printed pattern the same as on screen.
        """
        if not self.dash:
            return "solid"
        return (0.0, tuple(d / self.width for d in self.dash))


def condition_style(code: str) -> ConditionStyle:
    """Return the colour, width and dash pattern geoexp uses for a condition.

    Parameters
    ----------
    code : str
        ``"treated"``, ``"spillover_<k>"`` (k = 1, 2, ...: band k counted
        outwards from the treated units), ``"pure_control"``, or
        ``"eligible"`` (the broad translucent halo marking eligible units).

    Returns
    -------
    ConditionStyle
        Colours from Okabe & Ito (2008); widths and dashes chosen so that no two
        conditions of a design with up to five spillover bands look alike in
        grey.

    Raises
    ------
    InputError
        If the code is not a condition code.
    """
    if code == "treated":
        return ConditionStyle(code, OKABE_ITO["vermillion"], 6.0)
    if code == "pure_control":
        return ConditionStyle(code, OKABE_ITO["blue"], 1.5)
    if code == "eligible":
        return ConditionStyle(code, OKABE_ITO["bluish_green"], 11.0, opacity=0.35)
    match = _SPILLOVER.fullmatch(code) if isinstance(code, str) else None
    if match is None:
        raise InputError(
            f"unknown condition code {code!r}; expected 'treated', 'spillover_<k>' (k >= 1), "
            "'pure_control' or 'eligible'"
        )
    k = int(match.group(1))
    colour, width, dash = _BAND_LOOKS[min(k, len(_BAND_LOOKS)) - 1]
    if k > len(_BAND_LOOKS):
        # Beyond five bands the look repeats the last one but ever thinner, so
        # bands stay ordered by width even if they share a dash pattern.
        width = max(0.75, width - 0.25 * (k - len(_BAND_LOOKS)))
    return ConditionStyle(code, colour, width, dash)


def condition_order(codes) -> list[str]:
    """Sort condition codes as maps list them: treated, spillover bands outwards, pure control.

    Parameters
    ----------
    codes : iterable of str
        Condition codes, repeats allowed.

    Returns
    -------
    list of str
        Each code once: ``"treated"``, then ``"spillover_<k>"`` by increasing k,
        then ``"pure_control"``, then any other code.
    """

    def key(code: str) -> tuple[int, int]:
        if code == "treated":
            return (0, 0)
        m = _SPILLOVER.fullmatch(code)
        if m:
            return (1, int(m.group(1)))
        return (2, 0) if code == "pure_control" else (3, 0)

    return sorted(set(codes), key=key)
