"""Names and small helpers shared by the terrain modules (private to the package)."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
from pyproj import CRS

#: ``harvest_system`` of a stand steeper than the last slope class allows.
INOPERABLE = "inoperable"
#: ``harvest_system`` of a stand outside the DEM.
UNKNOWN = "unknown"
#: Stand ids listed in one message at most.
MAX_IDS = 20


def stand_ids(stands: pd.DataFrame) -> np.ndarray:
    if "stand_id" in stands.columns:
        return stands["stand_id"].astype(str).to_numpy(dtype=object)
    return np.array([str(i) for i in range(len(stands))], dtype=object)


def geometry_area_ha(stands: gpd.GeoDataFrame) -> np.ndarray:
    from spatialplan.inventory import polygon_area_ha

    return polygon_area_ha(np.asarray(stands.geometry.values), CRS.from_user_input(stands.crs))


def unit_to_metre(crs: CRS) -> float:
    from spatialplan.inventory import unit_to_metre

    return unit_to_metre(crs)


def with_ids(text: str, ids: np.ndarray) -> str:
    shown = ", ".join(map(str, ids[:MAX_IDS]))
    more = f" and {len(ids) - MAX_IDS} more" if len(ids) > MAX_IDS else ""
    return f"{text}: {shown}{more}"


def short_error(exc: Exception) -> str:
    s = str(exc).strip().splitlines()
    return s[0] if s else type(exc).__name__
