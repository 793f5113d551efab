"""Is the street network a design measures along plausible? Checked before a trial is drawn.

A street layer whose lines are not split where streets cross gives
along-street distances that are far too long or missing, and nothing in the
numbers themselves looks wrong. :func:`network_check` runs
:func:`geoexp.graph.network_diagnostics` on a design that measures along
streets; :func:`refuse_sparse_network` stops a draw when the along-street
graph is implausibly sparser than the straight-line one, unless the spec says
``[exposure] accept_sparse_network = true``.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from geoexp.errors import DesignError
from geoexp.graph import NetworkDiagnostics, network_diagnostics

if TYPE_CHECKING:
    from geoexp.design._design import Design

__all__ = ["network_check", "refuse_sparse_network"]


def network_check(design: Design) -> NetworkDiagnostics | None:
    """The street network's diagnostics within the outer band, or None for straight lines.

    Parameters
    ----------
    design : Design
        A design; only one whose ``[exposure] metric`` is ``"network"`` is diagnosed.

    Returns
    -------
    geoexp.graph.NetworkDiagnostics or None
        Connected components, units with no neighbour within the outer band,
        along-street against straight-line pairs, crossings found.
    """
    x = design.spec.exposure
    if x.metric != "network":
        return None
    return network_diagnostics(
        design.units,
        design.mapping.reach,
        snap_tolerance=x.snap_tolerance_m,
        split_at_crossings=x.split_at_crossings,
        bridge_column=x.bridge_column,
        graph=design.graph,
    )


def refuse_sparse_network(design: Design, diagnostics: NetworkDiagnostics | None) -> None:
    """Refuse to draw over an implausibly sparse along-street graph, unless the spec accepts it.

    Parameters
    ----------
    design : Design
        The design about to be drawn; its spec says whether a sparse network
        is accepted.
    diagnostics : NetworkDiagnostics or None
        The along-street graph's diagnostics; None (no along-street distances)
        passes.

    Raises
    ------
    geoexp.errors.DesignError
        The along-street pairs within the outer band are fewer than a quarter
        of the straight-line ones and ``[exposure] accept_sparse_network`` is
        not true.
    """
    if diagnostics is None or not diagnostics.sparse:
        return
    if design.spec.exposure.accept_sparse_network:
        return
    info = diagnostics.network
    fix = (
        "set [exposure] split_at_crossings = true (and mark bridges and tunnels with bridge_column)"
        if not info.split_at_crossings and info.away_from_ends
        else "check the layer for gaps where streets should meet, or raise snap_tolerance_m"
    )
    raise DesignError(
        f"the street network of '{design.units.source}' is implausibly sparse: "
        f"{diagnostics.network_pairs:,} pairs of segments lie within "
        f"{diagnostics.max_distance:g} m along streets against {diagnostics.straight_pairs:,} in "
        f"a straight line ({diagnostics.ratio:.0%}); {len(diagnostics.isolated):,} of "
        f"{diagnostics.n_units:,} segments have no neighbour along streets. "
        f"{info.describe()} To fix it, {fix}; to draw anyway, knowing the along-street "
        "distances are what the layer gives, set [exposure] accept_sparse_network = true "
        "(recorded in the trial)."
    )
