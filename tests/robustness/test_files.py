"""Bad stand-layer files: each gives exit 1 and one message naming the file and the fix."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from tests.conftest import grid_stands, write_layer
from tests.robustness.conftest import (
    FAST,
    TRACEBACK,
    GuardedCli,
    assert_user_error,
    run_subprocess,
)


def test_missing_stand_file(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    run.guard(yields)
    missing = tmp_path / "nowhere" / "stands.gpkg"
    for cmd in (
        ["check", missing, "--yields", yields],
        ["plan", missing, "--yields", yields, "--out", tmp_path / "o.gpkg", *FAST],
    ):
        res = run(*cmd)
        assert_user_error(res, 1, "not found", str(missing))
    assert not (tmp_path / "o.gpkg").exists()


@pytest.mark.parametrize(
    ("name", "content"),
    [
        ("junk.gpkg", b"this is not a GeoPackage\x00\x01"),
        ("notes.txt", b"Stand notes written by hand\nnothing spatial here\n"),
    ],
)
def test_not_a_vector_file(
    run: GuardedCli, tmp_path: Path, yields: Path, name: str, content: bytes
) -> None:
    p = tmp_path / name
    p.write_bytes(content)
    run.guard(p, yields)
    res = run("check", p, "--yields", yields)
    assert_user_error(res, 1, str(p), "not a vector file")


def test_table_without_geometry(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    # A CSV is a vector file for GDAL, but it has no polygons.
    p = tmp_path / "stands.csv"
    p.write_text("stand_id,age,stratum\nA,10,S1\n")
    run.guard(p, yields)
    assert_user_error(run("check", p, "--yields", yields), 1, str(p), "no geometry", "polygons")


def test_several_layers_none_named(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    p = tmp_path / "multi.gpkg"
    write_layer(grid_stands(), p, layer="stands_2019")
    write_layer(grid_stands(2, 2), p, layer="stands_2024")
    run.guard(p, yields)
    res = run("check", p, "--yields", yields)
    assert_user_error(res, 1, "2 layers", "--layer", "stands_2019", "stands_2024")
    # Naming a layer fixes it.
    res = run("check", p, "--yields", yields, "--layer", "stands_2024")
    assert res.exit_code == 0, res.output
    # The named layer is the one read: its 2 x 2 grid of 4 ha squares, not the 12 of the
    # other layer (200 m squares; 1 ha = 10,000 m2).
    assert "(layer stands_2024)" in res.output
    assert re.search(r"│ stands\s+│\s+4 │", res.output), res.output
    assert re.search(r"│ total area \(ha\)\s+│\s+16\.0 │", res.output), res.output


def test_layer_name_not_there(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    p = write_layer(grid_stands(), tmp_path / "one.gpkg", layer="stands")
    run.guard(p, yields)
    res = run("check", p, "--yields", yields, "--layer", "stnads")
    assert_user_error(res, 1, "'stnads' not found", "layers there: stands")


def test_shapefile_without_dbf(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    p = tmp_path / "stands.shp"
    grid_stands().to_file(p)
    p.with_suffix(".dbf").unlink()
    run.guard(p, yields)
    assert_user_error(run("check", p, "--yields", yields), 1, "stands.dbf", "missing")


def test_shapefile_without_prj(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    p = tmp_path / "stands.shp"
    grid_stands().to_file(p)
    p.with_suffix(".prj").unlink()
    run.guard(p, yields)
    res = run("check", p, "--yields", yields)
    assert_user_error(res, 1, "no coordinate reference system", ".prj", "--crs")
    res = run("check", p, "--yields", yields, "--crs", "EPSG:32610")
    assert res.exit_code == 0, res.output
    assert "assumed EPSG:32610" in res.output


def test_bad_crs_flag(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    p = tmp_path / "stands.shp"
    grid_stands().to_file(p)
    p.with_suffix(".prj").unlink()
    run.guard(p, yields)
    assert_user_error(
        run("check", p, "--yields", yields, "--crs", "EPSG:nonsense"),
        1,
        "EPSG:nonsense",
        "not a CRS",
    )


def test_empty_layer(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    p = write_layer(grid_stands().iloc[:0], tmp_path / "empty.gpkg")
    run.guard(p, yields)
    assert_user_error(run("check", p, "--yields", yields), 1, str(p), "empty")
    res = run("plan", p, "--yields", yields, "--out", tmp_path / "o.gpkg", *FAST)
    assert_user_error(res, 1, "empty")
    assert not (tmp_path / "o.gpkg").exists()


def test_missing_settings_and_yields_files(
    run: GuardedCli, stands: Path, tmp_path: Path, yields: Path
) -> None:
    run.guard(stands, yields)
    assert_user_error(
        run("check", stands, "--yields", tmp_path / "no.csv"), 1, "yield table not found", "no.csv"
    )
    assert_user_error(
        run("check", stands, "--yields", yields, "--settings", tmp_path / "no.toml"),
        1,
        "settings file not found",
        "no.toml",
    )


@pytest.mark.parametrize("make", ["missing", "garbage", "stand layer"])
def test_verify_bad_plan_file(run: GuardedCli, tmp_path: Path, stands: Path, make: str) -> None:
    p = {
        "missing": tmp_path / "nope.gpkg",
        "garbage": tmp_path / "junk.gpkg",
        "stand layer": stands,
    }[make]
    if make == "garbage":
        p.write_bytes(b"\x00" * 200)
    run.guard(stands)
    res = run("verify", p)
    assert_user_error(res, 1, str(p))


def test_subprocess_prints_one_message_without_traceback(tmp_path: Path, yields: Path) -> None:
    # As a user sees it: the message on stderr, nothing from Python's traceback machinery.
    missing = tmp_path / "stands.gpkg"
    res = run_subprocess(["check", missing, "--yields", yields])
    assert res.returncode == 1
    assert res.stderr.strip().startswith("error:") and str(missing) in res.stderr
    assert TRACEBACK not in res.stderr + res.stdout
    # --debug shows the traceback for a developer.
    res = run_subprocess(["--debug", "check", missing, "--yields", yields])
    assert res.returncode != 0 and TRACEBACK in res.stderr
