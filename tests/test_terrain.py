"""Tests of spatialplan.terrain: Horn slope, per-stand terrain statistics, net area."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import geopandas as gpd
import numpy as np
import pytest
import rasterio
import shapely
from affine import Affine
from pyproj import Geod

from spatialplan.errors import InputError, SettingsError
from spatialplan.settings import SlopeClass, TerrainSettings, settings_from_dict
from spatialplan.terrain import (
    geographic_cell_size_m,
    horn_slope_percent,
    net_area,
    read_dem_slope,
    stand_terrain,
)

UTM = "EPSG:32610"
X0, Y0 = 500_000.0, 5_200_000.0  # upper-left corner of the test DEMs


def write_dem(
    path: Path,
    z: np.ndarray,
    cell: float = 10.0,
    crs: str | None = UTM,
    nodata: float | None = None,
    origin: tuple[float, float] = (X0, Y0),
) -> Path:
    """Write a tiny single-band float32 GeoTIFF."""
    profile = {
        "driver": "GTiff",
        "height": z.shape[0],
        "width": z.shape[1],
        "count": 1,
        "dtype": "float32",
        "transform": Affine(cell, 0.0, origin[0], 0.0, -cell, origin[1]),
        "nodata": nodata,
    }
    if crs is not None:
        profile["crs"] = crs
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(z.astype(np.float32), 1)
    return path


def grid_xy(shape: tuple[int, int], cell: float) -> tuple[np.ndarray, np.ndarray]:
    """Cell-centre coordinates (x east, y north) relative to the upper-left corner."""
    rows, cols = np.mgrid[0 : shape[0], 0 : shape[1]]
    return (cols + 0.5) * cell, -(rows + 0.5) * cell


def stands_frame(
    boxes: list[tuple[float, float, float, float]], crs: str = UTM
) -> gpd.GeoDataFrame:
    """Stands from (xmin, ymin, xmax, ymax) boxes given relative to the DEM's upper-left corner."""
    geoms = [shapely.box(X0 + a, Y0 + b, X0 + c, Y0 + d) for a, b, c, d in boxes]
    gdf = gpd.GeoDataFrame(
        {"stand_id": [f"S{i + 1}" for i in range(len(geoms))]}, geometry=geoms, crs=crs
    )
    gdf["area_ha"] = gdf.area / 10_000.0
    return gdf


# ------------------------------------------------------------------------------------------
# Horn slope on analytic surfaces
# ------------------------------------------------------------------------------------------
def test_planar_dem_gives_its_gradient_everywhere_inside():
    # Analytic: a plane rising 20 m per 100 m has a 20 % slope; Horn's weighted differences
    # are exact on any plane (Horn 1981, Proc. IEEE 69(1):14-47).
    x, y = grid_xy((30, 40), 10.0)
    s = horn_slope_percent(0.2 * x, 10.0, 10.0)
    assert np.allclose(s[1:-1, 1:-1], 20.0, rtol=1e-12)
    # The edge ring has no full 3x3 window and is NaN (gdaldem without -compute_edges).
    assert np.isnan(s[0]).all()
    assert np.isnan(s[-1]).all()
    assert np.isnan(s[:, 0]).all()
    assert np.isnan(s[:, -1]).all()
    # Oblique plane z = 0.2 x + 0.1 y: |grad| = sqrt(0.04 + 0.01) (analytic).
    s2 = horn_slope_percent(0.2 * x + 0.1 * y, 10.0, 10.0)
    assert np.allclose(s2[1:-1, 1:-1], 100 * np.sqrt(0.05), rtol=1e-12)
    # Non-square cells: the same plane sampled at 5 m x 20 m.
    rows, cols = np.mgrid[0:20, 0:20]
    z = 0.2 * (cols * 5.0) + 0.1 * (rows * 20.0)
    assert np.allclose(horn_slope_percent(z, 5.0, 20.0)[1:-1, 1:-1], 100 * np.sqrt(0.05))


def test_cone_gives_analytic_slope_away_from_apex():
    # Analytic: z = a r has |grad z| = a everywhere except the apex, so slope = 100 a %.
    a = 0.6
    n, cell = 201, 5.0
    x, y = grid_xy((n, n), cell)
    cx, cy = x[n // 2, n // 2], y[n // 2, n // 2]
    r = np.hypot(x - cx, y - cy)
    s = horn_slope_percent(a * r, cell, cell)
    far = (r > 20 * cell) & np.isfinite(s)
    # Horn's stencil has an O((h/r)^2) error on the cone's curved contours; 20 cells out it
    # is well below 0.5 %.
    assert far.sum() > 10_000
    assert np.allclose(s[far], 100 * a, rtol=5e-3)


def test_horn_matches_numpy_gradient_on_smooth_surface():
    # Reference: numpy.gradient (second-order central differences) on a smooth surface
    # z = A sin(x / L) cos(y / L) with L much larger than the cell.
    cell, big_l, amp = 10.0, 400.0, 150.0
    x, y = grid_xy((120, 150), cell)
    z = amp * np.sin(x / big_l) * np.cos(y / big_l)
    horn = horn_slope_percent(z, cell, cell)
    gy, gx = np.gradient(z, -cell, cell)  # rows run south, so d/dy uses -cell
    ref = 100 * np.hypot(gx, gy)
    inner = (slice(1, -1), slice(1, -1))
    assert np.allclose(horn[inner], ref[inner], atol=0.05)  # percentage points
    # and both agree with the analytic gradient (calculus)
    dzdx = amp / big_l * np.cos(x / big_l) * np.cos(y / big_l)
    dzdy = -amp / big_l * np.sin(x / big_l) * np.sin(y / big_l)
    assert np.allclose(horn[inner], 100 * np.hypot(dzdx, dzdy)[inner], atol=0.05)


def test_horn_nodata_blanks_the_cell_and_its_neighbours():
    # Same rule as gdaldem slope without -compute_edges (GDAL documentation of gdaldem):
    # a cell whose 3x3 window holds a nodata cell gets no slope.
    x, _ = grid_xy((12, 12), 10.0)
    z = 0.3 * x
    z[5, 6] = -9999.0
    z[9, 2] = np.nan
    s = horn_slope_percent(z, 10.0, 10.0, nodata=-9999.0)
    blank = np.zeros(z.shape, dtype=bool)
    blank[4:7, 5:8] = True
    blank[8:11, 1:4] = True
    blank[[0, -1], :] = True
    blank[:, [0, -1]] = True
    assert np.array_equal(np.isnan(s), blank)
    assert np.allclose(s[~blank], 30.0)


@pytest.mark.skipif(
    shutil.which("gdaldem") is None, reason="gdaldem (GDAL utilities) not installed"
)
def test_horn_matches_gdaldem(tmp_path):
    # Reference: GDAL's own `gdaldem slope -p` (Horn's method is its default algorithm).
    rng = np.random.default_rng(3)
    x, y = grid_xy((40, 50), 10.0)
    z = 80 * np.sin(x / 90.0) * np.cos(y / 130.0) + 0.05 * x + rng.normal(0, 0.5, x.shape)
    z[20:23, 30:33] = -9999.0
    src = write_dem(tmp_path / "dem.tif", z, nodata=-9999.0)
    out = tmp_path / "slope.tif"
    subprocess.run(["gdaldem", "slope", "-p", "-q", str(src), str(out)], check=True)
    with rasterio.open(out) as ds:
        ref = ds.read(1, masked=True).astype(float).filled(np.nan)
    ours, _, _, _ = read_dem_slope(src)
    assert np.array_equal(np.isnan(ours), np.isnan(ref))
    ok = np.isfinite(ref)
    assert np.allclose(ours[ok], ref[ok], rtol=1e-5, atol=1e-4)


# ------------------------------------------------------------------------------------------
# Reading DEMs
# ------------------------------------------------------------------------------------------
def test_read_dem_slope_mask_and_transform(tmp_path):
    x, _ = grid_xy((10, 10), 10.0)
    z = 0.25 * x
    z[4, 4] = -32768.0
    path = write_dem(tmp_path / "dem.tif", z, nodata=-32768.0)
    slope, transform, crs, mask = read_dem_slope(path, block_rows=3)  # blocks with halos
    assert crs.to_epsg() == 32610
    assert transform.a == 10.0
    assert mask.sum() == 1
    assert mask[4, 4]
    assert np.isnan(slope[3:6, 3:6]).all()
    inner = np.zeros_like(mask)
    inner[1:-1, 1:-1] = True
    inner[3:6, 3:6] = False
    assert np.allclose(slope[inner], 25.0, rtol=1e-6)  # analytic plane, float32 output


def test_read_dem_slope_elevations_in_feet(tmp_path):
    # 1 ft = 0.3048 m exactly (international foot); a plane of 0.2 ft per m is 6.096 %.
    x, _ = grid_xy((8, 8), 10.0)
    path = write_dem(tmp_path / "dem.tif", 0.2 * x)
    slope, *_ = read_dem_slope(path, elevation_unit_m=0.3048)
    assert np.allclose(slope[1:-1, 1:-1], 20 * 0.3048, rtol=1e-6)


def test_read_dem_slope_errors_name_the_file(tmp_path):
    with pytest.raises(InputError, match=r"not found.*nope.tif"):
        read_dem_slope(tmp_path / "nope.tif")
    txt = tmp_path / "notes.tif"
    txt.write_text("not a raster")
    with pytest.raises(InputError, match=r"notes.tif.*not a raster"):
        read_dem_slope(txt)
    nocrs = write_dem(tmp_path / "nocrs.tif", np.zeros((5, 5)), crs=None)
    with pytest.raises(InputError, match=r"nocrs.tif has no CRS"):
        read_dem_slope(nocrs)


def test_geographic_cell_size_matches_geodesic_distances():
    # Reference: pyproj.Geod (Karney's geodesics on WGS 84) over one cell of 1 arc-second.
    g = Geod(ellps="WGS84")
    d = 1.0 / 3600.0
    for lat in (0.0, 35.0, 60.0, -47.5):
        dx, dy = geographic_cell_size_m(np.array([lat]), d, -d)
        _, _, ref_x = g.inv(-d / 2, lat, d / 2, lat)
        _, _, ref_y = g.inv(0.0, lat - d / 2, 0.0, lat + d / 2)
        assert dx[0] == pytest.approx(ref_x, rel=1e-6)
        assert dy[0] == pytest.approx(ref_y, rel=1e-6)


def test_geographic_dem_slope_in_metres(tmp_path):
    # A DEM in degrees whose elevation rises 0.2 m per metre northwards is a 20 % slope.
    # Distances along the meridian from pyproj.Geod (reference), not from the code under test.
    g = Geod(ellps="WGS84")
    d = 1.0 / 3600.0
    n = 12
    lat_top = 46.0
    lats = lat_top - (np.arange(n) + 0.5) * d
    north_m = np.array([g.inv(7.0, lats[-1], 7.0, la)[2] for la in lats])
    z = np.repeat((0.2 * north_m)[:, None], n, axis=1)
    path = write_dem(tmp_path / "geo.tif", z, cell=d, crs="EPSG:4326", origin=(7.0, lat_top))
    slope, *_ = read_dem_slope(path)
    # float32 elevations of ~60 m carry ~4e-6 m rounding over 61 m steps: tolerance 1e-4.
    assert np.allclose(slope[1:-1, 1:-1], 20.0, rtol=1e-4)


# ------------------------------------------------------------------------------------------
# Per-stand statistics
# ------------------------------------------------------------------------------------------
def three_zone_dem(tmp_path: Path) -> Path:
    """100 x 100 cells of 10 m: 10 % slope for x < 300 m, 50 % to 600 m, 90 % beyond."""
    x, _ = grid_xy((100, 100), 10.0)
    z = np.where(
        x < 300,
        0.1 * x,
        np.where(x < 600, 30 + 0.5 * (x - 300), 180 + 0.9 * (x - 600)),
    )
    return write_dem(tmp_path / "zones.tif", z)


def test_stand_mean_slope_on_planar_zones(tmp_path):
    # Analytic: each zone is a plane; stands kept two cells away from the kinks and edges.
    dem = three_zone_dem(tmp_path)
    st = stands_frame(
        [
            (50, -500, 250, -300),  # 10 % zone
            (350, -500, 550, -300),  # 50 % zone
            (650, -500, 950, -300),  # 90 % zone
        ]
    )
    res = stand_terrain(st, TerrainSettings(), dem)
    df = res.stands
    assert np.allclose(df["slope_pct_mean"], [10.0, 50.0, 90.0], rtol=1e-5)
    # Default classes, ground up to 35 %, cable up to 80 %, steeper inoperable (common
    # practice, local rules differ, no single source).
    assert list(df["harvest_system"]) == ["ground", "cable", "inoperable"]
    assert list(df["operable"]) == [True, True, False]
    assert np.allclose(df["steep_share"], [0.0, 1.0, 1.0])  # steep = above 35 %
    assert list(df["n_cells"]) == [20 * 20, 20 * 20, 30 * 20]  # cell centres inside each box
    assert np.allclose(df["dem_cover_share"], 1.0)
    assert any("inoperable" in m and "S3" in m for m in res.messages)
    # Shares of all classes plus inoperable sum to one per stand.
    share_cols = ["share_ground", "share_cable", "share_inoperable"]
    assert np.allclose(df[share_cols].sum(axis=1), 1.0)


def test_costs_and_stands_in_another_crs(tmp_path):
    dem = three_zone_dem(tmp_path)
    st = stands_frame([(50, -500, 250, -300), (350, -500, 550, -300)]).to_crs("EPSG:32611")
    ts = TerrainSettings(
        slope_classes=(SlopeClass("ground", 35.0, 12.0), SlopeClass("cable", 80.0, 30.0))
    )
    df = stand_terrain(st, ts, dem).stands
    # Reprojection moves cell-centre membership only at the boundary; the zones are planes.
    assert np.allclose(df["slope_pct_mean"], [10.0, 50.0], rtol=1e-5)
    assert list(df["harvest_cost_per_m3"]) == [12.0, 30.0]
    # Classes without a cost leave it to [economics] (NaN falls through there).
    assert df_default_costs(st, dem).isna().all()


def df_default_costs(st: gpd.GeoDataFrame, dem: Path):
    return stand_terrain(st, TerrainSettings(), dem).stands["harvest_cost_per_m3"]


def test_harvest_system_by_cover_share(tmp_path):
    # A stand 75 % on the 10 % zone and 25 % on the 50 % zone (x 150..350 m, kink at 300 m;
    # cells of the kink column x = 295 m see both planes and have slope between 10 and 50).
    dem = three_zone_dem(tmp_path)
    st = stands_frame([(100, -500, 300, -300), (300, -500, 500, -300)])
    base = stand_terrain(st, TerrainSettings(), dem).stands
    ground_share = base.loc[0, "share_ground"]
    assert 0.9 < ground_share <= 1.0
    mixed = stands_frame([(150, -500, 350, -300)])
    df_hi = stand_terrain(mixed, TerrainSettings(system_cover_share=0.9), dem).stands
    df_lo = stand_terrain(mixed, TerrainSettings(system_cover_share=0.6), dem).stands
    assert 0.6 < df_hi.loc[0, "share_ground"] < 0.9
    assert df_hi.loc[0, "harvest_system"] == "cable"
    assert df_lo.loc[0, "harvest_system"] == "ground"
    # Inoperable only when more than max_inoperable_share lies above the last class.
    straddle = stands_frame([(500, -500, 700, -300)])  # half 50 %, half 90 %
    op = stand_terrain(straddle, TerrainSettings(max_inoperable_share=0.6), dem).stands
    inop = stand_terrain(straddle, TerrainSettings(max_inoperable_share=0.3), dem).stands
    assert op.loc[0, "operable"]
    assert op.loc[0, "harvest_system"] == "cable"
    assert not inop.loc[0, "operable"]
    assert inop.loc[0, "harvest_system"] == "inoperable"


def test_stands_with_holes_and_several_parts(tmp_path):
    # Analytic: a stand of two equal parts on the 10 % and 50 % planes has a mean of 30 %;
    # a hole removes its cells from the count.
    dem = three_zone_dem(tmp_path)
    two = shapely.MultiPolygon(
        [
            shapely.box(X0 + 50, Y0 - 500, X0 + 250, Y0 - 300),
            shapely.box(X0 + 350, Y0 - 500, X0 + 550, Y0 - 300),
        ]
    )
    ring = shapely.box(X0 + 50, Y0 - 900, X0 + 250, Y0 - 700).difference(
        shapely.box(X0 + 100, Y0 - 850, X0 + 200, Y0 - 750)
    )
    st = gpd.GeoDataFrame({"stand_id": ["M", "H"]}, geometry=[two, ring], crs=UTM)
    st["area_ha"] = st.area / 10_000.0
    df = stand_terrain(st, TerrainSettings(), dem).stands
    assert df.loc[0, "slope_pct_mean"] == pytest.approx(30.0, rel=1e-5)
    assert df.loc[0, "share_ground"] == pytest.approx(0.5)
    assert df.loc[0, "harvest_system"] == "cable"  # ground covers only half (< 0.8)
    assert df.loc[1, "n_cells"] == 20 * 20 - 10 * 10
    assert df.loc[1, "dem_cover_share"] == pytest.approx(1.0)


def test_stand_terrain_on_geographic_dem(tmp_path):
    # Degree DEM with a 20 % northward plane (meridian distances from pyproj.Geod) under
    # stands in UTM: the per-row cell areas weight the means; the plane gives 20 % (analytic).
    g = Geod(ellps="WGS84")
    d = 1.0 / 3600.0
    n = 60
    lon0, lat_top = -123.0, 46.0
    lats = lat_top - (np.arange(n) + 0.5) * d
    north_m = np.array([g.inv(lon0, lats[-1], lon0, la)[2] for la in lats])
    z = np.repeat((0.2 * north_m)[:, None], n, axis=1)
    dem = write_dem(tmp_path / "geo.tif", z, cell=d, crs="EPSG:4326", origin=(lon0, lat_top))
    box = shapely.box(lon0 + 10 * d, lat_top - 50 * d, lon0 + 50 * d, lat_top - 10 * d)
    st = gpd.GeoDataFrame({"stand_id": ["G"]}, geometry=[box], crs="EPSG:4326").to_crs(UTM)
    st["area_ha"] = st.area / 10_000.0
    df = stand_terrain(st, TerrainSettings(), dem).stands
    assert df.loc[0, "slope_pct_mean"] == pytest.approx(20.0, rel=1e-4)
    assert df.loc[0, "n_cells"] == pytest.approx(40 * 40, abs=80)  # reprojected outline
    assert df.loc[0, "dem_cover_share"] == pytest.approx(1.0, abs=0.03)


def test_stands_outside_dem_and_tiny_stands(tmp_path):
    dem = three_zone_dem(tmp_path)
    st = stands_frame(
        [
            (50, -500, 250, -300),
            (5000, -500, 5200, -300),  # far east of the DEM
            (401, -402, 408, -396),  # 7 m x 6 m inside the 50 % zone: no cell centre inside
        ]
    )
    res = stand_terrain(st, TerrainSettings(), dem)
    df = res.stands
    assert df.loc[1, "outside_dem"]
    assert np.isnan(df.loc[1, "slope_pct_mean"])
    assert df.loc[1, "harvest_system"] == "unknown"
    assert df.loc[1, "operable"]
    assert any("S2" in m and "no DEM cell" in m for m in res.messages)
    # The tiny stand is sampled at its interior point.
    assert df.loc[2, "n_cells"] == 0
    assert not df.loc[2, "outside_dem"]
    assert df.loc[2, "slope_pct_mean"] == pytest.approx(50.0, rel=1e-5)
    assert df.loc[2, "harvest_system"] == "cable"
    assert any("S3" in m and "one interior point" in m for m in res.messages)


def test_stand_over_nodata_and_partial_cover(tmp_path):
    x, _ = grid_xy((60, 60), 10.0)
    z = 0.2 * x
    z[:, 30:] = -9999.0  # east half has no data
    dem = write_dem(tmp_path / "half.tif", z, nodata=-9999.0)
    st = stands_frame([(50, -300, 250, -100), (350, -300, 550, -100), (200, -300, 400, -100)])
    res = stand_terrain(st, TerrainSettings(), dem, block_rows=7)
    df = res.stands
    assert df.loc[0, "slope_pct_mean"] == pytest.approx(20.0, rel=1e-5)
    assert df.loc[1, "outside_dem"]
    # Third stand: x 200..400 m, valid cells only for x centres < 290 m (column 29 borders
    # nodata): 9 of 20 columns.
    assert df.loc[2, "dem_cover_share"] == pytest.approx(9 / 20)
    assert df.loc[2, "slope_pct_mean"] == pytest.approx(20.0, rel=1e-5)
    assert any("less than half covered" in m and "S3" in m for m in res.messages)


def test_stand_terrain_needs_a_dem_and_valid_classes(tmp_path):
    st = stands_frame([(0, -100, 100, 0)])
    with pytest.raises(SettingsError, match=r"terrain.dem"):
        stand_terrain(st, TerrainSettings())
    dem = three_zone_dem(tmp_path)
    bad = TerrainSettings(slope_classes=(SlopeClass("a", 30.0), SlopeClass("a", 60.0)))
    with pytest.raises(SettingsError, match=r"unique"):
        stand_terrain(st, bad, dem)


def test_new_terrain_settings_are_range_checked():
    with pytest.raises(SettingsError, match=r"terrain.system_cover_share"):
        settings_from_dict({"terrain": {"system_cover_share": 0.0}})
    with pytest.raises(SettingsError, match=r"terrain.elevation_unit_m"):
        settings_from_dict({"terrain": {"elevation_unit_m": -1.0}})


# ------------------------------------------------------------------------------------------
# Net area
# ------------------------------------------------------------------------------------------
def write_streams(path: Path, lines: list[shapely.LineString], **cols: list) -> Path:
    gpd.GeoDataFrame(cols, geometry=lines, crs=UTM).to_file(path, layer="streams")
    return path


def square_stand() -> gpd.GeoDataFrame:
    return stands_frame([(0, -200, 200, 0)])  # 200 m x 200 m = 4 ha


def hline(y: float) -> shapely.LineString:
    # Extends 100 m beyond the square on both sides so the round caps fall outside.
    return shapely.LineString([(X0 - 100, Y0 + y), (X0 + 300, Y0 + y)])


def vline(x: float) -> shapely.LineString:
    return shapely.LineString([(X0 + x, Y0 + 100), (X0 + x, Y0 - 300)])


def test_net_area_square_cut_by_one_stream(tmp_path):
    # Analytic: 15 m each side of a straight line across a 200 m square removes
    # 200 m x 30 m = 0.6 ha of 4 ha, leaving 3.4 ha.
    streams = write_streams(tmp_path / "s.gpkg", [hline(-100)])
    res = net_area(square_stand(), streams, TerrainSettings(stream_buffer_m=15.0))
    row = res.stands.iloc[0]
    assert row["area_ha"] == pytest.approx(4.0)
    assert row["buffer_area_ha"] == pytest.approx(0.6, rel=1e-9)
    assert row["net_area_ha"] == pytest.approx(3.4, rel=1e-9)
    assert not row["no_net_area"]
    assert shapely.area(res.buffer) == pytest.approx(400 * 30 + np.pi * 15**2, rel=1e-2)


def test_net_area_crossing_streams_count_overlap_once(tmp_path):
    # Analytic: two perpendicular 30 m wide strips across the square cover
    # 2 x 0.6 ha - 30 m x 30 m = 1.11 ha.
    streams = write_streams(tmp_path / "s.gpkg", [hline(-100), vline(100)])
    res = net_area(square_stand(), streams, TerrainSettings(stream_buffer_m=15.0))
    assert res.stands.loc[0, "buffer_area_ha"] == pytest.approx(1.11, rel=1e-9)
    assert res.stands.loc[0, "net_area_ha"] == pytest.approx(2.89, rel=1e-9)


def test_net_area_widths_by_class_and_by_field(tmp_path):
    # Analytic: class A 15 m each side (0.6 ha) + class B 5 m each side (0.2 ha) = 0.8 ha.
    streams = write_streams(
        tmp_path / "s.gpkg", [hline(-50), hline(-150)], cls=["A", "B"], width=[15.0, 5.0]
    )
    by_class = TerrainSettings(stream_buffer_field="cls", stream_buffer_by_class={"A": 15, "B": 5})
    res = net_area(square_stand(), streams, by_class)
    assert res.stands.loc[0, "net_area_ha"] == pytest.approx(3.2, rel=1e-9)
    by_field = TerrainSettings(stream_buffer_field="width")
    assert net_area(square_stand(), streams, by_field).stands.loc[0, "net_area_ha"] == (
        pytest.approx(3.2, rel=1e-9)
    )
    missing = TerrainSettings(stream_buffer_field="cls", stream_buffer_by_class={"A": 15})
    with pytest.raises(InputError, match=r"stream_buffer_by_class: B"):
        net_area(square_stand(), streams, missing)
    with pytest.raises(InputError, match=r"'order' .* not found"):
        net_area(square_stand(), streams, TerrainSettings(stream_buffer_field="order"))


def test_net_area_stand_fully_buffered_and_other_crs(tmp_path):
    # A 20 m strip along a stream with a 15 m buffer has no net area left (analytic).
    square = shapely.box(X0, Y0 - 200, X0 + 200, Y0)
    strip = shapely.box(X0, Y0 - 110, X0 + 200, Y0 - 90)
    st = gpd.GeoDataFrame(
        {"stand_id": ["S1", "S2"]}, geometry=[square.difference(strip), strip], crs=UTM
    )
    st["area_ha"] = st.area / 10_000.0
    lines = gpd.GeoDataFrame(geometry=[hline(-100)], crs=UTM).to_crs("EPSG:4326")
    path = tmp_path / "s.geojson"
    lines.to_file(path)
    res = net_area(st, path, TerrainSettings(stream_buffer_m=15.0))
    df = res.stands
    assert df.loc[1, "no_net_area"]
    assert df.loc[1, "net_area_ha"] == 0.0
    assert df.loc[1, "buffer_area_ha"] == pytest.approx(0.4, rel=1e-4)
    # First stand (4 ha minus the 0.4 ha strip) keeps 2 x 200 m x 5 m outside the strip
    # covered: 3.6 - 0.2 = 3.4 ha. Reprojection of the line bends it slightly: rel 1e-4.
    assert df.loc[0, "net_area_ha"] == pytest.approx(3.4, rel=1e-4)
    assert any("no net area" in m and "S2" in m for m in res.messages)


def test_net_area_input_errors(tmp_path):
    with pytest.raises(InputError, match=r"streams file not found.*none.gpkg"):
        net_area(square_stand(), tmp_path / "none.gpkg", TerrainSettings())
    pts = tmp_path / "pts.gpkg"
    gpd.GeoDataFrame(geometry=[shapely.Point(X0, Y0)], crs=UTM).to_file(pts)
    with pytest.raises(InputError, match=r"pts.gpkg has 1 point feature"):
        net_area(square_stand(), pts, TerrainSettings())
    two = write_streams(tmp_path / "two.gpkg", [hline(-100)])
    gpd.GeoDataFrame(geometry=[hline(-20)], crs=UTM).to_file(two, layer="other")
    with pytest.raises(InputError, match=r"2 layers"):
        net_area(square_stand(), two, TerrainSettings())
    res = net_area(square_stand(), two, TerrainSettings(), layer="other")
    # The strip 5..35 m below the square's top edge: 200 m x 30 m (analytic).
    assert res.stands.loc[0, "buffer_area_ha"] == pytest.approx(0.6, rel=1e-9)


def test_grouped_statistics_match_per_stand_masks(tmp_path):
    # Reference: rasterio.features.geometry_mask, one stand at a time, over the slope grid;
    # the grouped, block-wise code (small blocks with halos) must give the same means.
    from rasterio.features import geometry_mask

    from spatialplan.synthetic import voronoi_forest

    st = voronoi_forest(30, seed=4, mean_area_ha=1.0, origin=(X0, Y0 - 600.0))
    st["area_ha"] = st.area / 10_000.0
    x, y = grid_xy((64, 64), 10.0)
    z = 60 * np.sin(x / 70.0) * np.cos(y / 110.0) + 0.2 * x
    dem = write_dem(tmp_path / "dem.tif", z)
    slope, transform, _, _ = read_dem_slope(dem)
    df = stand_terrain(st, TerrainSettings(), dem, block_rows=5).stands
    assert (df["n_cells"] > 5).all()
    for i, geom in enumerate(st.geometry):
        inside = ~geometry_mask([geom], slope.shape, transform) & np.isfinite(slope)
        assert df.loc[i, "n_cells"] == inside.sum()
        assert df.loc[i, "slope_pct_mean"] == pytest.approx(slope[inside].mean(), rel=1e-5)
        assert df.loc[i, "steep_share"] == pytest.approx((slope[inside] > 35).mean())
