"""``spatialplan check`` end to end (CliRunner and a real subprocess)."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import shapely
from click.testing import CliRunner

from spatialplan.cli import cli
from spatialplan.cli.demo import demo_files
from tests.conftest import grid_stands, sha256, write_layer


def test_check_demo_exits_zero() -> None:
    f = demo_files()
    before = sha256(f["stands"])
    res = CliRunner().invoke(
        cli,
        ["check", str(f["stands"]), "--yields", str(f["yields"]), "--settings", str(f["settings"])],
    )
    assert res.exit_code == 0, res.output
    assert "passed: the inputs are usable for planning" in res.output
    assert "660" in res.output
    assert sha256(f["stands"]) == before


def test_check_no_crs_exits_one(tmp_path: Path, yields_csv: Path) -> None:
    p = write_layer(grid_stands(crs=None), tmp_path / "nocrs.gpkg")
    res = CliRunner().invoke(cli, ["check", str(p), "--yields", str(yields_csv)])
    assert res.exit_code == 1
    assert "no coordinate reference system" in res.output
    assert "Traceback" not in res.output


def test_check_duplicate_ids_exits_one(tmp_path: Path, yields_csv: Path) -> None:
    g = grid_stands()
    g.loc[3, "stand_id"] = "S01"
    p = write_layer(g, tmp_path / "dup.gpkg")
    res = CliRunner().invoke(cli, ["check", str(p), "--yields", str(yields_csv)])
    assert res.exit_code == 1
    assert "repeated: S01" in res.output


def test_check_self_intersection_names_stand(tmp_path: Path, yields_csv: Path) -> None:
    g = grid_stands(2, 1)
    x0, y0 = 500_000.0, 5_000_000.0
    g.loc[1, "geometry"] = shapely.Polygon(
        [(x0 + 200, y0), (x0 + 400, y0 + 200), (x0 + 400, y0), (x0 + 200, y0 + 200)]
    )
    p = write_layer(g, tmp_path / "bow.gpkg")
    res = CliRunner().invoke(cli, ["check", str(p), "--yields", str(yields_csv)])
    assert res.exit_code == 0, res.output
    assert "repaired with make_valid" in res.output and "S02" in res.output


def test_check_unmatched_strata(tmp_path: Path, yields_csv: Path) -> None:
    g = grid_stands(2, 1)
    g.loc[0, "stratum"] = "S9"
    p = write_layer(g, tmp_path / "um.gpkg")
    res = CliRunner().invoke(cli, ["check", str(p), "--yields", str(yields_csv)])
    assert res.exit_code == 1 and "'S9'" in res.output and "S01" in res.output
    res = CliRunner().invoke(
        cli, ["check", str(p), "--yields", str(yields_csv), "--skip-unmatched"]
    )
    assert res.exit_code == 0, res.output
    # S01 is left out and said so; S02 (4 ha, stratum S2) is what remains.
    assert "stands excluded: S01" in res.output
    assert re.search(r"│ stands\s+│\s+1 │", res.output), res.output
    assert re.search(r"│ S2\s+│\s+1 │\s+4\.0 │", res.output), res.output
    assert "passed: the inputs are usable for planning" in res.output


def test_check_subprocess_no_traceback(tmp_path: Path) -> None:
    res = subprocess.run(
        [sys.executable, "-m", "spatialplan", "check", str(tmp_path / "missing.gpkg")],
        capture_output=True,
        text=True,
        check=False,
    )
    assert res.returncode == 1
    assert "stand layer not found" in res.stderr
    assert "Traceback" not in res.stderr


def _age_rows(output: str) -> dict[tuple[int, int], float]:
    rows = re.findall(r"│ (\d+)-(\d+)\s+│\s+([\d,.]+) │", output)
    return {(int(a), int(b)): float(v.replace(",", "")) for a, b, v in rows}


def test_check_age_classes_follow_the_setting(tmp_path: Path, yields_csv: Path) -> None:
    g = grid_stands()  # 12 stands of 4 ha, ages 10, 20, ..., 120
    p = write_layer(g, tmp_path / "grid.gpkg")
    ages, area = g["age"].to_numpy(float), 4.0 * np.ones(len(g))
    for width in (None, 25):
        args = ["check", str(p), "--yields", str(yields_csv)]
        if width is not None:
            toml = tmp_path / "s.toml"
            toml.write_text(f"[output]\nage_class_width_yr = {width}\n", encoding="utf-8")
            args += ["--settings", str(toml)]
        res = CliRunner().invoke(cli, args)
        assert res.exit_code == 0, res.output
        w = 10 if width is None else width  # the default is 10 years, as in the charts
        assert f"Area by age class ({w}-year classes)" in res.output
        # Reference: numpy.histogram over classes [k w, (k + 1) w).
        edges = np.arange(0, 130 + w, w)
        hist, _ = np.histogram(ages, bins=edges, weights=area)
        expected = {
            (int(lo), int(lo) + w - 1): h for lo, h in zip(edges[:-1], hist, strict=True) if h > 0
        }
        assert _age_rows(res.output) == pytest.approx(expected)


def test_check_messages_use_lowercase_prefixes(tmp_path: Path, yields_csv: Path) -> None:
    g = grid_stands(2, 1)
    x0, y0 = 500_000.0, 5_000_000.0
    g.loc[1, "geometry"] = shapely.Polygon(
        [(x0 + 200, y0), (x0 + 400, y0 + 200), (x0 + 400, y0), (x0 + 200, y0 + 200)]
    )
    g.loc[0, "stratum"] = "S9"  # no yield table: an error
    p = write_layer(g, tmp_path / "bad.gpkg")
    res = CliRunner().invoke(cli, ["check", str(p), "--yields", str(yields_csv)])
    assert res.exit_code == 1
    lines = res.output.splitlines()
    assert any(ln.startswith("error: ") and "'S9'" in ln for ln in lines), res.output
    assert any(ln.startswith("warning: ") and "S02" in ln for ln in lines), res.output
    assert lines[-1].startswith("failed: 1 problem(s) must be fixed before planning")
    for word in ("ERROR", "WARNING", "NOTE", "INFO", "Not usable"):
        assert not any(ln.startswith(word) for ln in lines), res.output
