"""spatialplan.output_paths: outputs never replace inputs or earlier outputs unasked."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from spatialplan.errors import OutputError
from spatialplan.output_paths import check_output_path, check_plan_outputs, plan_input_paths
from spatialplan.settings import Settings


@pytest.fixture
def stands(tmp_path: Path) -> Path:
    p = tmp_path / "stands.gpkg"
    p.write_bytes(b"stand layer")
    return p


def test_output_may_not_be_an_input_by_any_name(tmp_path: Path, stands: Path) -> None:
    with pytest.raises(OutputError, match="same file as input"):
        check_output_path(tmp_path / "sub" / ".." / "stands.gpkg", [stands], overwrite=True)
    # A hard link is the same file under another name (os.path.samefile, POSIX stat).
    link = tmp_path / "alias.gpkg"
    os.link(stands, link)
    with pytest.raises(OutputError, match="same file as input"):
        check_output_path(link, [stands], overwrite=True)
    check_output_path(tmp_path / "plan.gpkg", [stands, None], overwrite=False)


def test_existing_folder_and_missing_folder(tmp_path: Path, stands: Path) -> None:
    with pytest.raises(OutputError, match="pass --overwrite"):
        check_output_path(stands, [], overwrite=False)
    check_output_path(stands, [], overwrite=True)
    with pytest.raises(OutputError, match="is a folder"):
        check_output_path(tmp_path, [], overwrite=True)
    with pytest.raises(OutputError, match="does not exist"):
        check_output_path(tmp_path / "nowhere" / "plan.gpkg", [], overwrite=False)


def test_plan_outputs(tmp_path: Path, stands: Path) -> None:
    dem = tmp_path / "dem.tif"
    dem.write_bytes(b"dem")
    s = Settings().with_overrides({"terrain.dem": str(dem), "output.raster_out": str(dem)})
    inputs = plan_input_paths(stands, None, s)
    assert inputs == [stands, dem]
    with pytest.raises(OutputError, match=r"ending in \.gpkg, e\.g\. plan\.gpkg"):
        check_plan_outputs(tmp_path / "plan.shp", inputs, s, overwrite=False)
    # The raster may not replace an input either, and the message names its flag.
    with pytest.raises(OutputError, match="choose another --raster-out"):
        check_plan_outputs(tmp_path / "plan.gpkg", inputs, s, overwrite=True)
    s = s.with_overrides({"output.raster_out": str(tmp_path / "periods.tif")})
    check_plan_outputs(tmp_path / "plan.gpkg", inputs, s, overwrite=False)
    # Review files beside the GeoPackage count as outputs unless the map is switched off.
    (tmp_path / "plan.report.html").write_text("earlier", encoding="utf-8")
    with pytest.raises(OutputError, match=r"plan\.report\.html exists.*--no-map"):
        check_plan_outputs(tmp_path / "plan.gpkg", inputs, s, overwrite=False)
    check_plan_outputs(tmp_path / "plan.gpkg", inputs, s, overwrite=True)
    no_map = s.with_overrides({"output.no_map": True})
    check_plan_outputs(tmp_path / "plan.gpkg", inputs, no_map, overwrite=False)
