"""Reading and validating stand layers."""

from __future__ import annotations

from pathlib import Path

import geopandas as gpd
import numpy as np
import pytest
import shapely
from pyproj import Geod

from spatialplan.errors import InputError
from spatialplan.inventory import read_stands
from spatialplan.settings import FieldMap
from tests.conftest import grid_stands, write_layer


@pytest.mark.parametrize("suffix", [".gpkg", ".shp", ".geojson", ".fgb"])
def test_reads_common_formats(tmp_path: Path, suffix: str) -> None:
    p = write_layer(grid_stands(), tmp_path / f"stands{suffix}")
    inv = read_stands(p)
    assert len(inv.stands) == 12
    assert not inv.errors
    # 200 m x 200 m squares are 4 ha each (plane geometry).
    assert np.allclose(inv.stands["area_ha"], 4.0)
    # FlatGeobuf stores features in spatial-index order, so compare as sets.
    assert set(inv.stands["stand_id"]) == {f"S{i:02d}" for i in range(1, 13)}


def test_missing_crs_is_an_error_unless_given(tmp_path: Path) -> None:
    p = write_layer(grid_stands(crs=None), tmp_path / "nocrs.gpkg")
    with pytest.raises(InputError, match="no coordinate reference system.*--crs"):
        read_stands(p)
    inv = read_stands(p, FieldMap(crs="EPSG:32610"))
    assert inv.source_crs.to_epsg() == 32610
    assert any(pr.kind == "crs_assigned" for pr in inv.problems)


def test_geographic_area_matches_pyproj_geod(tmp_path: Path) -> None:
    # pyproj documentation example for Geod.geometry_area_perimeter: the square (1,1)-(10,10)
    # with a triangular hole has an area of 944,373,881,400.339 m2 on WGS84.
    poly = shapely.Polygon([(1, 1), (10, 1), (10, 10), (1, 10)], holes=[[(1, 2), (3, 4), (5, 2)]])
    ref_area, _ = Geod(ellps="WGS84").geometry_area_perimeter(poly)
    assert abs(abs(ref_area) - 944_373_881_400.339) < 1.0
    gdf = gpd.GeoDataFrame(
        {"stand_id": ["A"], "age": [50], "stratum": ["S1"]}, geometry=[poly], crs="EPSG:4326"
    )
    p = write_layer(gdf, tmp_path / "geo.gpkg")
    inv = read_stands(p)
    assert inv.source_crs.is_geographic
    assert inv.working_crs.is_projected  # UTM estimate for distances
    assert inv.stands["area_ha"].iloc[0] * 1e4 == pytest.approx(944_373_881_400.339, rel=1e-9)
    assert any(pr.kind == "reprojected" for pr in inv.problems)


def test_duplicate_and_missing_ids_reported_together(tmp_path: Path) -> None:
    g = grid_stands()
    g.loc[1, "stand_id"] = "S01"
    g.loc[5, "stand_id"] = None
    inv = read_stands(write_layer(g, tmp_path / "dup.gpkg"))
    kinds = {p.kind: p for p in inv.errors}
    assert "S01" in kinds["duplicate_id"].stand_ids
    assert kinds["missing_id"].stand_ids == ("row 6",)
    with pytest.raises(InputError) as exc:
        inv.raise_for_errors()
    assert "S01" in str(exc.value) and "row 6" in str(exc.value)


def test_bad_ages(tmp_path: Path) -> None:
    g = grid_stands()
    g["age"] = g["age"].astype(object)
    g.loc[0, "age"] = "old"
    g.loc[1, "age"] = -5
    g.loc[2, "age"] = None
    g.loc[3, "age"] = 5000  # older than any known living tree (under 5,000 years, from memory)
    inv = read_stands(write_layer(g, tmp_path / "ages.gpkg"))
    kinds = {p.kind: p.stand_ids for p in inv.errors}
    assert kinds["age_not_numeric"] == ("S01",)
    assert kinds["age_negative"] == ("S02",)
    assert kinds["age_missing"] == ("S03",)
    assert kinds["age_absurd"] == ("S04",)


def test_self_intersecting_polygon_repaired_and_named(tmp_path: Path) -> None:
    g = grid_stands(2, 1)
    x0, y0 = 500_000.0, 5_000_000.0
    # A bow-tie (figure eight) drawn over stand S02's square.
    g.loc[1, "geometry"] = shapely.Polygon(
        [(x0 + 200, y0), (x0 + 400, y0 + 200), (x0 + 400, y0), (x0 + 200, y0 + 200)]
    )
    inv = read_stands(write_layer(g, tmp_path / "bow.gpkg"))
    rep = [p for p in inv.problems if p.kind == "repaired_geometry"]
    assert rep and rep[0].stand_ids == ("S02",)
    assert "make_valid" in rep[0].message and "Self-intersection" in rep[0].message
    geom = inv.stands.geometry.iloc[1]
    assert geom.is_valid and geom.geom_type == "MultiPolygon"
    assert inv.stands["area_ha"].iloc[1] == pytest.approx(2.0)  # two triangles of 1 ha


def test_empty_and_null_geometry_excluded(tmp_path: Path) -> None:
    g = grid_stands(3, 1)
    g.loc[0, "geometry"] = None
    g.loc[1, "geometry"] = shapely.Polygon()
    inv = read_stands(write_layer(g, tmp_path / "empty.gpkg"))
    assert inv.stands["stand_id"].tolist() == ["S03"]
    warn = [p for p in inv.warnings if p.kind == "empty_geometry"]
    assert set(warn[0].stand_ids) == {"S01", "S02"}


def test_points_are_not_stands(tmp_path: Path) -> None:
    g = grid_stands(2, 1)
    g["geometry"] = g.geometry.centroid
    with pytest.raises(InputError, match="must be polygons.*Point"):
        read_stands(write_layer(g, tmp_path / "pts.gpkg"))


def test_missing_field_lists_existing_fields(tmp_path: Path) -> None:
    p = write_layer(grid_stands(), tmp_path / "s.gpkg")
    with pytest.raises(
        InputError, match="field 'AGE_YR'.*fields in the layer: stand_id, age, stratum"
    ):
        read_stands(p, FieldMap(age_field="AGE_YR"))


def test_field_names_match_case_insensitively(tmp_path: Path) -> None:
    g = grid_stands().rename(columns={"stand_id": "STAND_ID", "age": "Age"})
    inv = read_stands(write_layer(g, tmp_path / "caps.gpkg"))
    assert inv.fields.id_field == "STAND_ID" and inv.fields.age_field == "Age"


def test_several_layers_need_a_name(tmp_path: Path) -> None:
    p = tmp_path / "multi.gpkg"
    grid_stands().to_file(p, layer="stands_2025", driver="GPKG")
    grid_stands().to_file(p, layer="stands_2026", driver="GPKG")
    with pytest.raises(InputError, match="2 layers.*--layer.*stands_2025, stands_2026"):
        read_stands(p)
    with pytest.raises(InputError, match="layer 'nope' not found.*stands_2025"):
        read_stands(p, FieldMap(layer="nope"))
    assert len(read_stands(p, FieldMap(layer="stands_2026")).stands) == 12


def test_overlaps_warned_with_pairs(tmp_path: Path) -> None:
    g = grid_stands(2, 1)
    g.loc[1, "geometry"] = shapely.affinity.translate(g.geometry.iloc[1], xoff=-50)
    inv = read_stands(write_layer(g, tmp_path / "ov.gpkg"))
    ov = [p for p in inv.warnings if p.kind == "overlap"]
    assert ov and ov[0].stand_ids[0].startswith("S01~S02 (1.000 ha)")  # 50 m x 200 m = 1 ha


def test_reserve_flag_parsing(tmp_path: Path) -> None:
    g = grid_stands(4, 1)
    g["keep"] = ["yes", "0", "TRUE", "maybe"]
    inv = read_stands(write_layer(g, tmp_path / "r.gpkg"), FieldMap(reserve_field="keep"))
    assert inv.stands["reserve"].tolist()[:3] == [True, False, True]
    assert [p.stand_ids for p in inv.errors if p.kind == "reserve_value"] == [("S04",)]


def test_missing_file_and_non_vector(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="not found"):
        read_stands(tmp_path / "nothing.gpkg")
    junk = tmp_path / "junk.gpkg"
    junk.write_text("this is not a GeoPackage")
    with pytest.raises(InputError, match="not a vector file"):
        read_stands(junk)


def test_shapefile_without_dbf(tmp_path: Path) -> None:
    p = write_layer(grid_stands(), tmp_path / "s.shp")
    p.with_suffix(".dbf").unlink()
    with pytest.raises(InputError, match=r"attribute file s\.dbf is missing"):
        read_stands(p)


def test_huge_coordinates_rejected(tmp_path: Path) -> None:
    g = grid_stands(origin=(1e12, 1e12))
    with pytest.raises(InputError, match="implausible"):
        read_stands(write_layer(g, tmp_path / "huge.gpkg"))


def test_input_file_is_not_modified(tmp_path: Path) -> None:
    from tests.conftest import sha256

    p = write_layer(grid_stands(), tmp_path / "s.gpkg")
    before = sha256(p)
    read_stands(p)
    assert sha256(p) == before
