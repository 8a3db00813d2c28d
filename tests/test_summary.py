"""spatialplan.summary and pipeline.stand_areas: the land base ``check`` reports.

The tiny layer (all stands 200 m x 200 m = 4 ha, UTM metres):

    S4 |                      y -400 .. -200, flat, no stream
    S1 | S2 | S3              y -200 .. 0; a stream along y = -100 crosses all three

S1 is flagged reserve, S3 lies on a 90 % slope (inoperable: above the 80 % cable limit
of the default slope classes, common practice, no source). A 15 m buffer each side of a
straight stream across a 200 m stand removes 200 m x 30 m = 0.6 ha (hand computation),
leaving 3.4 ha net in S1, S2 and S3.
"""

from __future__ import annotations

from pathlib import Path

import geopandas as gpd
import numpy as np
import pytest
import rasterio
import shapely
from affine import Affine
from click.testing import CliRunner

from spatialplan.cli import cli
from spatialplan.pipeline import build_problem, load_inputs, stand_areas
from spatialplan.settings import load_settings
from spatialplan.summary import summarise_inputs

UTM = "EPSG:32610"
X0, Y0 = 500_000.0, 5_200_000.0

# Hand computation: only S2 (3.4 ha net) and S4 (4.0 ha) are harvestable.
HARVESTABLE_HA = 3.4 + 4.0


def _box(x0: float, y0: float) -> shapely.Polygon:
    return shapely.box(X0 + x0, Y0 + y0, X0 + x0 + 200, Y0 + y0 + 200)


@pytest.fixture
def land_base(tmp_path: Path) -> dict[str, Path]:
    stands = gpd.GeoDataFrame(
        {
            "stand_id": ["S1", "S2", "S3", "S4"],
            "age": [60, 60, 60, 60],
            "stratum": ["S1", "S1", "S1", "S1"],
            "reserve": ["yes", "no", "no", "no"],
        },
        geometry=[_box(0, -200), _box(200, -200), _box(400, -200), _box(0, -400)],
        crs=UTM,
    )
    stands.to_file(tmp_path / "stands.gpkg", layer="stands", driver="GPKG")
    # DEM: 10 m cells from x = -100 to 700 and y = +100 to -500; a 10 % plane west of
    # x = 400 m and a 90 % plane east of it.
    cell = 10.0
    cols, rows = 80, 60
    x = -100 + (np.arange(cols) + 0.5) * cell
    z1 = np.where(x < 400, 0.1 * x, 40 + 0.9 * (x - 400))
    z = np.tile(z1, (rows, 1)).astype(np.float32)
    profile = {
        "driver": "GTiff",
        "height": rows,
        "width": cols,
        "count": 1,
        "dtype": "float32",
        "crs": UTM,
        "transform": Affine(cell, 0.0, X0 - 100, 0.0, -cell, Y0 + 100),
    }
    with rasterio.open(tmp_path / "dem.tif", "w", **profile) as dst:
        dst.write(z, 1)
    # The stream runs 100 m past the stands at both ends, so its round caps fall outside.
    line = shapely.LineString([(X0 - 100, Y0 - 100), (X0 + 700, Y0 - 100)])
    gpd.GeoDataFrame({"name": ["brook"]}, geometry=[line], crs=UTM).to_file(
        tmp_path / "streams.gpkg", layer="streams"
    )
    return {
        "stands": tmp_path / "stands.gpkg",
        "dem": tmp_path / "dem.tif",
        "streams": tmp_path / "streams.gpkg",
    }


def _settings(files: dict[str, Path]):
    return load_settings(
        None,
        {
            "fields.reserve_field": "reserve",
            "terrain.dem": str(files["dem"]),
            "terrain.streams": str(files["streams"]),
            "terrain.stream_buffer_m": 15.0,
            "economics.price_per_m3": 40.0,
        },
    )


def test_harvestable_net_area_by_hand(land_base: dict[str, Path], yields_csv: Path) -> None:
    inputs = load_inputs(land_base["stands"], yields_csv, _settings(land_base))
    areas = stand_areas(inputs)
    np.testing.assert_allclose(areas.area_ha, [4.0, 4.0, 4.0, 4.0], rtol=1e-9)
    np.testing.assert_allclose(areas.net_area_ha, [3.4, 3.4, 3.4, 4.0], rtol=1e-9)
    assert areas.reserve.tolist() == [True, False, False, False]
    assert areas.operable.tolist() == [True, True, False, True]
    assert areas.harvestable_net_area_ha == pytest.approx(HARVESTABLE_HA, rel=1e-9)

    sm = summarise_inputs(inputs)
    assert sm.usable and sm.n_stands == 4
    assert sm.total_area_ha == pytest.approx(16.0)
    assert sm.stream_buffer_ha == pytest.approx(3 * 0.6, rel=1e-9)
    assert sm.reserve_stands == 1 and sm.inoperable_stands == 1
    assert sm.harvestable_net_area_ha == pytest.approx(HARVESTABLE_HA, rel=1e-9)
    systems = sm.harvest_systems.set_index("harvest_system")
    assert systems.loc["inoperable", "stands"] == 1
    assert systems.loc["inoperable", "mean_slope_pct"] > 80.0
    assert sm.strata["area_ha"].sum() == pytest.approx(16.0)
    # The planning problem agrees: the stands it may cut at some age, by their net area.
    problem = build_problem(inputs).problem
    can_cut = problem.eligible_no_min_age.any(axis=1)
    assert problem.area_ha[can_cut].sum() == pytest.approx(HARVESTABLE_HA, rel=1e-9)


def test_check_prints_the_harvestable_net_area(
    land_base: dict[str, Path], yields_csv: Path
) -> None:
    f = land_base
    res = CliRunner().invoke(
        cli,
        ["check", str(f["stands"]), "--yields", str(yields_csv), "--reserve-field", "reserve",
         "--dem", str(f["dem"]), "--streams", str(f["streams"]), "--stream-buffer", "15"],
    )  # fmt: skip
    assert res.exit_code == 0, res.output
    line = next(ln for ln in res.output.splitlines() if "net harvestable area" in ln)
    assert f"{HARVESTABLE_HA:,.1f}" in line  # 7.4, not 10.2 (buffer in S1 counted twice)
    assert "Stream buffers remove 1.8 ha; net area 14.2 ha" in res.output
