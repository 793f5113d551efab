"""Streets that meet away from their end points: find the meetings, and node the network there.

A street layer exported with one long line per street has streets that cross
or touch without sharing an end point. Built from end points alone, such a
network misses those junctions: along-street distances come out far too long
or missing, silently. This module

* finds every point where two lines meet (shapely 2 ``STRtree`` query with the
  ``intersects`` predicate, then ``shapely.intersection``) and sorts it into
  a *shared end* (within the snap tolerance of an end point of both lines, the
  junctions the end-point network already has), a *touch* (within the
  tolerance of an end point of one line only: a T-junction) or a *crossing*
  (away from the end points of both);
* optionally adds the crossings and touches as nodes inside the lines. The
  unit stays the same line: it is cut into pieces at its nodes, the shortest
  walks are measured between pieces, and a unit's distance to another is the
  smallest over their pieces, which is the shortest walk between any node on
  one and any node on the other (0 when they share a node).

Grade-separated lines (bridges, tunnels, flyovers) are marked by the caller. A
crossing is joined unless either line is marked; a touch is joined when the
marked line (if any) is the one whose end point is there (a ramp landing on a
street), not when a line ends on the middle of a marked one (a street passing
under a bridge).
"""

from __future__ import annotations

import warnings
from dataclasses import asdict, dataclass

import numpy as np
import shapely

from geoexp._engine import Engine
from geoexp.graph import _network

# Warn when at least this share of the points where lines meet lies away from
# the end points of one of them and the network is not noded there.
MANY_SHARE = 0.05


class NetworkWarning(UserWarning):
    """The street network as given is likely to give wrong along-street distances."""


@dataclass(frozen=True)
class NetworkInfo:
    """How the street network was formed, for the record of a trial.

    Attributes
    ----------
    split_at_crossings : bool
        Whether crossings and touches away from end points were made nodes.
    snap_tolerance_m : float
        End points (and meeting points) closer than this many metres are one node.
    shared_ends : int
        Points where two lines meet at an end point of both (always junctions).
    crossings : int
        Points where two lines cross away from the end points of both.
    touches : int
        Points where the end point of one line meets the middle of another
        (T-junctions).
    overlaps : int
        Pairs of lines that run along each other for a stretch (their
        overlap's end points are counted as crossings or touches).
    grade_separated_units : int
        Lines marked as bridges, tunnels or flyovers.
    kept_apart : int
        Crossings and touches not joined because a marked line passes there.
    nodes_added : int
        Nodes added inside lines (0 unless ``split_at_crossings``).
    """

    split_at_crossings: bool
    snap_tolerance_m: float
    shared_ends: int
    crossings: int
    touches: int
    overlaps: int
    grade_separated_units: int
    kept_apart: int
    nodes_added: int

    @property
    def away_from_ends(self) -> int:
        """Crossings and touches that could be joined (not kept apart by a mark)."""
        return self.crossings + self.touches - self.kept_apart

    @property
    def meetings(self) -> int:
        """All points where two lines meet."""
        return self.shared_ends + self.crossings + self.touches

    @property
    def many_away(self) -> bool:
        """True when joinable meetings away from end points are a large share (MANY_SHARE)."""
        return self.away_from_ends > 0 and self.away_from_ends >= MANY_SHARE * self.meetings

    def to_dict(self) -> dict:
        """Plain values for a trial file or a JSON record."""
        return asdict(self)

    def describe(self) -> str:
        """One or two plain sentences on how the network was formed."""
        found = (
            f"Street network: {self.meetings:,} points where lines meet: {self.shared_ends:,} at "
            f"shared end points, {self.crossings:,} crossings and {self.touches:,} T-junction "
            "touches away from end points"
        )
        if self.overlaps:
            found += f" ({self.overlaps:,} pairs of lines overlap for a stretch)"
        found += "."
        if self.grade_separated_units:
            found += (
                f" {self.grade_separated_units:,} lines are marked grade-separated; "
                f"{self.kept_apart:,} of their crossings and touches are not joined."
            )
        if self.split_at_crossings:
            return found + (
                f" The lines were split where they cross or touch ({self.nodes_added:,} nodes "
                f"added inside lines; end points within {self.snap_tolerance_m:g} m joined)."
            )
        return found + (
            " Only end points are junctions (end points within "
            f"{self.snap_tolerance_m:g} m joined); lines were not split where they cross or touch."
        )


@dataclass(frozen=True)
class Meetings:
    """Meeting points found in a layer, and the nodes to add inside lines."""

    info: NetworkInfo
    node_line: np.ndarray  # (k,) line of each node to add, ascending
    node_xy: np.ndarray  # (k, 2) its coordinates


def grade_flags(values, n: int) -> np.ndarray:
    """Boolean marks from ``None``, booleans or levels (non-zero level = grade-separated)."""
    if values is None:
        return np.zeros(n, dtype=bool)
    arr = np.asarray(values)
    if arr.shape != (n,):
        raise ValueError(f"grade_separated must hold one value per unit ({n}), got {arr.shape}")
    if arr.dtype == bool:
        return arr.copy()
    return arr.astype(np.float64) != 0


def find_meetings(
    geoms: np.ndarray, scale: float, snap_tolerance: float, grade_separated: np.ndarray
) -> Meetings:
    """Sort every point where two lines meet into shared ends, touches and crossings.

    ``geoms`` are single lines in CRS units; ``scale`` metres per CRS unit;
    ``snap_tolerance`` metres; ``grade_separated`` a boolean mark per line.
    """
    n = len(geoms)
    tol = snap_tolerance / scale
    empty = np.empty(0, dtype=np.int64)
    if n < 2:
        info = NetworkInfo(False, snap_tolerance, 0, 0, 0, 0, int(grade_separated.sum()), 0, 0)
        return Meetings(info, empty, np.empty((0, 2)))
    tree = shapely.STRtree(geoms)
    a, b = tree.query(geoms, predicate="intersects")
    keep = a < b
    a, b = a[keep], b[keep]
    start = shapely.get_coordinates(shapely.get_point(geoms, 0))
    stop = shapely.get_coordinates(shapely.get_point(geoms, -1))
    fast, fast_xy = _shared_end_only(geoms, a, b, start, stop)
    slow = np.flatnonzero(~fast)
    meet = shapely.intersection(geoms[a[slow]], geoms[b[slow]])
    parts, owner = shapely.get_parts(meet, return_index=True)
    parts, second = shapely.get_parts(parts, return_index=True)
    owner = slow[owner[second]]
    kind = shapely.get_type_id(parts)
    linear = kind != 0
    overlaps = int(np.unique(owner[linear]).size)
    if linear.any():
        # A stretch of overlap meets the network at its two ends.
        ends, which = shapely.get_parts(shapely.boundary(parts[linear]), return_index=True)
        points = np.concatenate([parts[~linear], ends])
        owner = np.concatenate([owner[~linear], owner[linear][which]])
    else:
        points = parts
    xy = shapely.get_coordinates(points)
    # Distinct points per pair (an overlap's end may repeat a crossing).
    pair = np.column_stack([owner, xy])
    if len(pair):
        pair = np.unique(pair, axis=0)
    owner = np.concatenate([np.flatnonzero(fast), pair[:, 0].astype(np.int64)])
    xy = np.concatenate([fast_xy, pair[:, 1:]])
    la, lb = a[owner], b[owner]

    def near_end(line: np.ndarray) -> np.ndarray:
        d0 = np.hypot(*(xy - start[line]).T)
        d1 = np.hypot(*(xy - stop[line]).T)
        return np.minimum(d0, d1) <= tol

    end_a, end_b = near_end(la), near_end(lb)
    shared = end_a & end_b
    crossing = ~end_a & ~end_b
    touch = end_a ^ end_b
    mark_a, mark_b = grade_separated[la], grade_separated[lb]
    # A crossing joins unless either line is marked; a touch joins unless the
    # line whose middle is touched is marked.
    apart = (crossing & (mark_a | mark_b)) | (touch & ((~end_a & mark_a) | (~end_b & mark_b)))
    join = (crossing | touch) & ~apart
    # A joined point becomes a node inside each line whose end point is not there.
    on_a = join & ~end_a
    on_b = join & ~end_b
    node_line = np.concatenate([la[on_a], lb[on_b]])
    node_xy = np.concatenate([xy[on_a], xy[on_b]])
    if len(node_line):
        rows = np.unique(np.column_stack([node_line, node_xy]), axis=0)
        node_line, node_xy = rows[:, 0].astype(np.int64), rows[:, 1:]
    info = NetworkInfo(
        split_at_crossings=False,
        snap_tolerance_m=float(snap_tolerance),
        shared_ends=int(shared.sum()),
        crossings=int(crossing.sum()),
        touches=int(touch.sum()),
        overlaps=overlaps,
        grade_separated_units=int(grade_separated.sum()),
        kept_apart=int(apart.sum()),
        nodes_added=0,
    )
    return Meetings(info, node_line, node_xy)


def _shared_end_only(geoms, a, b, start, stop) -> tuple[np.ndarray, np.ndarray]:
    """Pairs of straight segments that meet only at one shared end point, and that point.

    Most pairs of a layer split at junctions are such; they need no GEOS
    intersection. Two straight segments with exactly one common end point P
    meet elsewhere only when they overlap: other ends A and B on the same ray
    from P (cross product 0, dot product > 0).
    """
    count = shapely.get_num_coordinates(geoms)
    straight = (count[a] == 2) & (count[b] == 2)
    sa, ea, sb, eb = start[a], stop[a], start[b], stop[b]
    ss = (sa == sb).all(axis=1)
    se = (sa == eb).all(axis=1)
    es = (ea == sb).all(axis=1)
    ee = (ea == eb).all(axis=1)
    one = (ss.astype(np.int8) + se + es + ee) == 1
    at_start_a = ss | se
    p = np.where(at_start_a[:, None], sa, ea)
    u = np.where(at_start_a[:, None], ea, sa) - p
    v = np.where((ss | es)[:, None], eb, sb) - p
    cross = u[:, 0] * v[:, 1] - u[:, 1] * v[:, 0]
    dot = (u * v).sum(axis=1)
    fast = straight & one & ~((cross == 0) & (dot > 0))
    return fast, p[fast]


def split_lines(
    geoms: np.ndarray, node_line: np.ndarray, node_xy: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Cut lines at nodes inside them: ``(pieces, line of each piece)``, pieces in line order.

    Each node ends one piece and starts the next with its exact coordinates,
    so pieces of lines that cross there share that point exactly.
    """
    n = len(geoms)
    coords, cline = shapely.get_coordinates(geoms, return_index=True)
    step = np.hypot(*np.diff(coords, axis=0).T)
    step[cline[1:] != cline[:-1]] = 0.0
    along = np.concatenate([[0.0], np.cumsum(step)])
    line_start = np.searchsorted(cline, np.arange(n))
    vpos = along - along[line_start[cline]]
    npos = shapely.line_locate_point(geoms[node_line], shapely.points(node_xy))

    line = np.concatenate([cline, node_line])
    pos = np.concatenate([vpos, npos])
    xy = np.concatenate([coords, node_xy])
    is_node = np.concatenate([np.zeros(len(cline), bool), np.ones(len(node_line), bool)])
    order = np.lexsort((is_node, pos, line))
    line, xy, is_node = line[order], xy[order], is_node[order]

    nodes_in_line = np.bincount(node_line, minlength=n)
    piece_offset = np.concatenate([[0], np.cumsum(nodes_in_line + 1)[:-1]])
    before = np.cumsum(is_node) - is_node  # nodes before each record, over all lines
    first_node = np.concatenate([[0], np.cumsum(nodes_in_line)[:-1]])
    piece = piece_offset[line] + before - first_node[line]
    # A node closes one piece and opens the next: write it twice.
    twice = np.repeat(np.arange(len(line)), 1 + is_node)
    second = np.zeros(len(twice), dtype=np.int64)
    second[1:] = twice[1:] == twice[:-1]
    pieces = shapely.linestrings(xy[twice], indices=piece[twice] + second)
    owner = np.repeat(np.arange(n, dtype=np.int64), nodes_in_line + 1)
    return pieces, owner


def noded_pairs(
    geoms: np.ndarray,
    max_distance: float,
    scale: float,
    snap_tolerance: float,
    engine: Engine,
    *,
    split_at_crossings: bool,
    grade_separated: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, NetworkInfo]:
    """Along-street pairs ``(i, j, metres)`` with ``i < j``, and how the network was formed.

    Without ``split_at_crossings`` this is the end-point network of
    :func:`geoexp.graph._network.network_pairs`, unchanged; the meetings away
    from end points are still counted, and a :class:`NetworkWarning` is issued
    when they are many (see ``MANY_SHARE``).
    """
    lines = _network._as_lines(geoms)
    marks = grade_flags(grade_separated, len(lines))
    found = find_meetings(lines, scale, snap_tolerance, marks)
    if not split_at_crossings or not len(found.node_line):
        info = _with(found.info, split_at_crossings, 0)
        if not split_at_crossings and info.many_away:
            warnings.warn(not_noded_warning(info), NetworkWarning, stacklevel=3)
        first, second, dist = _network.network_pairs(
            lines, max_distance, scale, snap_tolerance, engine
        )
        return first, second, dist, info
    info = _with(found.info, True, len(found.node_line))
    pieces, owner = split_lines(lines, found.node_line, found.node_xy)
    pa, pb, pd_ = _network.network_pairs(pieces, max_distance, scale, snap_tolerance, engine)
    ua, ub = owner[pa], owner[pb]
    other = ua != ub
    lo = np.minimum(ua, ub)[other]
    hi = np.maximum(ua, ub)[other]
    d = pd_[other]
    del pa, pb, pd_, ua, ub
    # Shortest over the pieces of both units.
    key = lo * len(lines) + hi
    order = np.lexsort((d, key))
    key, d = key[order], d[order]
    first = np.ones(len(key), dtype=bool)
    first[1:] = key[1:] != key[:-1]
    key, d = key[first], d[first]
    return key // len(lines), key % len(lines), d, info


def pieces_of(
    geoms: np.ndarray,
    scale: float,
    snap_tolerance: float,
    *,
    split_at_crossings: bool,
    grade_separated: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, NetworkInfo]:
    """The edges of the network (pieces of lines), the unit of each, and how it was formed."""
    lines = _network._as_lines(geoms)
    marks = grade_flags(grade_separated, len(lines))
    found = find_meetings(lines, scale, snap_tolerance, marks)
    if not split_at_crossings or not len(found.node_line):
        return (
            lines,
            np.arange(len(lines), dtype=np.int64),
            _with(found.info, split_at_crossings, 0),
        )
    pieces, owner = split_lines(lines, found.node_line, found.node_xy)
    return pieces, owner, _with(found.info, True, len(found.node_line))


def not_noded_warning(info: NetworkInfo) -> str:
    """The loud sentence for a layer whose lines meet away from their end points."""
    share = info.away_from_ends / max(info.meetings, 1)
    apart = (
        f", of which {info.kept_apart:,} on grade-separated lines stay apart"
        if info.kept_apart
        else ""
    )
    return (
        f"{info.away_from_ends:,} of the {info.meetings:,} points where street lines meet "
        f"({share:.0%}) are crossings or T-junction touches away from the lines' end points "
        f"({info.crossings:,} crossings and {info.touches:,} touches in all{apart}), and the "
        "network joins lines only at end points: along-street distances through those "
        "junctions are missing or too long. Split the lines where they cross or touch "
        "(split_at_crossings=True; mark bridges, tunnels and flyovers with a grade-separation "
        "column so that their crossings stay apart), or use the euclidean metric."
    )


def _with(info: NetworkInfo, split: bool, added: int) -> NetworkInfo:
    return NetworkInfo(**{**info.to_dict(), "split_at_crossings": split, "nodes_added": added})
