"""Percent slope by Horn's 3x3 method, and the cell size in metres of a geographic grid.

Horn 1981, "Hill shading and the reflectance map", Proc. IEEE 69(1):14-47; the default
method of GDAL's ``gdaldem slope``. The outer ring of cells and every cell whose 3x3 window
touches a nodata cell get no slope (NaN), as ``gdaldem`` does without ``-compute_edges``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from pyproj import CRS

__all__ = ["geographic_cell_size_m", "horn_slope_percent"]


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
