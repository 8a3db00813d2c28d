"""Stand adjacency from geometry: which stands share a boundary, and how long it is.

Two stands are *adjacent* when they share more than ``min_shared_edge_m`` of boundary,
where boundary separated by a digitising gap of at most ``digitising_tolerance_m`` still counts
as shared. Stands that touch only at a corner are not adjacent unless
``corner_adjacency`` is set (then any contact within the tolerance counts).

How the shared length is measured
---------------------------------
For a candidate pair ``(i, j)`` at distance ``g <= tol`` let ``m(r)`` be the length of
stand ``j``'s boundary lying within ``r`` of stand ``i``'s boundary. ``m(r)`` is the true
shared (or facing) length plus a *spill-over*: where the shared edge ends at a junction,
``j``'s boundary turns away from ``i`` and stays within ``r`` of it for a distance that
grows linearly with ``r`` (``r / sin(angle)`` per end; ``r`` for a right angle). A
checkerboard corner contact is nothing but spill-over: ``m(r) = 2 r``. Measuring at two
radii ``r_a = (g + r_b) / 2`` and ``r_b = tol`` and extrapolating linearly back to the gap,
``shared = 2 m(r_a) - m(r_b)``, removes the spill-over exactly for straight edges meeting at
any angle, so

* a clean layer gives the exact shared edge length (corner contacts give 0),
* a layer whose stands were all shrunk by ``d`` (gaps ``2 d <= tol``) gives the length of
  the facing edges, shorter than the clean length only by the corner retreat of the
  shrink (``d cot(angle / 2)`` at each end: ``d`` for right angles, ``0.58 d`` in a
  hexagonal or Voronoi-like layer).

``m(r)`` is computed in numpy from the boundary segments: for every segment of ``j`` and
every nearby segment of ``i`` the set of points within ``r`` is one interval (a line meets
a convex capsule in one interval); the intervals of one segment of ``j`` are merged and
their lengths summed. Only where stands *overlap* (rare, and reported) is the part of
``j``'s boundary lying inside ``i`` added with a shapely overlay.

Candidate pairs come from one vectorised :class:`shapely.STRtree` query
(``predicate="dwithin"``). Nodes of the graph are stand positions ``0 .. n-1``.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass, field

import geopandas as gpd
import networkx as nx
import numpy as np
import pandas as pd
import shapely
from scipy import sparse
from scipy.sparse import csgraph

from spatialplan.errors import InputError

__all__ = ["AdjacencyResult", "build_adjacency", "connected_openings"]

log = logging.getLogger(__name__)

#: smallest buffer radius used (m): coordinates are not better than a millimetre
MIN_RADIUS_M = 1e-3
#: overlaps smaller than this (m2) are digitising noise and not reported
OVERLAP_REPORT_M2 = 1.0
#: gaps wider than the tolerance are looked for up to this multiple of it ...
GAP_SEARCH_FACTOR = 5.0
#: ... and reported when the stands face each other along more than this (m)
GAP_REPORT_MIN_M = 5.0
#: stand pairs measured per numpy block (bounds memory: ~50 segment pairs per stand pair)
_BLOCK_PAIRS = 20_000
#: at most this many stand pairs are named in one warning; the tables hold all
_MAX_NAMED = 20


@dataclass(frozen=True, eq=False)
class AdjacencyResult:
    """The adjacency graph of a stand layer and what was noticed while building it.

    Attributes
    ----------
    graph
        Undirected graph on nodes ``0 .. n-1`` (node attribute ``stand_id`` when ids were
        given); edge attribute ``shared_m`` is the shared boundary length in metres.
    edges
        (m, 2) int array of adjacent pairs with ``i < j``, sorted.
    shared_m
        (m,) shared boundary length of each edge (m), aligned with ``edges``.
    warnings
        Messages naming stand ids (overlaps, gaps wider than the tolerance, bad geometry).
    overlaps
        Pairs whose areas overlap by more than ``OVERLAP_REPORT_M2``: columns ``i``, ``j``,
        ``stand_a``, ``stand_b``, ``overlap_m2``.
    gaps
        Pairs facing each other across a gap wider than the tolerance (up to
        ``GAP_SEARCH_FACTOR`` times it) along more than ``GAP_REPORT_MIN_M``: columns ``i``,
        ``j``, ``stand_a``, ``stand_b``, ``gap_m``, ``facing_m``. They are *not* adjacent.
    """

    graph: nx.Graph
    edges: np.ndarray
    shared_m: np.ndarray
    warnings: list[str] = field(default_factory=list)
    overlaps: pd.DataFrame = field(default_factory=pd.DataFrame)
    gaps: pd.DataFrame = field(default_factory=pd.DataFrame)

    @property
    def n_stands(self) -> int:
        """Number of nodes."""
        return int(self.graph.number_of_nodes())


# ---------------------------------------------------------------------------------------
# boundary segments and the distance-interval measure
# ---------------------------------------------------------------------------------------
def _segments(geoms: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Boundary segments of every polygon.

    Returns
    -------
    seg_xy
        (s, 4) segment end points ``x0, y0, x1, y1``, grouped by stand.
    seg_bbox
        (s, 4) ``xmin, ymin, xmax, ymax``.
    start, count
        (n,) first segment row and number of segments of each stand.
    """
    n = len(geoms)
    parts, part_owner = shapely.get_parts(geoms, return_index=True)
    rings, ring_part = shapely.get_rings(parts, return_index=True)
    ring_owner = part_owner[ring_part]
    xy, ring_idx = shapely.get_coordinates(rings, return_index=True)
    same = ring_idx[1:] == ring_idx[:-1]
    a = xy[:-1][same]
    b = xy[1:][same]
    owner = ring_owner[ring_idx[:-1][same]]
    keep = np.any(a != b, axis=1)  # drop repeated points
    a, b, owner = a[keep], b[keep], owner[keep]
    order = np.argsort(owner, kind="stable")  # already grouped for valid input; be sure
    a, b, owner = a[order], b[order], owner[order]
    seg_xy = np.hstack([a, b])
    seg_bbox = np.hstack([np.minimum(a, b), np.maximum(a, b)])
    count = np.bincount(owner, minlength=n)
    start = np.concatenate([[0], np.cumsum(count)[:-1]])
    return seg_xy, seg_bbox, start, count


def _line_interval(
    alpha0: np.ndarray, alpha1: np.ndarray, lo: np.ndarray, hi: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Interval of ``t`` with ``lo <= alpha0 + alpha1 t <= hi`` (empty: start > end)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        ta = (lo - alpha0) / alpha1
        tb = (hi - alpha0) / alpha1
    t0 = np.minimum(ta, tb)
    t1 = np.maximum(ta, tb)
    flat = alpha1 == 0
    inside = (alpha0 >= lo) & (alpha0 <= hi)
    t0 = np.where(flat, np.where(inside, -np.inf, np.inf), t0)
    t1 = np.where(flat, np.where(inside, np.inf, -np.inf), t1)
    return t0, t1


def _capsule_interval(s: np.ndarray, e: np.ndarray, r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Parameter interval of segment ``s`` within distance ``r`` of segment ``e``.

    ``s`` and ``e`` are (k, 4) arrays of segments; the points ``A + t (B - A)`` of ``s``
    with ``t`` in the returned ``[t0, t1]`` (clipped to [0, 1]; empty when t0 >= t1) lie
    in the capsule of radius ``r`` around ``e``: the union of a rectangle and two discs.
    """
    ax, ay, bx, by = s.T
    cx, cy, dx, dy = e.T
    ux, uy = bx - ax, by - ay
    starts = []
    ends = []
    uu = ux * ux + uy * uy
    for qx, qy in ((cx, cy), (dx, dy)):  # discs at both ends of e
        wx, wy = ax - qx, ay - qy
        bq = ux * wx + uy * wy
        c = wx * wx + wy * wy - r * r
        disc = bq * bq - uu * c
        ok = disc >= 0
        sq = np.sqrt(np.where(ok, disc, 0.0))
        starts.append(np.where(ok, (-bq - sq) / uu, np.inf))
        ends.append(np.where(ok, (-bq + sq) / uu, -np.inf))
    vx, vy = dx - cx, dy - cy
    ell = np.hypot(vx, vy)
    with np.errstate(divide="ignore", invalid="ignore"):
        ex, ey = vx / ell, vy / ell
    ex = np.where(ell > 0, ex, 0.0)
    ey = np.where(ell > 0, ey, 0.0)
    px, py = ax - cx, ay - cy
    along0, along1 = px * ex + py * ey, ux * ex + uy * ey
    across0, across1 = -px * ey + py * ex, -ux * ey + uy * ex
    t0a, t1a = _line_interval(along0, along1, np.zeros_like(ell), ell)
    t0b, t1b = _line_interval(across0, across1, -r, r)
    t0s, t1s = np.maximum(t0a, t0b), np.minimum(t1a, t1b)
    rect = (ell > 0) & (t0s <= t1s)
    starts.append(np.where(rect, t0s, np.inf))
    ends.append(np.where(rect, t1s, -np.inf))
    # The capsule is convex, so the union of the three pieces on the line is one interval.
    t0 = np.clip(np.minimum.reduce(starts), 0.0, 1.0)
    t1 = np.clip(np.maximum.reduce(ends), 0.0, 1.0)
    return t0, t1


def _union_length(group: np.ndarray, t0: np.ndarray, t1: np.ndarray, n_groups: int) -> np.ndarray:
    """Total length of the union of intervals ``[t0, t1]`` per group (t in [0, 1])."""
    ok = t1 > t0
    group, t0, t1 = group[ok], t0[ok], t1[ok]
    out = np.zeros(n_groups)
    if len(group) == 0:
        return out
    # Offsetting every group by 2 lets one running maximum serve all groups at once.
    off = 2.0 * group
    order = np.lexsort((t0, group))
    s = (t0 + off)[order]
    e = (t1 + off)[order]
    g = group[order]
    prev = np.concatenate([[-np.inf], np.maximum.accumulate(e)[:-1]])
    add = np.maximum(0.0, e - np.maximum(s, prev))
    np.add.at(out, g, add)
    return out


def _near_lengths(
    seg_xy: np.ndarray,
    seg_bbox: np.ndarray,
    start: np.ndarray,
    count: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    radii: list[np.ndarray],
) -> list[np.ndarray]:
    """Length of stand ``b[k]``'s boundary within ``radii[q][k]`` of stand ``a[k]``'s boundary.

    Works in blocks of stand pairs; every segment of ``b`` is paired with every segment of
    ``a`` whose bounding box is within the largest radius.
    """
    k_all = len(a)
    out = [np.zeros(k_all) for _ in radii]
    rmax_all = np.maximum.reduce(radii) if radii else np.zeros(k_all)
    seg_len = np.hypot(seg_xy[:, 2] - seg_xy[:, 0], seg_xy[:, 3] - seg_xy[:, 1])
    for lo in range(0, k_all, _BLOCK_PAIRS):
        hi = min(lo + _BLOCK_PAIRS, k_all)
        ka, kb = a[lo:hi], b[lo:hi]
        nb, na = count[kb], count[ka]
        cnt = nb * na
        tot = int(cnt.sum())
        if tot == 0:
            continue
        pair = np.repeat(np.arange(hi - lo), cnt)
        first = np.concatenate([[0], np.cumsum(cnt)[:-1]])
        local = np.arange(tot) - first[pair]
        na_r = na[pair]
        s_loc = local // na_r
        s_idx = start[kb][pair] + s_loc
        e_idx = start[ka][pair] + local % na_r
        rmax = rmax_all[lo:hi][pair]
        bs, be = seg_bbox[s_idx], seg_bbox[e_idx]
        near = (
            (bs[:, 0] - be[:, 2] <= rmax)
            & (be[:, 0] - bs[:, 2] <= rmax)
            & (bs[:, 1] - be[:, 3] <= rmax)
            & (be[:, 1] - bs[:, 3] <= rmax)
        )
        pair, s_idx, e_idx, s_loc = pair[near], s_idx[near], e_idx[near], s_loc[near]
        # one group per (stand pair, segment of b)
        nb_first = np.concatenate([[0], np.cumsum(nb)[:-1]])
        group = nb_first[pair] + s_loc
        n_groups = int(nb.sum())
        g_pair = np.repeat(np.arange(hi - lo), nb)
        g_seg = start[kb][g_pair] + np.arange(n_groups) - nb_first[g_pair]
        g_len = seg_len[g_seg]
        for q, rad in enumerate(radii):
            t0, t1 = _capsule_interval(seg_xy[s_idx], seg_xy[e_idx], rad[lo:hi][pair])
            frac = _union_length(group, t0, t1, n_groups)
            out[q][lo:hi] = np.bincount(g_pair, weights=frac * g_len, minlength=hi - lo)
    return out


def _inside_lengths(
    geoms: np.ndarray, a: np.ndarray, b: np.ndarray, radii: list[np.ndarray]
) -> list[np.ndarray]:
    """Length of ``b``'s boundary inside ``a`` grown by each radius (shapely overlay).

    Used only for overlapping pairs, where part of ``b``'s boundary lies deep inside ``a``.
    """
    bd = shapely.boundary(geoms[b])
    return [
        shapely.length(shapely.intersection(bd, shapely.buffer(geoms[a], rad, join_style="mitre")))
        for rad in radii
    ]


# ---------------------------------------------------------------------------------------
# public API
# ---------------------------------------------------------------------------------------
def _as_geometry_array(geometry: gpd.GeoSeries | np.ndarray, warnings: list[str]) -> np.ndarray:
    if isinstance(geometry, gpd.GeoSeries | gpd.GeoDataFrame):
        gs = geometry.geometry if isinstance(geometry, gpd.GeoDataFrame) else geometry
        if gs.crs is not None and gs.crs.is_geographic:
            utm = gs.estimate_utm_crs()
            warnings.append(
                f"stand layer is in geographic CRS {gs.crs.to_string()}; "
                f"adjacency measured in {utm.to_string()}"
            )
            gs = gs.to_crs(utm)
        return np.asarray(gs.array, dtype=object)
    return np.asarray(geometry, dtype=object)


def _name(ids: np.ndarray | None, i: int) -> str:
    return str(ids[i]) if ids is not None else f"#{i}"


def _pair_list(ids: np.ndarray | None, df: pd.DataFrame, fmt: str) -> str:
    items = [
        f"{_name(ids, int(r.i))}-{_name(ids, int(r.j))} " + fmt.format(**r._asdict())
        for r in df.head(_MAX_NAMED).itertuples()
    ]
    more = f" and {len(df) - _MAX_NAMED} more" if len(df) > _MAX_NAMED else ""
    return ", ".join(items) + more


def build_adjacency(
    geometry: gpd.GeoSeries | np.ndarray,
    min_shared_edge_m: float = 1.0,
    digitising_tolerance_m: float = 0.5,
    corner_adjacency: bool = False,
    ids: Sequence[str] | None = None,
) -> AdjacencyResult:
    """Build the stand adjacency graph.

    Parameters
    ----------
    geometry
        Stand polygons in a projected CRS (metres), by position. A GeoSeries in a
        geographic CRS is projected to its UTM zone first (with a warning).
    min_shared_edge_m
        Stands sharing more than this length of boundary are adjacent.
    digitising_tolerance_m
        Boundary separated by at most this gap still counts as shared.
    corner_adjacency
        Count any contact within the tolerance (also a single corner point) as adjacency.
    ids
        Stand ids by position, used as node attribute ``stand_id`` and in messages.

    Returns
    -------
    AdjacencyResult

    Raises
    ------
    InputError
        ``ids`` does not match the number of geometries.
    """
    warnings: list[str] = []
    geoms = _as_geometry_array(geometry, warnings)
    n = len(geoms)
    id_arr = None if ids is None else np.asarray([str(v) for v in ids], dtype=object)
    if id_arr is not None and len(id_arr) != n:
        msg = f"build_adjacency: {len(id_arr)} ids for {n} geometries"
        raise InputError(msg)

    missing = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    if missing.any():
        names = [_name(id_arr, int(i)) for i in np.flatnonzero(missing)[:_MAX_NAMED]]
        warnings.append(
            f"{int(missing.sum())} stands have no geometry and no neighbours: {', '.join(names)}"
        )
        geoms = geoms.copy()
        geoms[missing] = shapely.Polygon()
    invalid = ~missing & ~shapely.is_valid(geoms)
    if invalid.any():
        names = [_name(id_arr, int(i)) for i in np.flatnonzero(invalid)[:_MAX_NAMED]]
        warnings.append(
            f"{int(invalid.sum())} stand polygons are invalid and were repaired for "
            f"adjacency only: {', '.join(names)}"
        )
        geoms = geoms.copy()
        geoms[invalid] = shapely.make_valid(geoms[invalid])
    polygonal = shapely.get_type_id(geoms)
    if np.any(~missing & ~np.isin(polygonal, [3, 6, 7])):
        bad = np.flatnonzero(~missing & ~np.isin(polygonal, [3, 6, 7]))
        names = [_name(id_arr, int(i)) for i in bad[:_MAX_NAMED]]
        msg = f"stands with non-polygon geometry: {', '.join(names)}"
        raise InputError(msg)

    tol = max(float(digitising_tolerance_m), MIN_RADIUS_M)
    search = GAP_SEARCH_FACTOR * max(tol, 0.1)
    tree = shapely.STRtree(geoms)
    qa, qb = tree.query(geoms, predicate="dwithin", distance=search)
    keep = qa < qb
    pa, pb = qa[keep], qb[keep]
    order = np.lexsort((pb, pa))
    pa, pb = pa[order].astype(np.int64), pb[order].astype(np.int64)
    dist = shapely.distance(geoms[pa], geoms[pb])
    close = dist <= tol
    seg_xy, seg_bbox, seg_start, seg_count = _segments(geoms)

    # ---- candidate pairs within the tolerance: measure the shared length -------------
    ca, cb, cg = pa[close], pb[close], dist[close]
    rb = np.full(len(ca), tol)
    ra = 0.5 * (cg + rb)
    m_a, m_b = _near_lengths(seg_xy, seg_bbox, seg_start, seg_count, ca, cb, [ra, rb])

    # overlaps: interiors intersect
    ov = np.zeros(len(ca), dtype=bool)
    zero = cg == 0
    if zero.any():
        ov[zero] = shapely.relate_pattern(geoms[ca[zero]], geoms[cb[zero]], "T********")
    overlaps = pd.DataFrame(columns=["i", "j", "stand_a", "stand_b", "overlap_m2"])
    if ov.any():
        oa, ob = ca[ov], cb[ov]
        inside_a, inside_b = _inside_lengths(geoms, oa, ob, [ra[ov], rb[ov]])
        m_a[ov] = np.maximum(m_a[ov], inside_a)
        m_b[ov] = np.maximum(m_b[ov], inside_b)
        area = shapely.area(shapely.intersection(geoms[oa], geoms[ob]))
        big = area > OVERLAP_REPORT_M2
        overlaps = pd.DataFrame(
            {
                "i": oa[big],
                "j": ob[big],
                "stand_a": [_name(id_arr, int(v)) for v in oa[big]],
                "stand_b": [_name(id_arr, int(v)) for v in ob[big]],
                "overlap_m2": area[big],
            }
        )
        if len(overlaps):
            warnings.append(
                f"{len(overlaps)} pairs of stands overlap by more than "
                f"{OVERLAP_REPORT_M2:g} m2: "
                + _pair_list(id_arr, overlaps, "({overlap_m2:.1f} m2)")
            )
    # Linear extrapolation of m(r) back to the gap removes the spill-over at junctions.
    shared = np.clip(2.0 * m_a - m_b, 0.0, m_b)
    adjacent = np.ones(len(ca), dtype=bool) if corner_adjacency else shared > min_shared_edge_m

    # ---- wider gaps: report pairs that face each other along a long edge -------------
    ga, gb, gg = pa[~close], pb[~close], dist[~close]
    gaps = pd.DataFrame(columns=["i", "j", "stand_a", "stand_b", "gap_m", "facing_m"])
    if len(ga):
        grb = np.full(len(ga), search)
        gra = 0.5 * (gg + grb)
        g_a, g_b = _near_lengths(seg_xy, seg_bbox, seg_start, seg_count, ga, gb, [gra, grb])
        facing = np.clip(2.0 * g_a - g_b, 0.0, g_b)
        rep = facing > GAP_REPORT_MIN_M
        gaps = pd.DataFrame(
            {
                "i": ga[rep],
                "j": gb[rep],
                "stand_a": [_name(id_arr, int(v)) for v in ga[rep]],
                "stand_b": [_name(id_arr, int(v)) for v in gb[rep]],
                "gap_m": gg[rep],
                "facing_m": facing[rep],
            }
        )
        if len(gaps):
            warnings.append(
                f"{len(gaps)} pairs of stands are separated by gaps wider than the "
                f"{tol:g} m gap tolerance and are not adjacent: "
                + _pair_list(id_arr, gaps, "({gap_m:.2f} m gap along {facing_m:.0f} m)")
            )

    edges = np.column_stack([ca[adjacent], cb[adjacent]]).astype(np.int64).reshape(-1, 2)
    shared_m = shared[adjacent]
    graph = nx.Graph()
    if id_arr is not None:
        graph.add_nodes_from((i, {"stand_id": id_arr[i]}) for i in range(n))
    else:
        graph.add_nodes_from(range(n))
    graph.add_edges_from(
        (int(i), int(j), {"shared_m": float(s)}) for (i, j), s in zip(edges, shared_m, strict=True)
    )
    for w in warnings:  # callers report the returned warnings; log only for debugging
        log.debug(w)
    return AdjacencyResult(
        graph=graph,
        edges=edges,
        shared_m=shared_m,
        warnings=warnings,
        overlaps=overlaps.reset_index(drop=True),
        gaps=gaps.reset_index(drop=True),
    )


def connected_openings(edges: np.ndarray, open_mask: np.ndarray) -> list[np.ndarray]:
    """Connected groups of open stands (openings).

    Parameters
    ----------
    edges
        (m, 2) adjacent stand positions.
    open_mask
        (n,) True where a stand is open.

    Returns
    -------
    list of numpy.ndarray
        One sorted array of stand positions per opening (isolated open stands included),
        ordered by their smallest position.
    """
    open_mask = np.asarray(open_mask, dtype=bool)
    n = len(open_mask)
    idx = np.flatnonzero(open_mask)
    if len(idx) == 0:
        return []
    e = np.asarray(edges, dtype=np.int64).reshape(-1, 2)
    e = e[open_mask[e[:, 0]] & open_mask[e[:, 1]]]
    pos = np.full(n, -1, dtype=np.int64)
    pos[idx] = np.arange(len(idx))
    k = len(idx)
    mat = sparse.coo_matrix(
        (np.ones(len(e), dtype=np.int8), (pos[e[:, 0]], pos[e[:, 1]])), shape=(k, k)
    )
    _, labels = csgraph.connected_components(mat, directed=False)
    order = np.argsort(labels, kind="stable")
    split = np.flatnonzero(np.diff(labels[order])) + 1
    groups = [idx[g] for g in np.split(order, split)]
    groups.sort(key=lambda g: int(g[0]))
    return groups
