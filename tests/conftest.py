"""Shared fixtures: tiny generated layers written into each test's tmp_path."""

from __future__ import annotations

import hashlib
from pathlib import Path

import geopandas as gpd
import pandas as pd
import pytest
import shapely

from spatialplan.synthetic import synthetic_yield_table

CRS = "EPSG:32610"


def grid_stands(
    nx: int = 4,
    ny: int = 3,
    size_m: float = 200.0,
    crs: str | None = CRS,
    origin: tuple[float, float] = (500_000.0, 5_000_000.0),
) -> gpd.GeoDataFrame:
    """A grid of square stands (4 ha each at 200 m), ids S01.., ages 10, 20, ..."""
    x0, y0 = origin
    geoms, ids, ages, strata = [], [], [], []
    k = 0
    for j in range(ny):
        for i in range(nx):
            geoms.append(
                shapely.box(
                    x0 + i * size_m, y0 + j * size_m, x0 + (i + 1) * size_m, y0 + (j + 1) * size_m
                )
            )
            k += 1
            ids.append(f"S{k:02d}")
            ages.append(10 * k)
            strata.append("S1" if (i + j) % 2 == 0 else "S2")
    return gpd.GeoDataFrame(
        {"stand_id": ids, "age": ages, "stratum": strata}, geometry=geoms, crs=crs
    )


def write_layer(gdf: gpd.GeoDataFrame, path: Path, layer: str = "stands") -> Path:
    """Write ``gdf`` with the driver implied by the suffix."""
    if path.suffix == ".gpkg":
        gdf.to_file(path, layer=layer, driver="GPKG")
    else:
        gdf.to_file(path)
    return path


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.fixture
def yields_csv(tmp_path: Path) -> Path:
    """Yield table for strata S1..S5 (invented Chapman-Richards curves)."""
    p = tmp_path / "yields.csv"
    synthetic_yield_table().to_csv(p, index=False)
    return p


@pytest.fixture
def grid_gpkg(tmp_path: Path) -> Path:
    return write_layer(grid_stands(), tmp_path / "stands.gpkg")


def read_csv(path: Path) -> pd.DataFrame:
    return pd.read_csv(path)
