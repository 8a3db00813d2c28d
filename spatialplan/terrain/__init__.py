"""Terrain: slope from a DEM, harvest system and operability per stand, stream buffers.

One module per part: :mod:`~spatialplan.terrain.slope` (Horn slope, geographic cell
size), :mod:`~spatialplan.terrain.dem` (reading a DEM block by block),
:mod:`~spatialplan.terrain.stand_stats` (statistics per stand),
:mod:`~spatialplan.terrain.operability` (harvest system and operability) and
:mod:`~spatialplan.terrain.streams` (stream-buffer net area). The public names are
re-exported here.

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

from spatialplan.terrain._common import INOPERABLE, UNKNOWN
from spatialplan.terrain.dem import DEFAULT_BLOCK_ROWS, GDAL_CACHE_MB, read_dem_slope
from spatialplan.terrain.slope import geographic_cell_size_m, horn_slope_percent
from spatialplan.terrain.stand_stats import TerrainResult, stand_terrain
from spatialplan.terrain.streams import BUFFER_TILE_M, NO_NET_AREA_HA, NetAreaResult, net_area

__all__ = [
    "BUFFER_TILE_M",
    "DEFAULT_BLOCK_ROWS",
    "GDAL_CACHE_MB",
    "INOPERABLE",
    "NO_NET_AREA_HA",
    "UNKNOWN",
    "NetAreaResult",
    "TerrainResult",
    "geographic_cell_size_m",
    "horn_slope_percent",
    "net_area",
    "read_dem_slope",
    "stand_terrain",
]
