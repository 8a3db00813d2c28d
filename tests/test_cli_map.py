"""``spatialplan map``: re-render map, charts and report from a plan GeoPackage."""

from __future__ import annotations

import html
import re
from html.parser import HTMLParser

import pytest
from click.testing import CliRunner

from spatialplan import outputs
from spatialplan.cli import cli, main
from spatialplan.report import CAUTIONS
from spatialplan.runtable import run_table
from tests.test_outputs import make_layers


def plan_gpkg(tmp_path, name="forest plan"):
    layers, *_, settings = make_layers()
    layers["run"] = run_table({"npv": "1234567.89", "lp_bound": "1250000",
                               "cpsat_bound": "1240000", "gap": "0.0123",
                               "solver_status": "FEASIBLE", "verify_verdict": "PASS",
                               "stands_path": "<script>alert(1)</script>.gpkg",
                               "settings_json": settings.to_json()})  # fmt: skip
    path = tmp_path / f"{name}.gpkg"
    outputs.write_plan_geopackage(path, layers)
    return path, layers


class _Links(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.hrefs: list[str] = []
        self.imgs: list[str] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        if tag == "a":
            self.hrefs.append(a.get("href") or "")
        if tag == "img":
            self.imgs.append(a.get("src") or "")


def test_map_command_writes_everything(tmp_path):
    gpkg, _layers = plan_gpkg(tmp_path)
    res = CliRunner().invoke(cli, ["map", str(gpkg)])
    assert res.exit_code == 0, res.output
    html_map = tmp_path / "forest plan.map.html"
    report = tmp_path / "forest plan.report.html"
    charts = tmp_path / "forest plan_charts"
    assert html_map.is_file()
    assert report.is_file()
    pngs = sorted(p.name for p in charts.glob("*.png"))
    assert pngs == ["age_classes.png", "harvest_flow.png", "npv_by_period.png"]
    for p in charts.glob("*.png"):  # PNG signature (PNG spec, section 5.2)
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    text = report.read_text(encoding="utf-8")
    links = _Links()
    links.feed(text)
    assert "forest%20plan.map.html" in links.hrefs or "forest plan.map.html" in links.hrefs
    assert len(links.imgs) == 3
    assert all(s.startswith("data:image/png;base64,") for s in links.imgs)
    assert "1,234,568" in text
    assert "1.23 %" in text
    assert "passed" in text  # the recorded PASS, in the report's verdict words
    assert "<script>alert(1)</script>" not in text
    assert "script" not in links.tags
    assert "&lt;script&gt;alert(1)&lt;/script&gt;.gpkg" in text
    for c in CAUTIONS:
        assert html.escape(c) in text
    assert "Ærø Nord" in text
    assert "Šumava" in text
    assert not re.search(r"(src|href)=\"https?:", html_map.read_text(encoding="utf-8"))


def test_map_command_overwrite_and_out_html(tmp_path, capsys):
    gpkg, _ = plan_gpkg(tmp_path)
    assert CliRunner().invoke(cli, ["map", str(gpkg)]).exit_code == 0
    report = tmp_path / "forest plan.report.html"
    before = report.read_bytes()
    with pytest.raises(SystemExit) as exc:
        main(["map", str(gpkg)])
    assert exc.value.code == 1
    assert "--overwrite" in capsys.readouterr().err
    assert report.read_bytes() == before
    sub = tmp_path / "maps"
    sub.mkdir()
    res = CliRunner().invoke(cli, ["map", str(gpkg), "--out-html", str(sub / "m.html"),
                                   "--overwrite"])  # fmt: skip
    assert res.exit_code == 0, res.output
    assert (sub / "m.html").is_file()
    links = _Links()
    links.feed(report.read_text(encoding="utf-8"))
    assert "maps/m.html" in links.hrefs


def test_map_command_rejects_non_plan(tmp_path, capsys):
    gpkg, layers = plan_gpkg(tmp_path)
    other = tmp_path / "partial.gpkg"
    outputs.write_plan_geopackage(other, {"schedule": layers["schedule"]})
    with pytest.raises(SystemExit) as exc:
        main(["map", str(other)])
    assert exc.value.code == 1
    err = capsys.readouterr().err
    assert "openings" in err
    assert "periods" in err
    assert "run" in err
    with pytest.raises(SystemExit):
        main(["map", str(tmp_path / "missing.gpkg")])
    assert "not found" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["map", str(gpkg), "--basemap", "not-a-template"])
    assert "basemap" in capsys.readouterr().err


def test_map_reads_an_old_plan_with_renamed_settings_keys(tmp_path):
    import json

    layers, *_, settings = make_layers()
    old = settings.to_dict()
    old["solver"]["gap"] = old["solver"].pop("stop_gap")
    old["adjacency"]["gap_tolerance_m"] = old["adjacency"].pop("digitising_tolerance_m")
    layers["run"] = run_table({"npv": "1234567.89", "lp_bound": "1250000", "gap": "0.0123",
                               "settings_json": json.dumps(old)})  # fmt: skip
    path = tmp_path / "old.gpkg"
    outputs.write_plan_geopackage(path, layers)
    res = CliRunner().invoke(cli, ["map", str(path)])
    assert res.exit_code == 0, res.output
    assert "note: setting 'solver.gap'" in res.output and "'solver.stop_gap'" in res.output
    assert "'adjacency.digitising_tolerance_m'" in res.output
    assert (tmp_path / "old.report.html").is_file()
