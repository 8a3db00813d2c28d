"""spatialplan.review: the map, charts and report re-drawn from a plan GeoPackage alone."""

from __future__ import annotations

from pathlib import Path

import pytest

from spatialplan.errors import InputError, OutputError
from spatialplan.outputs import write_plan_geopackage
from spatialplan.review import read_plan_layers, render_review_files
from spatialplan.runtable import run_table
from tests.plan_frames import estate_plan
from tests.test_mapping import overlay_layers
from tests.test_outputs import make_layers

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)
TILES = "https://tiles.example.org/{z}/{x}/{y}.png"


def _plan(tmp_path: Path, basemap: str | None = TILES, settings_json: str | None = None) -> Path:
    layers, _g, _e, _i, settings = make_layers()
    if basemap:
        settings = settings.with_overrides({"output.basemap": basemap})
    layers["run"] = run_table(
        {"npv": "98765.43", "settings_json": settings.to_json() if settings_json is None
         else settings_json}
    )  # fmt: skip
    path = tmp_path / "plan.gpkg"
    write_plan_geopackage(path, layers)
    return path


def test_render_uses_the_recorded_settings_and_run(tmp_path: Path) -> None:
    gpkg = _plan(tmp_path)
    done = render_review_files(gpkg)
    assert done["map"] == tmp_path / "plan.map.html"
    assert done["report"] == tmp_path / "plan.report.html"
    # The recorded basemap is used when none is given; the run's NPV reaches the report.
    assert TILES.split("{")[0] in done["map"].read_text(encoding="utf-8")
    assert "98,765" in done["report"].read_text(encoding="utf-8")
    assert len(done["charts"]) == 3
    assert all(Path(p).read_bytes()[:8] == PNG_MAGIC for p in done["charts"])
    # An explicit basemap wins over the recorded one.
    other = "https://other.example.net/{z}/{x}/{y}.png"
    render_review_files(gpkg, basemap=other, overwrite=True)
    text = done["map"].read_text(encoding="utf-8")
    assert "other.example.net" in text and "tiles.example.org" not in text


def test_render_refuses_existing_outputs_and_missing_folder(tmp_path: Path) -> None:
    gpkg = _plan(tmp_path, basemap=None)
    report = tmp_path / "plan.report.html"
    report.write_text("earlier report", encoding="utf-8")
    with pytest.raises(OutputError, match=r"plan.report.html.*--overwrite"):
        render_review_files(gpkg)
    assert report.read_text(encoding="utf-8") == "earlier report"
    with pytest.raises(OutputError, match="does not exist"):
        render_review_files(gpkg, out_html=tmp_path / "nowhere" / "m.html", overwrite=True)


def test_not_a_plan_names_every_missing_layer(tmp_path: Path) -> None:
    layers, *_ = make_layers()
    partial = tmp_path / "partial.gpkg"
    write_plan_geopackage(partial, {"schedule": layers["schedule"], "run": layers["run"]})
    with pytest.raises(InputError, match=r"partial.gpkg.*missing .*openings, periods, strata"):
        read_plan_layers(partial)
    with pytest.raises(InputError, match="not found"):
        render_review_files(tmp_path / "absent.gpkg")


def test_unreadable_recorded_settings_name_the_file(tmp_path: Path) -> None:
    gpkg = _plan(tmp_path, settings_json="{broken")
    with pytest.raises(InputError, match=r"plan.gpkg: run.settings_json is not valid JSON"):
        render_review_files(gpkg)
    assert not (tmp_path / "plan.map.html").exists()


def test_render_reads_the_harvests_table(tmp_path: Path) -> None:
    ep = estate_plan()
    layers = {
        "schedule": ep.schedule,
        "harvests": ep.harvests,
        "openings": ep.openings,
        "periods": ep.periods,
        "strata": ep.strata,
        "run": run_table(ep.run_info),
    }
    gpkg = tmp_path / "estate.gpkg"
    write_plan_geopackage(gpkg, layers)
    frames = read_plan_layers(gpkg)
    assert len(frames["harvests"]) == len(ep.harvests)
    done = render_review_files(gpkg)
    # Every harvest is on the map: a stand cut twice is in two period layers.
    feats = overlay_layers(done["map"].read_text(encoding="utf-8"))
    n = sum(len(v["features"]) for k, v in feats.items() if k.startswith("Period "))
    assert n == len(ep.harvests) > ep.harvests["stand_id"].nunique()
    page = done["report"].read_text(encoding="utf-8")
    assert f"{len(ep.harvests)} harvests on {ep.harvests['stand_id'].nunique()} of" in page
    # A plan without a harvests table (old, or one cut per stand) has none in the frames.
    assert "harvests" not in read_plan_layers(_plan(tmp_path, basemap=None))
