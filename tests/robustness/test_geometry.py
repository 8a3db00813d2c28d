"""Broken or unusual geometry: repaired with a warning, excluded with a warning, or refused."""

from __future__ import annotations

from pathlib import Path

import pyogrio
import pytest
import shapely
from pyproj import Geod

from tests.conftest import grid_stands, write_layer
from tests.robustness.conftest import FAST, GuardedCli, assert_user_error

X0, Y0 = 500_000.0, 5_000_000.0  # lower-left corner of grid_stands (200 m cells, 4 ha)


def bow_tie(x: float, y: float, size: float = 200.0) -> shapely.Polygon:
    """A square whose ring crosses itself: two triangles meeting at the centre."""
    return shapely.Polygon([(x, y), (x + size, y + size), (x + size, y), (x, y + size)])


def test_points_instead_of_polygons(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g = grid_stands()
    g.geometry = g.centroid
    p = write_layer(g, tmp_path / "points.gpkg")
    run.guard(p, yields)
    assert_user_error(
        run("check", p, "--yields", yields), 1, "must be polygons", "Point", "right layer"
    )


def test_lines_instead_of_polygons(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g = grid_stands()
    g.geometry = g.boundary
    p = write_layer(g, tmp_path / "lines.gpkg")
    run.guard(p, yields)
    assert_user_error(run("check", p, "--yields", yields), 1, "must be polygons", "LineString")


def test_some_points_among_polygons_are_named(
    run: GuardedCli, tmp_path: Path, yields: Path
) -> None:
    g = grid_stands()
    g.loc[4, "geometry"] = shapely.Point(X0, Y0)
    p = tmp_path / "mixed.geojson"  # GeoPackage layers hold one geometry type; GeoJSON mixes
    g.to_file(p, driver="GeoJSON")
    run.guard(p, yields)
    res = run("check", p, "--yields", yields)
    assert res.exit_code == 1
    assert "must be polygons" in res.output and "S05" in res.output


def broken_layer() -> tuple[object, dict[str, float]]:
    """The grid with one stand of every kind of broken or unusual geometry.

    Returns the frame and the area (ha) each kept stand must have, by hand: a bow-tie of a
    200 m square is two triangles of a quarter square each (2 ha); a 200 m square with a
    100 m square hole is 3 ha; two 50 m squares are 0.5 ha.
    """
    g = grid_stands()
    g.loc[0, "geometry"] = bow_tie(X0, Y0)  # S01 -> repaired
    g.loc[1, "geometry"] = None  # S02 -> excluded
    g.loc[2, "geometry"] = shapely.Polygon()  # S03 -> excluded
    g.loc[3, "geometry"] = shapely.Polygon([(X0 + 600, Y0), (X0 + 700, Y0), (X0 + 800, Y0)])  # S04
    g.loc[4, "geometry"] = shapely.MultiPolygon(
        [
            shapely.box(X0, Y0 + 200, X0 + 50, Y0 + 250),
            shapely.box(X0 + 100, Y0 + 300, X0 + 150, Y0 + 350),
        ]
    )  # S05 multipolygon
    g.loc[5, "geometry"] = shapely.box(X0 + 200, Y0 + 200, X0 + 400, Y0 + 400).difference(
        shapely.box(X0 + 250, Y0 + 250, X0 + 350, Y0 + 350)
    )  # S06 with a hole
    g.loc[7, "geometry"] = g.loc[6, "geometry"]  # S08 duplicates S07
    # S10 widened west by 100 m over half of S09: 300 m x 200 m = 6 ha, 2 ha shared
    g.loc[9, "geometry"] = shapely.box(X0 + 100, Y0 + 400, X0 + 400, Y0 + 600)
    areas = {"S01": 2.0, "S05": 0.5, "S06": 3.0, "S07": 4.0, "S08": 4.0, "S10": 6.0, "S12": 4.0}
    return g, areas


def test_check_reports_every_broken_geometry(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g, _ = broken_layer()
    p = write_layer(g, tmp_path / "broken.gpkg")
    run.guard(p, yields)
    res = run("check", p, "--yields", yields)
    assert res.exit_code == 0, res.output  # all repairable or excludable: warnings only
    out = res.output
    assert "repaired with make_valid" in out and "S01" in out
    assert "null or empty geometry excluded: S02, S03" in out
    assert "zero area" in out and "S04" in out
    assert "S07~S08" in out and "duplicate or overlapping" in out
    assert "S09~S10 (2.000 ha)" in out


def test_plan_on_broken_geometry_is_verified(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g, areas = broken_layer()
    p = write_layer(g, tmp_path / "broken.gpkg")
    run.guard(p, yields)
    out = tmp_path / "plan.gpkg"
    res = run("plan", p, "--yields", yields, "--out", out, *FAST, "--max-opening", "10", "--no-map")
    assert res.exit_code == 0, res.output
    sched = pyogrio.read_dataframe(out, layer="schedule")
    ids = set(sched["stand_id"])
    assert ids.isdisjoint({"S02", "S03", "S04"})  # excluded, as the warnings said
    assert len(ids) == 9
    got = dict(zip(sched["stand_id"], sched["area_ha"], strict=True))
    for sid, ha in areas.items():
        assert got[sid] == pytest.approx(ha, rel=1e-9), sid
    res = run("verify", out)
    assert res.exit_code == 0, res.output
    assert "passed: all rules hold" in res.output


def test_coordinates_in_degrees(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g = grid_stands().to_crs(4326)
    p = write_layer(g, tmp_path / "wgs84.gpkg")
    run.guard(p, yields)
    out = tmp_path / "plan.gpkg"
    res = run("plan", p, "--yields", yields, "--out", out, *FAST, "--no-map")
    assert res.exit_code == 0, res.output
    sched = pyogrio.read_dataframe(out, layer="schedule")
    assert sched.crs.to_epsg() == 4326  # outputs keep the input CRS
    # Areas are ellipsoidal (pyproj.Geod on WGS 84 is the reference).
    geod = Geod(ellps="WGS84")
    ref = [abs(geod.geometry_area_perimeter(x)[0]) / 1e4 for x in g.geometry]
    assert sched["area_ha"].to_numpy() == pytest.approx(ref, rel=1e-6)
    assert run("verify", out).exit_code == 0


@pytest.mark.filterwarnings("ignore:'crs' was not provided:UserWarning")
def test_layer_without_crs(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    p = write_layer(grid_stands(crs=None), tmp_path / "nocrs.gpkg")
    run.guard(p, yields)
    assert_user_error(
        run("check", p, "--yields", yields), 1, "no coordinate reference system", "--crs EPSG:"
    )


def test_huge_coordinates(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g = grid_stands()
    g.geometry = g.geometry.translate(1e12, 1e12)
    p = write_layer(g, tmp_path / "huge.gpkg")
    run.guard(p, yields)
    assert_user_error(run("check", p, "--yields", yields), 1, "implausible", "check the CRS")


def test_metres_labelled_as_degrees(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    p = write_layer(grid_stands().set_crs(4326, allow_override=True), tmp_path / "lie.gpkg")
    run.guard(p, yields)
    assert_user_error(run("check", p, "--yields", yields), 1, "not degrees", "fix the CRS")


def test_no_usable_geometry_left(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g = grid_stands(2, 1)
    g["geometry"] = [None, shapely.Polygon()]
    p = write_layer(g, tmp_path / "none.gpkg")
    run.guard(p, yields)
    res = run("check", p, "--yields", yields)
    assert res.exit_code == 1 and "no usable stands" in res.output
    res = run("plan", p, "--yields", yields, "--out", tmp_path / "o.gpkg", *FAST)
    assert_user_error(res, 1, "no usable stands")
