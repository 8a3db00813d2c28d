"""Verify's own geometry: stand areas and which stands share a boundary.

This is written apart from :mod:`spatialplan.adjacency` on purpose, by a different method,
so that a mistake in the planner's graph shows up as a disagreement instead of hiding.
The rule measured is the documented one: two stands are adjacent when they share more than
``adjacency.min_shared_edge_m`` of boundary, where boundary separated by a digitising gap
of at most ``adjacency.digitising_tolerance_m`` still counts as shared, and a contact at a corner
only counts with ``adjacency.corner_adjacency``.

How the shared length is measured
---------------------------------
The shared length of stands ``a`` and ``b`` is the largest of

* the exact length of the line parts of ``boundary(a) & boundary(b)`` (shapely overlay):
  the shared edge of touching stands, exact on a clean layer;
* the *facing* length: a boundary segment ``s`` of ``a`` faces a segment ``t`` of ``b``
  when ``t`` runs within :data:`MAX_FACING_ANGLE_DEG` of parallel to ``s``; the facing
  part of ``s`` is the part whose perpendicular projection lands on ``t`` no further than
  the gap tolerance. Facing parts are merged per segment of ``a`` and summed, measured
  from ``a``'s side and from ``b``'s side, and the smaller of the two is kept. Across a
  uniform gap this is the length of the edges that face each other. Where two boundaries
  meet at a corner or part at a junction the segments are far from parallel, so a corner
  contact measures 0;
* for stands that overlap, the length of each boundary lying inside the other stand
  (the smaller of the two).

Lengths are in metres: a geographic layer is projected to its UTM zone and a projected
layer in feet (or another unit) is scaled to metres.
"""

from __future__ import annotations

from dataclasses import dataclass

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely
from pyproj import CRS

__all__ = [
    "MAX_FACING_ANGLE_DEG",
    "Neighbours",
    "area_ha",
    "metre_geometry",
    "neighbours",
    "polygons",
]

#: segments closer to parallel than this face each other (digitised copies of one edge
#: rarely differ by more; a boundary turning away at a junction or corner differs by far more)
MAX_FACING_ANGLE_DEG = 15.0
#: gaps are bridged up to at least this (m): digitised coordinates are not finer
MIN_GAP_M = 1e-3


@dataclass(frozen=True, eq=False)
class Neighbours:
    """Adjacent stand pairs measured by verify.

    Attributes
    ----------
    edges
        (m, 2) stand positions ``i < j`` of adjacent pairs, sorted.
    shared_m
        (m,) shared boundary length of each pair (m); 0 for corner contacts counted by
        ``corner_adjacency``.
    """

    edges: np.ndarray
    shared_m: np.ndarray


def _unit_to_metre(crs: CRS) -> float:
    try:
        factor = crs.axis_info[0].unit_conversion_factor
    except (IndexError, AttributeError):
        return 1.0
    return float(factor) if factor else 1.0


def area_ha(geometry: gpd.GeoSeries) -> np.ndarray:
    """Polygon areas in hectares: on the ellipsoid for degrees, planar in metres otherwise.

    Parameters
    ----------
    geometry
        Stand polygons with their CRS (none: coordinates are taken as metres).

    Returns
    -------
    numpy.ndarray
        (n,) areas; 0 for missing geometry.

    Examples
    --------
    >>> area_ha(gpd.GeoSeries([shapely.box(0, 0, 100, 200)], crs="EPSG:32610")).tolist()
    [2.0]
    """
    geoms = np.asarray(geometry.array, dtype=object)
    out = np.zeros(len(geoms))
    ok = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms))
    crs = geometry.crs
    if crs is not None and crs.is_geographic:
        geod = crs.get_geod()
        out[ok] = [abs(geod.geometry_area_perimeter(g)[0]) for g in geoms[ok]]
    else:
        factor = 1.0 if crs is None else _unit_to_metre(CRS.from_user_input(crs))
        out[ok] = shapely.area(geoms[ok]) * factor**2
    return out / 10_000.0


def _polygon_parts(geom: shapely.Geometry) -> shapely.Geometry:
    """The polygons of a repaired geometry or collection (lines and points dropped)."""
    todo, polys = [geom], []
    while todo:
        g = todo.pop()
        if g.geom_type == "Polygon" and g.area > 0:
            polys.append(g)
        elif g.geom_type in ("MultiPolygon", "GeometryCollection"):
            todo.extend(shapely.get_parts(g))
    return shapely.MultiPolygon(polys) if polys else shapely.Polygon()


def polygons(geometry: gpd.GeoSeries, notes: list[str]) -> gpd.GeoSeries:
    """Stand polygons fit to measure: invalid ones repaired, missing ones empty.

    Repairs use :func:`shapely.make_valid` and keep only the polygon parts; every repair is
    counted in ``notes``. The input is not modified.
    """
    geoms = np.asarray(geometry.array, dtype=object).copy()
    missing = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    if missing.any():
        notes.append(f"{int(missing.sum())} stand(s) without geometry have no neighbours")
        geoms[missing] = shapely.Polygon()
    invalid = ~missing & ~shapely.is_valid(geoms)
    if invalid.any():
        notes.append(f"{int(invalid.sum())} invalid polygon(s) repaired for measuring")
        geoms[invalid] = shapely.make_valid(geoms[invalid])
    mixed = ~missing & (shapely.get_type_id(geoms) == 7)  # collections: keep their polygons
    geoms[invalid | mixed] = [_polygon_parts(g) for g in geoms[invalid | mixed]]
    return gpd.GeoSeries(geoms, index=geometry.index, crs=geometry.crs)


def metre_geometry(geometry: gpd.GeoSeries, notes: list[str]) -> np.ndarray:
    """Stand polygons (from :func:`polygons`) in metres, moved near the origin.

    A geographic layer is projected to its UTM zone and a projected layer in another unit
    is scaled to metres (said in ``notes``). Coordinates are shifted so the layer starts
    near (0, 0), which keeps the arithmetic on segment ends accurate to far below a
    millimetre.
    """
    gs = geometry
    if gs.crs is None:
        notes.append("schedule layer has no CRS; coordinates taken as metres")
    elif gs.crs.is_geographic:
        utm = gs.estimate_utm_crs()
        notes.append(f"geographic CRS projected to {utm.to_string()} for areas and adjacency")
        gs = gs.to_crs(utm)
    geoms = np.asarray(gs.array, dtype=object)
    factor = 1.0 if gs.crs is None else _unit_to_metre(CRS.from_user_input(gs.crs))
    if factor != 1.0:
        notes.append(f"coordinates converted to metres (1 unit = {factor:g} m)")
    present = ~shapely.is_empty(geoms)
    if not present.any():
        return geoms
    origin = shapely.bounds(geoms[present])[:, :2].min(axis=0)
    return shapely.transform(geoms, lambda xy: (xy - origin) * factor)


def _boundary_segments(geoms: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Start points, end points and owning stand of every boundary segment (holes included)."""
    polys, poly_owner = shapely.get_parts(geoms, return_index=True)
    rings, ring_poly = shapely.get_rings(polys, return_index=True)
    xy, ring = shapely.get_coordinates(rings, return_index=True)
    same_ring = ring[1:] == ring[:-1]
    start, end = xy[:-1][same_ring], xy[1:][same_ring]
    owner = poly_owner[ring_poly[ring[:-1][same_ring]]]
    keep = np.any(start != end, axis=1)
    return start[keep], end[keep], owner[keep]


def _facing_intervals(
    start: np.ndarray, end: np.ndarray, s: np.ndarray, t: np.ndarray, tol: float
) -> tuple[np.ndarray, np.ndarray]:
    """The part of each segment ``s[k]`` that faces segment ``t[k]`` within ``tol``.

    Positions are measured along ``s`` from its start (metres). Returns ``lo, hi``; the
    part is empty where ``hi <= lo``.
    """
    ds = end[s] - start[s]
    len_s = np.hypot(ds[:, 0], ds[:, 1])
    ux, uy = ds[:, 0] / len_s, ds[:, 1] / len_s
    dt = end[t] - start[t]
    len_t = np.hypot(dt[:, 0], dt[:, 1])
    sin_angle = np.abs(ux * dt[:, 1] - uy * dt[:, 0]) / len_t
    # t's end points in s's frame: along (position on s) and across (signed offset)
    r0, r1 = start[t] - start[s], end[t] - start[s]
    along0, along1 = r0[:, 0] * ux + r0[:, 1] * uy, r1[:, 0] * ux + r1[:, 1] * uy
    across0, across1 = r0[:, 1] * ux - r0[:, 0] * uy, r1[:, 1] * ux - r1[:, 0] * uy
    lo = np.maximum(np.minimum(along0, along1), 0.0)
    hi = np.minimum(np.maximum(along0, along1), len_s)
    # The offset changes linearly along t; keep the stretch where it is within +-tol.
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = (across1 - across0) / (along1 - along0)
        at_minus = along0 + (-tol - across0) / slope
        at_plus = along0 + (tol - across0) / slope
    level = ~np.isfinite(slope) | (slope == 0)
    lo = np.maximum(lo, np.where(level, -np.inf, np.minimum(at_minus, at_plus)))
    hi = np.minimum(hi, np.where(level, np.inf, np.maximum(at_minus, at_plus)))
    close = np.where(level, np.abs(across0) <= tol, True)
    parallel = sin_angle <= np.sin(np.radians(MAX_FACING_ANGLE_DEG))
    return lo, np.where(parallel & close, hi, lo)


def _facing_lengths(geoms: np.ndarray, tol: float) -> pd.Series:
    """Facing length of every ordered stand pair ``(a, b)``, measured on ``a``'s boundary."""
    start, end, owner = _boundary_segments(geoms)
    lines = shapely.linestrings(np.stack([start, end], axis=1))
    s, t = shapely.STRtree(lines).query(lines, predicate="dwithin", distance=tol)
    other = owner[s] != owner[t]
    s, t = s[other], t[other]
    lo, hi = _facing_intervals(start, end, s, t, tol)
    part = pd.DataFrame({"a": owner[s], "b": owner[t], "seg": s, "lo": lo, "hi": hi})
    part = part[part["hi"] > part["lo"]].sort_values(["a", "b", "seg", "lo"])
    # Union of the parts of one segment: count only what lies beyond the parts before it.
    keys = [part["a"], part["b"], part["seg"]]
    reach = part.groupby(keys)["hi"].cummax().groupby(keys).shift(fill_value=-np.inf)
    part["new"] = (part["hi"] - np.maximum(part["lo"], reach)).clip(lower=0.0)
    return part.groupby(["a", "b"])["new"].sum()


def neighbours(
    geoms: np.ndarray,
    min_shared_edge_m: float,
    digitising_tolerance_m: float,
    corner_adjacency: bool = False,
) -> Neighbours:
    """Adjacent stand pairs by the measure described in the module docstring.

    Parameters
    ----------
    geoms
        (n,) stand polygons in metres (see :func:`metre_geometry`), by position.
    min_shared_edge_m
        Stands sharing more than this length of boundary are adjacent.
    digitising_tolerance_m
        Boundary separated by at most this gap still counts as shared.
    corner_adjacency
        Any contact within the tolerance, a corner included, makes stands adjacent.

    Returns
    -------
    Neighbours

    Examples
    --------
    Two 1 m squares side by side share 1 m; a third touches the second at a corner only:

    >>> sq = np.array([shapely.box(0, 0, 1, 1), shapely.box(1, 0, 2, 1), shapely.box(2, 1, 3, 2)])
    >>> nb = neighbours(sq, min_shared_edge_m=0.5, digitising_tolerance_m=0.1)
    >>> nb.edges.tolist(), nb.shared_m.tolist()
    ([[0, 1]], [1.0])
    """
    geoms = np.asarray(geoms, dtype=object)
    tol = max(float(digitising_tolerance_m), MIN_GAP_M)
    a, b = shapely.STRtree(geoms).query(geoms, predicate="dwithin", distance=tol)
    pair = a < b
    a, b = a[pair].astype(np.int64), b[pair].astype(np.int64)
    order = np.lexsort((b, a))
    a, b = a[order], b[order]
    if corner_adjacency:
        return Neighbours(np.column_stack([a, b]).reshape(-1, 2), np.zeros(len(a)))
    bound_a, bound_b = shapely.boundary(geoms[a]), shapely.boundary(geoms[b])
    exact = shapely.length(shapely.intersection(bound_a, bound_b))
    facing = _facing_lengths(geoms, tol)
    from_a = facing.reindex(pd.MultiIndex.from_arrays([a, b]), fill_value=0.0).to_numpy()
    from_b = facing.reindex(pd.MultiIndex.from_arrays([b, a]), fill_value=0.0).to_numpy()
    shared = np.maximum(exact, np.minimum(from_a, from_b))
    overlap = shapely.intersects(geoms[a], geoms[b]) & ~shapely.touches(geoms[a], geoms[b])
    if overlap.any():
        oa, ob = geoms[a[overlap]], geoms[b[overlap]]
        inside = np.minimum(
            shapely.length(shapely.intersection(shapely.boundary(ob), oa)),
            shapely.length(shapely.intersection(shapely.boundary(oa), ob)),
        )
        shared[overlap] = np.maximum(shared[overlap], inside)
    adjacent = shared > min_shared_edge_m
    edges = np.column_stack([a[adjacent], b[adjacent]]).reshape(-1, 2)
    return Neighbours(edges, shared[adjacent])
