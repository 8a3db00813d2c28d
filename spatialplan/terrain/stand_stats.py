"""Slope statistics per stand: stands burned into the DEM grid and grouped cell by cell.

Stands are reprojected to the DEM's CRS and burned into the DEM grid once (cell centre
inside the polygon, value = position + 1), block by block of DEM rows, and the cell values
are grouped with :func:`numpy.bincount`. A stand too small to contain any cell centre is
sampled at one interior point (:func:`shapely.point_on_surface`). The harvest system of
each stand comes from :mod:`spatialplan.terrain.operability`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
import rasterio
import rasterio.features
import rasterio.windows
import shapely
from affine import Affine

from spatialplan.errors import InputError, SettingsError
from spatialplan.settings import TerrainSettings
from spatialplan.terrain._common import geometry_area_ha, stand_ids, with_ids
from spatialplan.terrain.dem import DEFAULT_BLOCK_ROWS, DemReader
from spatialplan.terrain.operability import check_slope_classes, harvest_systems

__all__ = ["TerrainResult", "stand_terrain"]


@dataclass
class TerrainResult:
    """Terrain statistics per stand.

    Attributes
    ----------
    stands
        One row per stand, aligned by position with the stand frame (``RangeIndex``):
        ``stand_id``, ``slope_pct_mean`` (area-weighted mean slope, %), ``steep_share``
        (share of the area with slope above ``steep_threshold_pct``), ``share_<system>`` for
        each slope class and ``share_inoperable``, ``harvest_system`` (a class's ``system``,
        ``"inoperable"``, or ``"unknown"`` outside the DEM), ``harvest_cost_per_m3`` (the
        class's cost; NaN when the class gives none, or when inoperable or unknown, meaning
        "use the ``[economics]`` cost"), ``operable`` (bool; stands outside the
        DEM stay operable), ``outside_dem`` (bool), ``n_cells`` (DEM cells with a slope inside
        the stand; 0 when sampled at one point) and ``dem_cover_share`` (share of the stand's
        area covered by cells with a slope).
    messages
        Stands outside the DEM, partly covered, sampled at one point, inoperable (with ids).
    dem_path
        The DEM used.
    cell_size_m
        Nominal cell width and height in metres (at the DEM's centre row for geographic DEMs).
    """

    stands: pd.DataFrame
    messages: list[str] = field(default_factory=list)
    dem_path: str = ""
    cell_size_m: tuple[float, float] = (math.nan, math.nan)


def stand_terrain(
    stands: gpd.GeoDataFrame,
    settings: TerrainSettings,
    dem_path: str | Path | None = None,
    *,
    block_rows: int = DEFAULT_BLOCK_ROWS,
) -> TerrainResult:
    """Slope statistics, harvest system, cost and operability for every stand.

    The stands are reprojected to the DEM's CRS and burned into the grid once per block of
    DEM rows (cell centre inside the polygon; stands must not overlap); statistics are
    grouped with :func:`numpy.bincount` and weighted by cell area (which varies by row only
    for geographic DEMs). Stands without any cell centre are sampled at one interior point.

    Parameters
    ----------
    stands
        Stand frame by position with ``stand_id`` and geometry (``area_ha`` is used for the
        DEM cover share when present), in any CRS.
    settings
        ``terrain`` settings (slope classes, thresholds, elevation unit).
    dem_path
        The DEM; ``settings.dem`` when ``None``.
    block_rows
        DEM rows processed at a time (memory: about 40 bytes per cell of a block).

    Returns
    -------
    TerrainResult

    Raises
    ------
    InputError
        DEM unreadable or without CRS; stands without CRS.
    SettingsError
        No DEM given, or slope classes unusable.
    """
    path = dem_path if dem_path is not None else settings.dem
    if path is None:
        msg = "no DEM given: set terrain.dem in the settings or pass --dem"
        raise SettingsError(msg)
    check_slope_classes(settings)
    if stands.crs is None:
        msg = "the stand layer has no CRS; it cannot be placed on the DEM"
        raise InputError(msg)
    n = len(stands)
    ids = stand_ids(stands)
    classes = settings.slope_classes
    k = len(classes)
    maxes = np.array([c.max_slope_pct for c in classes], dtype=np.float64)
    with DemReader(path, settings.elevation_unit_m) as dem:
        geoms = np.asarray(stands.to_crs(dem.ds.crs).geometry.values, dtype=object)
        acc = _accumulate(dem, geoms, maxes, settings.steep_threshold_pct, block_rows)
        cell_size = dem.cell_size_m
    cnt, area, slope_sum, steep, cls_area, pt_slope = acc

    with np.errstate(invalid="ignore", divide="ignore"):
        mean = slope_sum / area
        steep_share = steep / area
        shares = cls_area / area[:, None]
    sampled = (cnt == 0) & np.isfinite(pt_slope)
    if sampled.any():
        ps = pt_slope[sampled]
        mean[sampled] = ps
        steep_share[sampled] = (ps > settings.steep_threshold_pct).astype(float)
        one_hot = np.zeros((int(sampled.sum()), k + 1))
        one_hot[np.arange(len(ps)), np.searchsorted(maxes, ps, side="left")] = 1.0
        shares[sampled] = one_hot
    outside = (cnt == 0) & ~sampled

    system, cost, inoperable = harvest_systems(shares, outside, settings)

    if "area_ha" in stands.columns:
        area_ha = pd.to_numeric(stands["area_ha"], errors="coerce").to_numpy(dtype=float)
    else:
        area_ha = geometry_area_ha(stands)
    with np.errstate(invalid="ignore", divide="ignore"):
        cover = np.clip(area / (area_ha * 10_000.0), 0.0, 1.0)
    cover[sampled] = np.nan
    cover[outside] = 0.0

    data: dict[str, Any] = {
        "stand_id": ids,
        "slope_pct_mean": mean,
        "steep_share": steep_share,
    }
    for j, c in enumerate(classes):
        data[f"share_{c.system}"] = shares[:, j]
    data["share_inoperable"] = shares[:, k]
    data.update(
        {
            "harvest_system": system,
            "harvest_cost_per_m3": cost,
            "operable": ~inoperable,
            "outside_dem": outside,
            "n_cells": cnt.astype(np.int64),
            "dem_cover_share": cover,
        }
    )
    frame = pd.DataFrame(data, index=pd.RangeIndex(n))
    frame["harvest_system"] = frame["harvest_system"].astype(str)

    messages = []
    if outside.any():
        messages.append(
            with_ids(
                f"{int(outside.sum())} stand(s) have no DEM cell with a slope in {path} "
                "(outside the DEM, on its edge ring or over nodata); their terrain is unknown "
                "and they are left operable",
                ids[outside],
            )
        )
    partial = (cnt > 0) & (cover < 0.5)
    if partial.any():
        messages.append(
            with_ids(
                f"{int(partial.sum())} stand(s) are less than half covered by DEM cells with "
                "a slope; their statistics come from the covered part",
                ids[partial],
            )
        )
    if sampled.any():
        messages.append(
            with_ids(
                f"{int(sampled.sum())} stand(s) are smaller than a DEM cell and were sampled "
                "at one interior point",
                ids[sampled],
            )
        )
    if inoperable.any():
        top = classes[-1]
        messages.append(
            with_ids(
                f"{int(inoperable.sum())} stand(s) are inoperable (more than "
                f"{settings.max_inoperable_share:.0%} of the area steeper than "
                f"{top.max_slope_pct:g} %, the limit of '{top.system}') and are excluded "
                "from harvest",
                ids[inoperable],
            )
        )
    return TerrainResult(frame, messages, str(path), cell_size)


def _accumulate(
    dem: DemReader, geoms: np.ndarray, maxes: np.ndarray, steep_pct: float, block_rows: int
) -> tuple[np.ndarray, ...]:
    """Burn stands block by block and sum cell counts, areas and slopes per stand.

    Returns cell counts, cell areas (m2), area-weighted slope sums, steep areas, areas per
    slope class (n, k + 1) and the slope at each stand's interior point.
    """
    n = len(geoms)
    k = len(maxes)
    ds = dem.ds
    t = ds.transform
    h, w = ds.height, ds.width
    # One bincount per block over a combined code (stand, slope class, steep or not) gives all
    # area statistics; a second one sums the slopes.
    n_code = 2 * (k + 1)
    codes = np.zeros((n + 1) * n_code)
    cnt = np.zeros(n + 1)
    slope_sum = np.zeros(n + 1)
    pt_slope = np.full(n, np.nan)
    const_area = bool(np.ptp(dem.cell_area_rows) == 0)

    ok = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms))
    usable = geoms.copy()
    usable[~ok] = None
    tree = shapely.STRtree(usable)
    shapes = _rasterio_shapes(usable)
    # One interior point per stand, located in the grid, read as the blocks pass by.
    pts = shapely.point_on_surface(usable)
    xy = shapely.get_coordinates(pts, include_z=False)
    has_pt = ~shapely.is_missing(pts) & ~shapely.is_empty(pts)
    prow = np.full(n, -1, dtype=np.int64)
    pcol = np.full(n, -1, dtype=np.int64)
    if has_pt.any():
        prow[has_pt] = np.floor((xy[:, 1] - t.f) / t.e).astype(np.int64)
        pcol[has_pt] = np.floor((xy[:, 0] - t.c) / t.a).astype(np.int64)
    inside = has_pt & (prow >= 0) & (prow < h) & (pcol >= 0) & (pcol < w)

    x_lo, x_hi = sorted((t.c, t.c + w * t.a))
    for r0, r1, slope in dem.blocks(block_rows):
        y_lo, y_hi = sorted((t.f + r0 * t.e, t.f + r1 * t.e))
        cand = tree.query(shapely.box(x_lo, y_lo, x_hi, y_hi))
        sel = inside & (prow >= r0) & (prow < r1)
        if sel.any():
            pt_slope[sel] = slope[prow[sel] - r0, pcol[sel]]
        cand = cand[[shapes[i] is not None for i in cand]]
        if len(cand) == 0:
            continue
        wt = Affine(t.a, 0.0, t.c, 0.0, t.e, t.f + r0 * t.e)  # the block's own origin
        burned = rasterio.features.rasterize(
            [(shapes[i], i + 1) for i in cand.tolist()],
            out_shape=(r1 - r0, w),
            transform=wt,
            fill=0,
            all_touched=False,
            dtype="int32",
        )
        # Cells without a slope go to the dummy stand 0, so no compaction is needed; NaN
        # compares False, and its sums land in row 0, which is dropped.
        burned[~np.isfinite(slope)] = 0
        sid = burned.ravel()
        sl = slope.ravel()
        if len(maxes) <= 8:
            code = (sl > maxes[0]).astype(np.int64)  # slope <= max of class j -> j
            for m in maxes[1:]:
                code += sl > m
        else:
            code = np.searchsorted(maxes, sl, side="left").astype(np.int64)
        code *= 2
        code += sl > steep_pct
        code += sid.astype(np.int64) * n_code
        if const_area:
            codes += np.bincount(code, minlength=len(codes))
            slope_sum += np.bincount(sid, weights=sl, minlength=n + 1)
        else:
            wgt = np.broadcast_to(dem.cell_area_rows[r0:r1, None], burned.shape).ravel()
            codes += np.bincount(code, weights=wgt, minlength=len(codes))
            slope_sum += np.bincount(sid, weights=wgt * sl, minlength=n + 1)
        cnt += np.bincount(sid, minlength=n + 1)
    if const_area:
        cell_area = float(dem.cell_area_rows[0])
        codes *= cell_area
        slope_sum *= cell_area
    by_code = codes.reshape(n + 1, k + 1, 2)[1:]
    cls_area = by_code.sum(axis=2)
    steep = by_code[:, :, 1].sum(axis=1)
    area = cls_area.sum(axis=1)
    return cnt[1:], area, slope_sum[1:], steep, cls_area, pt_slope


def _rasterio_shapes(geoms: np.ndarray) -> list[dict | None]:
    """GeoJSON-like dicts of the polygonal parts of ``geoms``, with numpy coordinate arrays.

    Built with vectorised shapely calls; much faster than ``__geo_interface__`` per stand.
    Geometries without polygon parts give ``None``.
    """
    out: list[dict | None] = [None] * len(geoms)
    parts, pidx = shapely.get_parts(geoms, return_index=True)
    poly = shapely.get_type_id(parts) == 3  # Polygon; other parts cannot be burned
    parts, pidx = parts[poly], pidx[poly]
    if not len(parts):
        return out
    rings, ridx = shapely.get_rings(parts, return_index=True)
    xy, cidx = shapely.get_coordinates(rings, return_index=True)
    cb = np.searchsorted(cidx, np.arange(len(rings) + 1)).tolist()
    rb = np.searchsorted(ridx, np.arange(len(parts) + 1)).tolist()
    pb = np.searchsorted(pidx, np.arange(len(geoms) + 1)).tolist()
    polys = [[xy[cb[r] : cb[r + 1]] for r in range(rb[p], rb[p + 1])] for p in range(len(parts))]
    for i in range(len(geoms)):
        lo, hi = pb[i], pb[i + 1]
        if hi - lo == 1:
            out[i] = {"type": "Polygon", "coordinates": polys[lo]}
        elif hi > lo:
            out[i] = {"type": "MultiPolygon", "coordinates": polys[lo:hi]}
    return out
