"""Terrain: slope from a DEM, harvest system and operability per stand, stream buffers.

Slope
    Percent slope per DEM cell by Horn's 3x3 method (Horn 1981, "Hill shading and the
    reflectance map", Proc. IEEE 69(1):14-47), the default method of GDAL's ``gdaldem slope``.
    The outer ring of DEM cells and every cell whose 3x3 window touches a nodata cell get no
    slope (NaN), as ``gdaldem`` does without ``-compute_edges``.

Per-stand statistics
    Stands are reprojected to the DEM's CRS and burned into the DEM grid once (cell centre
    inside the polygon, value = position + 1), block by block of DEM rows, and the cell values
    are grouped with :func:`numpy.bincount`. A stand too small to contain any cell centre is
    sampled at one interior point (:func:`shapely.point_on_surface`).

Harvest system
    Each :class:`~spatialplan.settings.SlopeClass` is a harvest system that works up to its
    ``max_slope_pct``; classes are ordered, and slope above the last class is inoperable. A
    stand is *inoperable* when more than ``max_inoperable_share`` of its area is above the last
    class. Otherwise its system is the lowest class that covers at least ``system_cover_share``
    of its area (i.e. the class of the stand's ``system_cover_share`` quantile of slope); when
    no class covers that share, the last (steepest) class is used.

Net area
    Stream lines are buffered on each side (one width, a width per feature, or a width per
    stream class), the buffers are dissolved, and the buffer area inside each stand is removed
    from its area: ``net_area_ha = area_ha - buffer_area_ha``.

Slope-based operability is an estimate for planning. Ground crews and local regulations decide
what is harvested on steep ground and near water.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Iterator
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
from pyproj import CRS
from rasterio.errors import RasterioIOError

from spatialplan.errors import InputError, SettingsError
from spatialplan.settings import TerrainSettings

__all__ = [
    "NetAreaResult",
    "TerrainResult",
    "geographic_cell_size_m",
    "horn_slope_percent",
    "net_area",
    "read_dem_slope",
    "stand_terrain",
]

log = logging.getLogger(__name__)

INOPERABLE = "inoperable"
UNKNOWN = "unknown"
#: Rows of the DEM processed at a time (with a one-row halo on each side).
DEFAULT_BLOCK_ROWS = 256
#: A stand with less net area than this (ha, i.e. 1 m2) counts as having none left.
NO_NET_AREA_HA = 1.0e-4
#: Side of the tiles the dissolved stream buffer is cut into before it meets the stands, so
#: that each stand is intersected with small pieces instead of one network-wide polygon.
BUFFER_TILE_M = 1000.0
#: GDAL block cache (MB) while a DEM block is read. Each row is read once (plus a halo), so
#: a large cache only holds memory (GDAL's default is 5 % of RAM). Only the reads are capped:
#: GDAL's rasterizer sizes its work chunks from the same setting and slows down under a cap.
GDAL_CACHE_MB = 128
_MAX_IDS = 20


# ---------------------------------------------------------------------------------------------
# Results
# ---------------------------------------------------------------------------------------------
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


@dataclass
class NetAreaResult:
    """Net harvestable area per stand after stream buffers.

    Attributes
    ----------
    stands
        One row per stand (``RangeIndex`` by position): ``stand_id``, ``area_ha``,
        ``buffer_area_ha`` (dissolved buffer area inside the stand), ``net_area_ha``
        (``>= 0``) and ``no_net_area`` (bool; such stands are to be treated as reserve).
    messages
        A summary line and the stands with no net area left (with ids).
    buffer
        The dissolved buffer polygon in the stands' CRS (for maps), or ``None`` when empty.
    """

    stands: pd.DataFrame
    messages: list[str] = field(default_factory=list)
    buffer: Any = None


# ---------------------------------------------------------------------------------------------
# Slope
# ---------------------------------------------------------------------------------------------
def horn_slope_percent(
    elev: np.ndarray,
    xres: float | np.ndarray,
    yres: float | np.ndarray,
    nodata: float | None = None,
) -> np.ndarray:
    """Percent slope of a grid by Horn's 3x3 method.

    With the 3x3 window ``a b c / d e f / g h i`` around cell ``e``::

        dz/dx = ((c + 2f + i) - (a + 2d + g)) / (8 xres)
        dz/dy = ((g + 2h + i) - (a + 2b + c)) / (8 yres)
        slope = 100 sqrt((dz/dx)^2 + (dz/dy)^2)

    (Horn 1981, Proc. IEEE 69(1):14-47; the default of GDAL's ``gdaldem slope``).

    Parameters
    ----------
    elev
        2-D elevations, in the same length unit as ``xres`` and ``yres``.
    xres, yres
        Cell width and height (sign ignored). Either a number or a 1-D array with one value
        per row (used for geographic DEMs, whose cell width in metres shrinks towards the
        poles).
    nodata
        Elevation value meaning "no data"; NaN elevations are always treated as no data.

    Returns
    -------
    numpy.ndarray
        Array of ``elev``'s shape, float64 for float64 input and float32 otherwise. Cells on
        the grid's outer ring, nodata cells and cells with a nodata cell in their 3x3 window
        are NaN.
    """
    src = np.asarray(elev)
    # Work in float64 for float64 input, else float32 (enough for DEM elevations; the
    # differences below are taken first, so little precision is lost).
    dtype: Any = np.float64 if src.dtype == np.float64 else np.float32
    z: np.ndarray = np.array(src, dtype=dtype, copy=True)
    if z.ndim != 2:
        msg = f"elevation grid must be 2-D, got shape {z.shape}"
        raise ValueError(msg)
    if nodata is not None and not np.isnan(nodata):
        z[src == nodata] = np.nan
    out = np.full(z.shape, np.nan, dtype=dtype)
    nr, nc = z.shape
    if nr < 3 or nc < 3:
        return out
    xr = _per_row(xres, nr)
    yr = _per_row(yres, nr)
    # Horn's weights are separable: a [1 2 1] smoothing across a central difference.
    # dz/dx numerator (c + 2f + i) - (a + 2d + g) = sum over rows of (right - left) * [1 2 1];
    # dz/dy numerator (g + 2h + i) - (a + 2b + c) = sum over columns of (below - above) * [1 2 1].
    # NaN propagates through the sums, so any nodata cell in the window gives NaN.
    dh = z[:, 2:] - z[:, :-2]
    gx = dh[:-2] + dh[2:]
    gx += 2.0 * dh[1:-1]
    del dh
    dv = z[2:] - z[:-2]
    gy = dv[:, :-2] + dv[:, 2:]
    gy += 2.0 * dv[:, 1:-1]
    del dv
    gx *= np.asarray(12.5 / xr, dtype=dtype)  # 100 % / 8
    gy *= np.asarray(12.5 / yr, dtype=dtype)
    np.hypot(gx, gy, out=gx)
    out[1:-1, 1:-1] = gx
    # Horn's stencil skips the centre cell, so a nodata centre is blanked explicitly.
    out[np.isnan(z)] = np.nan
    return out


def _per_row(res: float | np.ndarray, nrows: int) -> float | np.ndarray:
    """Interior-row cell sizes as a scalar or an (nrows-2, 1) column for broadcasting."""
    arr = np.abs(np.asarray(res, dtype=np.float64))
    if arr.ndim == 0:
        if not arr > 0:
            msg = f"cell size must be positive, got {float(arr)}"
            raise ValueError(msg)
        return float(arr)
    if arr.shape != (nrows,):
        msg = f"per-row cell sizes must have one value per row ({nrows}), got shape {arr.shape}"
        raise ValueError(msg)
    if not np.all(arr > 0):
        msg = "cell sizes must be positive"
        raise ValueError(msg)
    return arr[1:-1, None]


def geographic_cell_size_m(
    lat_deg: np.ndarray, dlon_deg: float, dlat_deg: float, crs: CRS | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Width and height in metres of geographic cells centred at latitudes ``lat_deg``.

    Uses the ellipsoid's radii of curvature: east-west ``N cos(lat) dlon`` and north-south
    ``M dlat`` (in radians), with ``N = a / W`` and ``M = a (1 - e^2) / W^3``,
    ``W = sqrt(1 - e^2 sin^2 lat)``. Accurate to well under 0.1 % for DEM cells of a few
    arc-seconds, which is far below the uncertainty of the slope itself.

    Parameters
    ----------
    lat_deg
        Latitudes of the cell centres (degrees).
    dlon_deg, dlat_deg
        Cell width and height in degrees (sign ignored).
    crs
        The geographic CRS whose ellipsoid is used (WGS 84 when ``None``).

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Cell widths and heights in metres.
    """
    ell = (crs or CRS.from_epsg(4326)).ellipsoid
    a = float(ell.semi_major_metre) if ell is not None else 6378137.0
    inv_f = float(ell.inverse_flattening) if ell is not None else 298.257223563
    e2 = 0.0 if inv_f == 0 else (2.0 - 1.0 / inv_f) / inv_f
    phi = np.radians(np.asarray(lat_deg, dtype=np.float64))
    w = np.sqrt(1.0 - e2 * np.sin(phi) ** 2)
    n_rad = a / w
    m_rad = a * (1.0 - e2) / w**3
    dx = n_rad * np.cos(phi) * math.radians(abs(dlon_deg))
    dy = m_rad * math.radians(abs(dlat_deg))
    return dx, dy


class _Dem:
    """An open DEM with its cell sizes in metres, read in blocks of rows."""

    def __init__(self, path: str | Path, elevation_unit_m: float = 1.0) -> None:
        self.path = str(path)
        p = Path(path)
        if not p.exists():
            msg = f"DEM file not found: {p}"
            raise InputError(msg)
        if p.is_dir():
            msg = f"DEM path {p} is a folder, not a raster file"
            raise InputError(msg)
        try:
            self.ds = rasterio.open(p)
        except RasterioIOError as exc:
            msg = f"DEM file {p} is not a raster GDAL can read ({_short(exc)})"
            raise InputError(msg) from None
        try:
            self._check()
        except Exception:
            self.ds.close()
            raise
        self.z_factor = float(elevation_unit_m)

    def _check(self) -> None:
        ds = self.ds
        if ds.count < 1:
            msg = f"DEM file {self.path} has no raster band"
            raise InputError(msg)
        if ds.crs is None:
            msg = (
                f"DEM file {self.path} has no CRS; assign its coordinate reference system "
                "in a GIS before using it"
            )
            raise InputError(msg)
        t = ds.transform
        if t.b != 0 or t.d != 0:
            msg = (
                f"DEM file {self.path} has a rotated or sheared grid; warp it to a north-up "
                "grid first"
            )
            raise InputError(msg)
        if ds.height < 3 or ds.width < 3:
            msg = f"DEM file {self.path} is {ds.height} x {ds.width} cells; at least 3 x 3 needed"
            raise InputError(msg)
        self.crs = CRS.from_wkt(ds.crs.to_wkt())
        self.geographic = bool(self.crs.is_geographic)
        h = ds.height
        if self.geographic:
            lat = t.f + (np.arange(h) + 0.5) * t.e
            if np.any(np.abs(lat) > 90.0):
                msg = (
                    f"DEM file {self.path} has a geographic CRS but latitudes beyond +-90 "
                    "degrees; its CRS is probably wrong"
                )
                raise InputError(msg)
            dx, dy = geographic_cell_size_m(lat, t.a, t.e, self.crs)
            self.xres_rows: np.ndarray = dx
            self.yres_rows: np.ndarray = dy
        else:
            unit = _unit_to_metre(self.crs)
            self.xres_rows = np.full(h, abs(t.a) * unit)
            self.yres_rows = np.full(h, abs(t.e) * unit)
        self.cell_area_rows = self.xres_rows * self.yres_rows
        self.nodata = ds.nodata

    @property
    def cell_size_m(self) -> tuple[float, float]:
        mid = self.ds.height // 2
        return float(self.xres_rows[mid]), float(self.yres_rows[mid])

    def blocks(self, block_rows: int = DEFAULT_BLOCK_ROWS) -> Iterator[tuple[int, int, np.ndarray]]:
        """Yield ``(row0, row1, slope)`` for consecutive row blocks; slope is float32."""
        h, w = self.ds.height, self.ds.width
        block_rows = max(1, int(block_rows))
        for r0 in range(0, h, block_rows):
            r1 = min(h, r0 + block_rows)
            rr0, rr1 = max(0, r0 - 1), min(h, r1 + 1)  # one-row halo on each side
            win = rasterio.windows.Window(0, rr0, w, rr1 - rr0)
            with rasterio.Env(GDAL_CACHEMAX=GDAL_CACHE_MB):
                elev = self.ds.read(1, window=win, masked=False)
            slope = horn_slope_percent(
                elev, self.xres_rows[rr0:rr1], self.yres_rows[rr0:rr1], self.nodata
            )
            if self.z_factor != 1.0:
                slope *= self.z_factor
            yield r0, r1, slope[r0 - rr0 : r0 - rr0 + (r1 - r0)].astype(np.float32, copy=False)

    def nodata_rows(self, r0: int, r1: int) -> np.ndarray:
        with rasterio.Env(GDAL_CACHEMAX=GDAL_CACHE_MB):
            elev = self.ds.read(1, window=rasterio.windows.Window(0, r0, self.ds.width, r1 - r0))
        bad = ~np.isfinite(elev)
        if self.nodata is not None and not np.isnan(self.nodata):
            bad |= elev == self.nodata
        return bad

    def close(self) -> None:
        self.ds.close()

    def __enter__(self) -> _Dem:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def read_dem_slope(
    dem_path: str | Path, *, elevation_unit_m: float = 1.0, block_rows: int = DEFAULT_BLOCK_ROWS
) -> tuple[np.ndarray, Any, Any, np.ndarray]:
    """Read band 1 of a DEM and return its percent slope (Horn's method).

    Cell sizes are taken in metres: a projected CRS's unit is converted to metres, and a
    geographic (degree) DEM gets a cell width and height in metres per row from the
    ellipsoid (:func:`geographic_cell_size_m`), so no warping is needed. Elevations are taken
    in metres unless ``elevation_unit_m`` says otherwise (0.3048 for feet).

    Parameters
    ----------
    dem_path
        Any raster GDAL reads (GeoTIFF, ...), north-up, with a CRS.
    elevation_unit_m
        Metres per elevation unit.
    block_rows
        Rows processed at a time (memory).

    Returns
    -------
    (numpy.ndarray, affine.Affine, rasterio.crs.CRS, numpy.ndarray)
        Slope in percent (float32, NaN on the edge ring and next to nodata), the DEM's
        transform, its CRS and a boolean mask that is True where the DEM cell itself is nodata.

    Raises
    ------
    InputError
        Missing file, not a raster, no CRS, rotated grid, fewer than 3 x 3 cells.
    """
    with _Dem(dem_path, elevation_unit_m) as dem:
        h, w = dem.ds.height, dem.ds.width
        slope = np.empty((h, w), dtype=np.float32)
        mask = np.empty((h, w), dtype=bool)
        for r0, r1, s in dem.blocks(block_rows):
            slope[r0:r1] = s
            mask[r0:r1] = dem.nodata_rows(r0, r1)
        return slope, dem.ds.transform, dem.ds.crs, mask


# ---------------------------------------------------------------------------------------------
# Per-stand statistics
# ---------------------------------------------------------------------------------------------
def _check_classes(settings: TerrainSettings) -> None:
    classes = settings.slope_classes
    if not classes:
        msg = "terrain.slope_classes is empty; give at least one harvest system"
        raise SettingsError(msg)
    names = [c.system for c in classes]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        msg = f"terrain.slope_classes: system names must be unique, repeated: {', '.join(dup)}"
        raise SettingsError(msg)
    reserved = [n for n in names if n in (INOPERABLE, UNKNOWN)]
    if reserved:
        msg = f"terrain.slope_classes: '{reserved[0]}' is reserved; choose another system name"
        raise SettingsError(msg)
    ms = [c.max_slope_pct for c in classes]
    if ms != sorted(ms):
        msg = "terrain.slope_classes must be ordered by increasing max_slope_pct"
        raise SettingsError(msg)


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
    _check_classes(settings)
    if stands.crs is None:
        msg = "the stand layer has no CRS; it cannot be placed on the DEM"
        raise InputError(msg)
    n = len(stands)
    ids = _stand_ids(stands)
    classes = settings.slope_classes
    k = len(classes)
    maxes = np.array([c.max_slope_pct for c in classes], dtype=np.float64)
    with _Dem(path, settings.elevation_unit_m) as dem:
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

    inoperable = ~outside & (shares[:, k] > settings.max_inoperable_share + 1e-12)
    cum = np.cumsum(shares[:, :k], axis=1)
    covers = cum >= settings.system_cover_share - 1e-9
    first = np.where(covers.any(axis=1), covers.argmax(axis=1), k - 1)
    systems = np.array([c.system for c in classes] + [INOPERABLE, UNKNOWN], dtype=object)
    # A class without a cost (None) gives NaN: the economics cost applies.
    costs = np.array(
        [np.nan if c.harvest_cost_per_m3 is None else c.harvest_cost_per_m3 for c in classes]
        + [np.nan, np.nan]
    )
    which = np.where(outside, k + 1, np.where(inoperable, k, first))

    if "area_ha" in stands.columns:
        area_ha = pd.to_numeric(stands["area_ha"], errors="coerce").to_numpy(dtype=float)
    else:
        area_ha = _area_ha(stands)
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
            "harvest_system": systems[which],
            "harvest_cost_per_m3": costs[which],
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
            _with_ids(
                f"{int(outside.sum())} stand(s) have no DEM cell with a slope in {path} "
                "(outside the DEM, on its edge ring or over nodata); their terrain is unknown "
                "and they are left operable",
                ids[outside],
            )
        )
    partial = (cnt > 0) & (cover < 0.5)
    if partial.any():
        messages.append(
            _with_ids(
                f"{int(partial.sum())} stand(s) are less than half covered by DEM cells with "
                "a slope; their statistics come from the covered part",
                ids[partial],
            )
        )
    if sampled.any():
        messages.append(
            _with_ids(
                f"{int(sampled.sum())} stand(s) are smaller than a DEM cell and were sampled "
                "at one interior point",
                ids[sampled],
            )
        )
    if inoperable.any():
        top = classes[-1]
        messages.append(
            _with_ids(
                f"{int(inoperable.sum())} stand(s) are inoperable (more than "
                f"{settings.max_inoperable_share:.0%} of the area steeper than "
                f"{top.max_slope_pct:g} %, the limit of '{top.system}') and are excluded "
                "from harvest",
                ids[inoperable],
            )
        )
    return TerrainResult(frame, messages, str(path), cell_size)


def _accumulate(
    dem: _Dem, geoms: np.ndarray, maxes: np.ndarray, steep_pct: float, block_rows: int
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


# ---------------------------------------------------------------------------------------------
# Net area
# ---------------------------------------------------------------------------------------------
def net_area(
    stands: gpd.GeoDataFrame,
    streams_path: str | Path,
    settings: TerrainSettings,
    layer: str | None = None,
) -> NetAreaResult:
    """Remove dissolved stream buffers from each stand's area.

    Buffer widths are distances from the line on *each side*, in metres: ``stream_buffer_m``
    for every feature; or, with ``stream_buffer_field``, the feature's numeric value of that
    field; or, when ``stream_buffer_by_class`` is also given, the width looked up by the
    field's value (a stream class). Buffer ends are round (as the buffer of a line is);
    overlapping buffers (confluences) count once.

    Parameters
    ----------
    stands
        Stand frame by position with ``stand_id``, geometry and (optionally) ``area_ha``, in a
        projected CRS.
    streams_path
        A line layer (GeoPackage, Shapefile, GeoJSON, ...). Polygons (wide rivers) are
        accepted and buffered outwards; points are refused.
    settings
        ``terrain`` settings.
    layer
        Layer inside a multi-layer file; ``settings.streams_layer`` when ``None``.

    Returns
    -------
    NetAreaResult

    Raises
    ------
    InputError
        File missing or unreadable, no CRS, point geometries, a missing or bad width field,
        stream classes without a width.
    SettingsError
        Negative widths in ``terrain.stream_buffer_by_class``.
    """
    if stands.crs is None:
        msg = "the stand layer has no CRS; stream buffers cannot be placed on it"
        raise InputError(msg)
    stand_crs = CRS.from_user_input(stands.crs)
    if stand_crs.is_geographic:
        msg = "stands must be in a projected CRS (metres) to net out stream buffers"
        raise InputError(msg)
    layer = layer if layer is not None else settings.streams_layer
    lines = _read_streams(Path(streams_path), layer)
    lines = lines.to_crs(stand_crs)
    widths_m = _buffer_widths(lines, settings, Path(streams_path))
    unit = _unit_to_metre(stand_crs)
    geoms = np.asarray(lines.geometry.values, dtype=object)
    keep = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms)) & (widths_m > 0)
    geoms, widths_m = geoms[keep], widths_m[keep]

    n = len(stands)
    ids = _stand_ids(stands)
    sgeoms = np.asarray(stands.geometry.values, dtype=object)
    bad = ~shapely.is_valid(sgeoms) & ~shapely.is_missing(sgeoms)
    if bad.any():
        sgeoms = sgeoms.copy()
        sgeoms[bad] = shapely.make_valid(sgeoms[bad])
    if "area_ha" in stands.columns:
        area_ha = pd.to_numeric(stands["area_ha"], errors="coerce").to_numpy(dtype=float)
    else:
        area_ha = _area_ha(stands)

    buf_ha: np.ndarray = np.zeros(n)
    union = None
    if len(geoms):
        bufs = shapely.buffer(geoms, widths_m / unit, quad_segs=8)
        union = shapely.union_all(bufs)
        pieces = _tiles(union, BUFFER_TILE_M / unit)
        if len(pieces):
            tree = shapely.STRtree(pieces)
            si, pj = tree.query(sgeoms, predicate="intersects")
            if len(si):
                inter = shapely.area(shapely.intersection(sgeoms[si], pieces[pj]))
                buf_ha = np.bincount(si, weights=inter, minlength=n) * unit**2 / 10_000.0
        if shapely.is_empty(union):
            union = None
    buf_ha = np.minimum(buf_ha, np.where(np.isfinite(area_ha), area_ha, np.inf))
    net = np.maximum(area_ha - buf_ha, 0.0)
    none_left = net < NO_NET_AREA_HA
    net[none_left] = 0.0
    frame = pd.DataFrame(
        {
            "stand_id": ids,
            "area_ha": area_ha,
            "buffer_area_ha": buf_ha,
            "net_area_ha": net,
            "no_net_area": none_left,
        },
        index=pd.RangeIndex(n),
    )
    how = _width_text(settings)
    messages = [
        f"stream buffers ({how}, {int(keep.sum())} feature(s) from {streams_path}) remove "
        f"{buf_ha.sum():.2f} ha of {np.nansum(area_ha):.2f} ha; "
        f"{int((buf_ha > 0).sum())} stand(s) touched"
    ]
    if len(geoms) and not (buf_ha > 0).any():
        messages.append(
            f"no stream buffer from {streams_path} overlaps any stand; check that the layers "
            "cover the same place (CRS)"
        )
    if none_left.any():
        messages.append(
            _with_ids(
                f"{int(none_left.sum())} stand(s) have no net area left after the stream "
                "buffers and are treated as reserve",
                ids[none_left],
            )
        )
    return NetAreaResult(frame, messages, union)


def _read_streams(path: Path, layer: str | None) -> gpd.GeoDataFrame:
    from spatialplan.inventory import read_vector_layer

    gdf, _ = read_vector_layer(
        path,
        layer,
        what="streams file",
        holds="the streams",
        layer_hint="terrain.streams_layer",
        expect="a line layer is expected",
    )
    if gdf.crs is None:
        msg = f"streams file {path} has no CRS; assign one in a GIS before using it"
        raise InputError(msg)
    kinds = shapely.get_type_id(np.asarray(gdf.geometry.values, dtype=object))
    points = np.isin(kinds, (0, 4))  # Point, MultiPoint
    if points.any():
        msg = (
            f"streams file {path} has {int(points.sum())} point feature(s); a line layer "
            "is expected"
        )
        raise InputError(msg)
    return gdf


def _buffer_widths(lines: gpd.GeoDataFrame, settings: TerrainSettings, path: Path) -> np.ndarray:
    n = len(lines)
    fld = settings.stream_buffer_field
    by_class = settings.stream_buffer_by_class
    neg = sorted(k for k, v in by_class.items() if not v >= 0)
    if neg:
        msg = "terrain.stream_buffer_by_class: widths must be >= 0 m, got " + ", ".join(
            f"{k} = {by_class[k]}" for k in neg
        )
        raise SettingsError(msg)
    if fld is None:
        if by_class:
            msg = (
                "terrain.stream_buffer_by_class is set but terrain.stream_buffer_field is not; "
                "say which stream attribute holds the class"
            )
            raise SettingsError(msg)
        return np.full(n, float(settings.stream_buffer_m))
    if fld not in lines.columns:
        cols = [c for c in lines.columns if c != lines.geometry.name]
        msg = (
            f"field '{fld}' (terrain.stream_buffer_field) not found in streams file {path}; "
            f"fields there: {', '.join(map(str, cols)) or '(none)'}"
        )
        raise InputError(msg)
    values = lines[fld]
    if by_class:
        keys = values.map(_class_key)
        known = keys.isin(list(by_class))
        if not known.all():
            missing = sorted({str(k) for k in keys[~known]})
            msg = (
                f"streams file {path}: {int((~known).sum())} feature(s) have a value of "
                f"'{fld}' without a width in terrain.stream_buffer_by_class: "
                f"{', '.join(missing[:_MAX_IDS])}"
            )
            raise InputError(msg)
        return keys.map(by_class).to_numpy(dtype=float)
    widths = pd.to_numeric(values, errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(widths) | (widths < 0)
    if bad.any():
        rows = np.flatnonzero(bad)
        msg = (
            f"streams file {path}: field '{fld}' must hold a buffer width in metres (>= 0); "
            f"{len(rows)} feature(s) do not, rows {', '.join(map(str, rows[:_MAX_IDS]))}"
        )
        raise InputError(msg)
    return widths


def _class_key(v: object) -> str:
    """Text key of a stream class value (2.0 -> '2', so integer classes match TOML keys)."""
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "<null>"
    if isinstance(v, float) and v.is_integer():
        return str(int(v))
    if isinstance(v, np.integer | np.floating):
        return _class_key(v.item())
    return str(v).strip()


def _width_text(settings: TerrainSettings) -> str:
    if settings.stream_buffer_field is None:
        return f"{settings.stream_buffer_m:g} m each side"
    if settings.stream_buffer_by_class:
        return f"width each side by class of '{settings.stream_buffer_field}'"
    return f"width each side from field '{settings.stream_buffer_field}'"


def _tiles(geom: Any, tile: float) -> np.ndarray:
    """Cut a (multi)polygon into disjoint pieces no larger than ``tile`` x ``tile``."""
    parts = np.asarray(shapely.get_parts(geom), dtype=object)
    parts = parts[~shapely.is_empty(parts)]
    if not len(parts):
        return parts
    x0, y0, x1, y1 = shapely.total_bounds(parts)
    nx = max(1, math.ceil((x1 - x0) / tile))
    ny = max(1, math.ceil((y1 - y0) / tile))
    if nx * ny == 1:
        return parts
    mx, my = np.meshgrid(np.arange(nx), np.arange(ny))
    gx, gy = mx.ravel(), my.ravel()
    boxes = shapely.box(x0 + gx * tile, y0 + gy * tile, x0 + (gx + 1) * tile, y0 + (gy + 1) * tile)
    pi, bj = shapely.STRtree(boxes).query(parts, predicate="intersects")
    pieces = shapely.intersection(parts[pi], boxes[bj])
    pieces = pieces[~shapely.is_empty(pieces) & (shapely.area(pieces) > 0)]
    return np.asarray(pieces, dtype=object)


# ---------------------------------------------------------------------------------------------
# Helpers
# ---------------------------------------------------------------------------------------------
def _stand_ids(stands: pd.DataFrame) -> np.ndarray:
    if "stand_id" in stands.columns:
        return stands["stand_id"].astype(str).to_numpy(dtype=object)
    return np.array([str(i) for i in range(len(stands))], dtype=object)


def _area_ha(stands: gpd.GeoDataFrame) -> np.ndarray:
    from spatialplan.inventory import polygon_area_ha

    return polygon_area_ha(np.asarray(stands.geometry.values), CRS.from_user_input(stands.crs))


def _unit_to_metre(crs: CRS) -> float:
    from spatialplan.inventory import unit_to_metre

    return unit_to_metre(crs)


def _with_ids(text: str, ids: np.ndarray) -> str:
    shown = ", ".join(map(str, ids[:_MAX_IDS]))
    more = f" and {len(ids) - _MAX_IDS} more" if len(ids) > _MAX_IDS else ""
    return f"{text}: {shown}{more}"


def _short(exc: Exception) -> str:
    s = str(exc).strip().splitlines()
    return s[0] if s else type(exc).__name__
