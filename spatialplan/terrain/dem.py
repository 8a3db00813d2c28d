"""Reading a DEM block by block, with its slope (:mod:`spatialplan.terrain.slope`)."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import rasterio.features
import rasterio.windows
from pyproj import CRS
from rasterio.errors import RasterioIOError

from spatialplan.errors import InputError
from spatialplan.terrain._common import short_error, unit_to_metre
from spatialplan.terrain.slope import geographic_cell_size_m, horn_slope_percent

__all__ = ["DEFAULT_BLOCK_ROWS", "GDAL_CACHE_MB", "DemReader", "read_dem_slope"]


#: Rows of the DEM processed at a time (with a one-row halo on each side).
DEFAULT_BLOCK_ROWS = 256
#: GDAL block cache (MB) while a DEM block is read. Each row is read once (plus a halo), so
#: a large cache only holds memory (GDAL's default is 5 % of RAM). Only the reads are capped:
#: GDAL's rasterizer sizes its work chunks from the same setting and slows down under a cap.
GDAL_CACHE_MB = 128


class DemReader:
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
            msg = f"DEM file {p} is not a raster GDAL can read ({short_error(exc)})"
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
            unit = unit_to_metre(self.crs)
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

    def __enter__(self) -> DemReader:
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
    with DemReader(dem_path, elevation_unit_m) as dem:
        h, w = dem.ds.height, dem.ds.width
        slope = np.empty((h, w), dtype=np.float32)
        mask = np.empty((h, w), dtype=bool)
        for r0, r1, s in dem.blocks(block_rows):
            slope[r0:r1] = s
            mask[r0:r1] = dem.nodata_rows(r0, r1)
        return slope, dem.ds.transform, dem.ds.crs, mask
