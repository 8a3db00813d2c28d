"""Net harvestable area per stand after stream buffers.

Stream lines are buffered on each side (one width, a width per feature, or a width per
stream class), the buffers are dissolved, and the buffer area inside each stand is removed
from its area: ``net_area_ha = area_ha - buffer_area_ha``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely
from pyproj import CRS

from spatialplan.errors import InputError, SettingsError
from spatialplan.settings import TerrainSettings
from spatialplan.terrain._common import (
    MAX_IDS,
    geometry_area_ha,
    stand_ids,
    unit_to_metre,
    with_ids,
)

__all__ = ["BUFFER_TILE_M", "NO_NET_AREA_HA", "NetAreaResult", "net_area"]


#: A stand with less net area than this (ha, i.e. 1 m2) counts as having none left.
NO_NET_AREA_HA = 1.0e-4
#: Side of the tiles the dissolved stream buffer is cut into before it meets the stands, so
#: that each stand is intersected with small pieces instead of one network-wide polygon.
BUFFER_TILE_M = 1000.0


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
    unit = unit_to_metre(stand_crs)
    geoms = np.asarray(lines.geometry.values, dtype=object)
    keep = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms)) & (widths_m > 0)
    geoms, widths_m = geoms[keep], widths_m[keep]

    n = len(stands)
    ids = stand_ids(stands)
    sgeoms = np.asarray(stands.geometry.values, dtype=object)
    bad = ~shapely.is_valid(sgeoms) & ~shapely.is_missing(sgeoms)
    if bad.any():
        sgeoms = sgeoms.copy()
        sgeoms[bad] = shapely.make_valid(sgeoms[bad])
    if "area_ha" in stands.columns:
        area_ha = pd.to_numeric(stands["area_ha"], errors="coerce").to_numpy(dtype=float)
    else:
        area_ha = geometry_area_ha(stands)

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
            with_ids(
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
                f"{', '.join(missing[:MAX_IDS])}"
            )
            raise InputError(msg)
        return keys.map(by_class).to_numpy(dtype=float)
    widths = pd.to_numeric(values, errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(widths) | (widths < 0)
    if bad.any():
        rows = np.flatnonzero(bad)
        msg = (
            f"streams file {path}: field '{fld}' must hold a buffer width in metres (>= 0); "
            f"{len(rows)} feature(s) do not, rows {', '.join(map(str, rows[:MAX_IDS]))}"
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
