"""Outputs: written atomically, never over an input, never half-written."""

from __future__ import annotations

import os
from pathlib import Path

import pyogrio
import pytest

from spatialplan import _io
from tests.robustness.conftest import FAST, GuardedCli, assert_user_error


def _plan(run: GuardedCli, stands: Path, yields: Path, out: Path, *extra: object):
    return run("plan", stands, "--yields", yields, "--out", out, *FAST, *extra)


def test_output_is_renamed_from_a_temporary_beside_it(
    run: GuardedCli, tmp_path: Path, stands: Path, yields: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    moves: list[tuple[Path, Path]] = []
    real = os.replace

    def spy(src: str, dst: str) -> None:
        moves.append((Path(src), Path(dst)))
        real(src, dst)

    monkeypatch.setattr(_io.os, "replace", spy)
    out = tmp_path / "plan.gpkg"
    run.guard(stands, yields)
    assert _plan(run, stands, yields, out).exit_code == 0
    targets = {dst for _, dst in moves}
    assert out in targets and out.with_name("plan.map.html") in targets
    for src, dst in moves:
        assert src.parent == dst.parent and src != dst  # same folder: rename is atomic
        assert not src.exists()


def test_failure_mid_write_keeps_earlier_output(
    run: GuardedCli, tmp_path: Path, stands: Path, yields: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    out = tmp_path / "plan.gpkg"
    run.guard(stands, yields)
    assert _plan(run, stands, yields, out, "--no-map").exit_code == 0
    earlier = out.read_bytes()
    real = pyogrio.write_dataframe
    calls = {"n": 0}

    def fail_on_third(*a: object, **k: object) -> None:
        calls["n"] += 1
        if calls["n"] == 3:
            raise OSError(28, "No space left on device")
        real(*a, **k)

    monkeypatch.setattr(pyogrio, "write_dataframe", fail_on_third)
    res = _plan(run, stands, yields, out, "--no-map", "--overwrite", "--periods", "4")
    assert_user_error(res, 1, "cannot write GeoPackage", str(out), "No space left")
    assert out.read_bytes() == earlier
    assert sorted(p.name for p in tmp_path.iterdir()) == ["plan.gpkg", "stands.gpkg", "yields.csv"]


def test_output_exists_without_overwrite(
    run: GuardedCli, tmp_path: Path, stands: Path, yields: Path
) -> None:
    out = tmp_path / "plan.gpkg"
    out.write_bytes(b"earlier")
    run.guard(stands, yields, out)
    assert_user_error(_plan(run, stands, yields, out), 1, f"output {out} exists", "--overwrite")


def test_map_beside_output_exists_without_overwrite(
    run: GuardedCli, tmp_path: Path, stands: Path, yields: Path
) -> None:
    side = tmp_path / "plan.map.html"
    side.write_text("<p>an earlier map</p>")
    run.guard(stands, yields, side)
    res = _plan(run, stands, yields, tmp_path / "plan.gpkg")
    assert_user_error(res, 1, str(side), "--overwrite", "--no-map")


@pytest.mark.parametrize("which", ["stands", "yields"])
def test_output_is_an_input(run: GuardedCli, stands: Path, yields: Path, which: str) -> None:
    target = stands if which == "stands" else yields
    run.guard(stands, yields)
    res = _plan(run, stands, yields, target, "--overwrite")
    assert res.exit_code == 1 and res.output.count("error:") == 1, res.output
    assert str(target) in res.output


def test_output_is_an_input_through_a_link(
    run: GuardedCli, tmp_path: Path, stands: Path, yields: Path
) -> None:
    link = tmp_path / "link.gpkg"
    os.link(stands, link)  # a second name for the same file
    run.guard(stands, yields)
    assert_user_error(_plan(run, stands, yields, link, "--overwrite"), 1, "same file as input")


def test_raster_output_is_an_input(
    run: GuardedCli, tmp_path: Path, stands: Path, yields: Path
) -> None:
    run.guard(stands, yields)
    res = _plan(run, stands, yields, tmp_path / "plan.gpkg", "--raster-out", stands, "--overwrite")
    assert_user_error(res, 1, "same file as input", "--raster-out")
    assert not (tmp_path / "plan.gpkg").exists()


def test_missing_output_folder(run: GuardedCli, tmp_path: Path, stands: Path, yields: Path) -> None:
    run.guard(stands, yields)
    out = tmp_path / "no" / "such" / "plan.gpkg"
    assert_user_error(_plan(run, stands, yields, out), 1, "does not exist", "create it first")
    res = _plan(
        run, stands, yields, tmp_path / "plan.gpkg", "--raster-out", tmp_path / "nope" / "p.tif"
    )
    assert_user_error(res, 1, "does not exist")
    assert not (tmp_path / "plan.gpkg").exists()  # checked before solving


def test_output_must_be_a_geopackage(
    run: GuardedCli, tmp_path: Path, stands: Path, yields: Path
) -> None:
    run.guard(stands, yields)
    for name in ("plan.shp", "plan"):
        res = _plan(run, stands, yields, tmp_path / name)
        assert_user_error(res, 1, "must be a GeoPackage", ".gpkg")


@pytest.mark.parametrize(
    ("flag", "rel"),
    [("--out", "notes.txt/plan.gpkg"), ("--out", "notes.txt/sub/plan.gpkg"),
     ("--raster-out", "notes.txt/plan.tif")],
)  # fmt: skip
def test_output_under_a_regular_file(
    run: GuardedCli, tmp_path: Path, stands: Path, yields: Path, flag: str, rel: str
) -> None:
    # A path through a regular file cannot be written by anyone, root included (the
    # system says ENOTDIR, POSIX open()); no permission bits are involved.
    notes = tmp_path / "notes.txt"
    notes.write_text("field notes\n")
    target = tmp_path / rel
    out = target if flag == "--out" else tmp_path / "plan.gpkg"
    extra = () if flag == "--out" else ("--raster-out", target)
    run.guard(stands, yields, notes)
    before = sorted(p.name for p in tmp_path.iterdir())
    res = _plan(run, stands, yields, out, *extra)
    assert_user_error(res, 1, f"{notes} is a file, not a folder", str(target), flag)
    assert "create it first" not in res.output
    # Checked before solving: nothing written, not even the GeoPackage of a good --out.
    assert sorted(p.name for p in tmp_path.iterdir()) == before
    assert notes.read_text() == "field notes\n"


@pytest.mark.skipif(not Path("/proc/self").is_dir(), reason="needs Linux /proc")
def test_unwritable_output_folder_even_for_root(
    run: GuardedCli, stands: Path, yields: Path
) -> None:
    # /proc refuses new files whoever asks; permission bits alone would say "writable".
    run.guard(stands, yields)
    res = _plan(run, stands, yields, Path("/proc/plan.gpkg"))
    assert_user_error(res, 1, "/proc", "not writable", "choose another --out")
