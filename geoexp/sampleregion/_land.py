"""The sample city's districts, parcels, land use and invented incidents."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from geoexp.sampleregion._settings import (
    _DISTRICTS,
    _TYPE_MIX,
    _USE_RISK,
    CRS,
    INCIDENT_TYPES,
    LAND_USES,
    SNAP_DISTANCE_M,
)
from geoexp.sampleregion._streets import (
    _Layout,
    _to_world,
)


def _districts(
    layout: _Layout, segments: gpd.GeoDataFrame, rng: np.random.Generator
) -> gpd.GeoDataFrame:
    hull = shapely.buffer(shapely.convex_hull(shapely.union_all(segments.geometry.values)), 40.0)
    names, seeds = [], []
    for row in range(3):
        for col in range(3):
            name = _DISTRICTS[row][col]
            if name is not None:
                names.append(name)
                seeds.append(layout.seeds_local[row * 3 + col])
    pts = shapely.multipoints(_to_world(np.array(seeds)))
    cells = shapely.get_parts(shapely.voronoi_polygons(pts, extend_to=hull, ordered=True))
    polys = shapely.intersection(cells, hull)
    return gpd.GeoDataFrame({"district": names}, geometry=polys, crs=CRS)


def _district_of(points: gpd.GeoSeries, districts: gpd.GeoDataFrame) -> np.ndarray:
    tree = shapely.STRtree(districts.geometry.values)
    # nearest polygon: distance 0 for points inside; ties on a shared border go
    # to the lower-numbered district
    idx = tree.query_nearest(np.asarray(points.values), all_matches=True)
    order = np.lexsort((idx[1], idx[0]))
    pi, di = idx[0][order], idx[1][order]
    keep = np.concatenate([[True], pi[1:] != pi[:-1]])
    out = np.empty(len(points), dtype=object)
    out[pi[keep]] = districts["district"].to_numpy()[di[keep]]
    return out


def _parcels(
    layout: _Layout, rng: np.random.Generator, carve: shapely.Geometry
) -> gpd.GeoDataFrame:
    nx, ny = layout.nx, layout.ny
    xy = layout.xy.reshape(ny, nx, 2)
    c00, c10 = xy[:-1, :-1], xy[:-1, 1:]
    c01, c11 = xy[1:, :-1], xy[1:, 1:]
    ci, cj = np.meshgrid(np.arange(nx - 1), np.arange(ny - 1))
    inside = layout.inside.reshape(ny, nx)
    cell_ok = (inside[:-1, :-1] & inside[:-1, 1:] & inside[1:, :-1] & inside[1:, 1:]).ravel()
    c00, c10, c01, c11 = (c.reshape(-1, 2)[cell_ok] for c in (c00, c10, c01, c11))
    ci, cj = ci.ravel()[cell_ok], cj.ravel()[cell_ok]
    width = 0.5 * (np.hypot(*(c10 - c00).T) + np.hypot(*(c11 - c01).T))
    height = 0.5 * (np.hypot(*(c01 - c00).T) + np.hypot(*(c11 - c10).T))
    centre = 0.25 * (c00 + c10 + c01 + c11)
    n_cell = len(ci)

    # Block land use: downtown and the avenue commercial/mixed, the rail side
    # industrial, a few whole blocks of park, houses elsewhere.
    cpts = shapely.points(centre)
    avenue = shapely.linestrings(layout.avenue)
    d_centre = np.hypot(*(centre - layout.centre).T)
    d_avenue = shapely.distance(cpts, avenue)
    d_rail = shapely.distance(cpts, layout.rail)
    p = np.tile([0.82, 0.06, 0.10, 0.02, 0.0], (n_cell, 1))
    p[d_rail < 220] = [0.35, 0.05, 0.10, 0.50, 0.0]
    p[d_avenue < 90] = [0.25, 0.40, 0.30, 0.05, 0.0]
    p[d_centre < 650] = [0.10, 0.50, 0.38, 0.02, 0.0]
    block_use = (rng.random(n_cell)[:, None] > np.cumsum(p, axis=1)).sum(axis=1)
    block_use = np.minimum(block_use, 3)
    block_use[rng.random(n_cell) < 0.04] = 4

    # Sub-divide each block bilinearly, 2-3 parcels per side, fronting the long sides.
    wide = width >= height
    n_long = np.where(np.maximum(width, height) > 115.0, 3, 2)
    nu = np.where(wide, n_long, 2)
    nv = np.where(wide, 2, n_long)
    park = block_use == 4
    nu[park] = 1
    nv[park] = 1
    parts = []
    for cu in (1, 2, 3):
        for cv in (1, 2, 3):
            sel = np.flatnonzero((nu == cu) & (nv == cv))
            if len(sel) == 0:
                continue
            grid_u, grid_v = np.meshgrid(np.arange(cu), np.arange(cv))
            uu, vv = grid_u.ravel(), grid_v.ravel()
            cell = np.repeat(sel, len(uu))
            u = np.tile(uu, len(sel))
            v = np.tile(vv, len(sel))
            corners = []
            for du, dv in ((0, 0), (1, 0), (1, 1), (0, 1), (0, 0)):
                s, t = ((u + du) / cu)[:, None], ((v + dv) / cv)[:, None]
                corners.append(
                    (1 - s) * (1 - t) * c00[cell]
                    + s * (1 - t) * c10[cell]
                    + s * t * c11[cell]
                    + (1 - s) * t * c01[cell]
                )
            parts.append((cell, u, v, np.stack(corners, axis=1)))
    cell = np.concatenate([q[0] for q in parts])
    u = np.concatenate([q[1] for q in parts])
    v = np.concatenate([q[2] for q in parts])
    quads = shapely.polygons(np.concatenate([q[3] for q in parts]))
    blocks = shapely.polygons(np.stack([c00, c10, c11, c01, c00], axis=1))
    # parcels stop 6 m short of the street centre lines
    inset = shapely.buffer(blocks, -6.0, join_style="mitre")
    shapes = shapely.intersection(quads, inset[cell])
    shapely.prepare(carve)
    cut = shapely.intersects(shapes, carve)
    shapes[cut] = shapely.difference(shapes[cut], carve)
    # keep the largest piece of a parcel the avenue cut in two
    parts_geom, part_of = shapely.get_parts(shapes, return_index=True)
    area = shapely.area(parts_geom)
    o = np.lexsort((-area, part_of))
    lead = o[np.concatenate([[True], part_of[o][1:] != part_of[o][:-1]])]
    parcel_geom = np.full(len(shapes), None, dtype=object)
    parcel_geom[part_of[lead]] = parts_geom[lead]
    ok = np.array([gm is not None for gm in parcel_geom]) & (
        shapely.area(parcel_geom.astype(object)) >= 150.0
    )

    # land use: mostly the block's, with a mix; river banks are parkland
    use = block_use[cell].copy()
    swap = rng.random(len(use)) < 0.12
    use[swap] = rng.choice(4, size=int(swap.sum()), p=[0.55, 0.2, 0.2, 0.05])
    use[park[cell]] = 4
    bank = shapely.dwithin(parcel_geom, layout.river, 35.0)
    use[bank] = 4

    # Addresses: hundreds by block along the fronting street, odd and even sides.
    w = wide[cell]
    front_street = np.where(
        w,
        layout.nx + cj[cell] + (v == nv[cell] - 1) * (nv[cell] > 1),
        ci[cell] + (u == nu[cell] - 1) * (nu[cell] > 1),
    )
    along = np.where(w, ci[cell], cj[cell])
    k = np.where(w, u, v)
    far_side = np.where(w, v == nv[cell] - 1, u == nu[cell] - 1) & np.where(
        w, nv[cell] > 1, nu[cell] > 1
    )
    number = 100 * (along + 1) + 4 * k + np.where(far_side, 2, 1)
    names = np.array(layout.street_names, dtype=object)
    address = np.char.add(np.char.add(number.astype(str), " "), names[front_street].astype(str))

    # number parcels block by block, then along and across the block
    keep = np.lexsort((u, v, cell))
    keep = keep[ok[keep]]
    frame = gpd.GeoDataFrame(
        {
            "parcel_id": [f"P{k_:05d}" for k_ in range(1, len(keep) + 1)],
            "land_use": np.array(LAND_USES, dtype=object)[use[keep]],
            "address": address[keep].astype(object),
        },
        geometry=parcel_geom[keep],
        crs=CRS,
    )
    return frame


def _segment_land_use(segments: gpd.GeoDataFrame, parcels: gpd.GeoDataFrame) -> np.ndarray:
    """Dominant land use of the parcels along each segment (nearest parcel if none)."""
    band = shapely.buffer(segments.geometry.values, 14.0, cap_style="flat")
    tree = shapely.STRtree(parcels.geometry.values)
    si, pi = tree.query(band, predicate="intersects")
    use_idx = pd.Categorical(parcels["land_use"], categories=LAND_USES).codes
    counts = np.zeros((len(segments), len(LAND_USES)))
    np.add.at(counts, (si, use_idx[pi]), 1.0)
    best = np.argmax(counts, axis=1)  # ties go to the earlier use in LAND_USES
    none = counts.sum(axis=1) == 0
    if none.any():
        near = tree.query_nearest(segments.geometry.values[none], all_matches=False)
        best[np.flatnonzero(none)[near[0]]] = use_idx[near[1]]
    return np.array(LAND_USES, dtype=object)[best]


# ----------------------------------------------------------------------------
# incidents


def _days(rng: np.random.Generator, year: int, n: int) -> np.ndarray:
    start = np.datetime64(f"{year}-01-01")
    n_days = int((np.datetime64(f"{year + 1}-01-01") - start).astype(int))
    doy = np.arange(n_days)
    # mild seasonality (about +-15%), peaking in July
    w = 1.0 + 0.15 * np.sin(2 * np.pi * (doy - 105) / 365.25)
    return start + rng.choice(n_days, size=n, p=w / w.sum())


def _incidents(
    segments: gpd.GeoDataFrame,
    parcels: gpd.GeoDataFrame,
    layout: _Layout,
    rng: np.random.Generator,
    per_year: float = 8000.0,
) -> tuple[gpd.GeoDataFrame, np.ndarray, np.ndarray]:
    geom = segments.geometry.values
    length = segments["length_m"].to_numpy()
    use = pd.Categorical(segments["land_use"], categories=LAND_USES).codes
    # Law of crime concentration: about half of all incidents on about 5% of
    # segments (Weisburd 2015, Criminology 53(2)) -- common practice. A
    # gamma-Poisson mixture gives it: each segment's risk is Gamma(shape 0.17)
    # times a length and land-use factor. The SAME risk drives both years, with
    # only a mild year-to-year wobble (Gamma(25) multipliers, CV 0.2), so hot
    # spots are stable across the two years.
    risk = rng.gamma(0.17, 1.0, len(geom)) * (length / length.mean()) ** 0.7 * _USE_RISK[use]
    # Hot spots cluster around a few invented activity centres (a smooth field of
    # Gaussian bumps, about 500 m across), so nearby segments are alike, as in
    # real cities: risk is up to e^1.5 (about 4.5) times higher at a centre, fading
    # with distance. Top 5% of segments then hold about 54% of incidents.
    mid = shapely.get_coordinates(shapely.line_interpolate_point(geom, 0.5, normalized=True))
    lo, hi = mid.min(axis=0), mid.max(axis=0)
    centres = lo + rng.uniform(0.1, 0.9, (6, 2)) * (hi - lo)
    d2 = ((mid[:, None, :] - centres[None, :, :]) ** 2).sum(axis=2)
    risk *= np.exp(1.5 * np.exp(-d2 / (2 * 500.0**2)).sum(axis=1))
    risk *= per_year / risk.sum()
    counts = [rng.poisson(risk * rng.gamma(25.0, 1 / 25.0, len(geom))) for _ in range(2)]

    seg_of = np.concatenate([np.repeat(np.arange(len(geom)), c) for c in counts])
    year = np.concatenate(
        [np.full(int(c.sum()), y) for c, y in zip(counts, (2024, 2025), strict=True)]
    )
    n_on = len(seg_of)
    frac = rng.uniform(0.05, 0.95, n_on)
    g = geom[seg_of]
    here = shapely.get_coordinates(shapely.line_interpolate_point(g, frac, normalized=True))
    ahead = shapely.get_coordinates(
        shapely.line_interpolate_point(g, np.minimum(frac + 0.01, 1.0), normalized=True)
    )
    behind = shapely.get_coordinates(
        shapely.line_interpolate_point(g, np.maximum(frac - 0.01, 0.0), normalized=True)
    )
    tangent = ahead - behind
    tangent /= np.hypot(tangent[:, 0], tangent[:, 1])[:, None]
    normal = np.stack([-tangent[:, 1], tangent[:, 0]], axis=1)
    offset = rng.uniform(0.0, 12.0, n_on) * rng.choice([-1.0, 1.0], n_on)
    on_xy = here + offset[:, None] * normal

    # About 1% off the network, in parks and on the river banks, more than 40 m
    # from any street: these fall outside a 30 m snapping tolerance.
    n_off = round(0.01 * n_on)
    tree = shapely.STRtree(geom)
    xmin, ymin, xmax, ymax = shapely.total_bounds(geom)
    cand = np.stack(
        [rng.uniform(xmin, xmax, 60 * n_off), rng.uniform(ymin, ymax, 60 * n_off)], axis=1
    )
    cpts = shapely.points(cand)
    parks = shapely.union_all(parcels.geometry.values[parcels["land_use"].to_numpy() == "park"])
    bank = shapely.difference(shapely.buffer(layout.river, 45.0), layout.river)
    hull = shapely.convex_hull(shapely.union_all(geom))
    zone = shapely.intersection(shapely.union_all([parks, bank]), hull)
    shapely.prepare(zone)
    _, dist = tree.query_nearest(cpts, return_distance=True, all_matches=False)
    good = shapely.contains_xy(zone, cand[:, 0], cand[:, 1]) & (dist > 40.0)
    off_xy = cand[good][:n_off]
    n_off = len(off_xy)
    off_year = rng.choice([2024, 2025], n_off)

    xy = np.concatenate([on_xy, off_xy])
    year = np.concatenate([year, off_year])
    inc_use = np.concatenate([use[seg_of], np.full(n_off, LAND_USES.index("park"))])
    pts = shapely.points(xy)

    # Drop the rare point equidistant (to a micrometre) from two segments, so
    # that nearest-segment snapping is unambiguous on every machine.
    near_idx, near_d = tree.query_nearest(
        pts, max_distance=SNAP_DISTANCE_M, return_distance=True, all_matches=True
    )
    pi, si = near_idx
    best = np.full(len(xy), np.inf)
    np.minimum.at(best, pi, near_d)
    close = tree.query(pts, predicate="dwithin", distance=np.where(np.isinf(best), 0, best + 1e-6))
    n_close = np.bincount(close[0], minlength=len(xy))
    unique = np.isinf(best) | (n_close == 1)
    nearest = np.full(len(xy), -1)
    nearest[pi] = si

    keep = np.flatnonzero(unique)
    xy, year, inc_use, nearest = xy[keep], year[keep], inc_use[keep], nearest[keep]
    dates = np.empty(len(xy), dtype="datetime64[D]")
    for y in (2024, 2025):
        sel = year == y
        dates[sel] = _days(rng, y, int(sel.sum()))
    cum = np.cumsum(_TYPE_MIX, axis=1)
    kind = (rng.random(len(xy))[:, None] > cum[inc_use]).sum(axis=1)
    kind = np.minimum(kind, len(INCIDENT_TYPES) - 1)

    order = np.argsort(dates, kind="stable")
    xy, year, nearest, dates, kind = (
        xy[order],
        year[order],
        nearest[order],
        dates[order],
        kind[order],
    )
    incidents = gpd.GeoDataFrame(
        {
            "incident_id": [f"I{k:06d}" for k in range(1, len(xy) + 1)],
            "date": dates.astype("datetime64[ns]"),
            "incident_type": np.array(INCIDENT_TYPES, dtype=object)[kind],
        },
        geometry=shapely.points(xy),
        crs=CRS,
    )
    snapped = nearest >= 0
    y1 = np.bincount(nearest[snapped & (year == 2024)], minlength=len(geom))
    y2 = np.bincount(nearest[snapped & (year == 2025)], minlength=len(geom))
    return incidents, y1.astype(np.int64), y2.astype(np.int64)


# ----------------------------------------------------------------------------
# one shape for generated and loaded data
