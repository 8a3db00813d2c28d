"""The ``run`` table: one writer, one reader, errors that name the file."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import numpy as np
import pyogrio
import pytest

from spatialplan.errors import InputError
from spatialplan.outputs import write_plan_geopackage
from spatialplan.runtable import read_run_table, recorded_settings, run_table
from spatialplan.settings import Settings


def _write(path: Path, info: dict) -> Path:
    write_plan_geopackage(path, {"run": run_table(info)})
    return path


def test_round_trip_through_a_geopackage_matches_gdal(tmp_path: Path) -> None:
    info = {
        "npv": 1.25,
        "lp_bound": np.float64(0.1),  # numpy floats are stored as their plain text
        "stat_rounds": 3,
        "gap": None,
        "stands_path": "Šumava/Ærø stands.gpkg",
        "multi": "line one\nline two",
    }
    # A file name with a space, '#', '?' and non-ASCII must not break the read-only URI.
    path = _write(tmp_path / "plan #1? Ærø.gpkg", info)
    got = read_run_table(path)
    assert got == {
        "npv": "1.25",
        "lp_bound": "0.1",
        "stat_rounds": "3",
        "gap": "",
        "stands_path": "Šumava/Ærø stands.gpkg",
        "multi": "line one\nline two",
    }
    # A second, independent reader (GDAL through pyogrio) sees the same rows.
    frame = pyogrio.read_dataframe(path, layer="run")
    assert dict(zip(frame["key"], frame["value"].fillna(""), strict=True)) == got


def test_missing_and_unreadable_files_are_named(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="not found: .*absent.gpkg"):
        read_run_table(tmp_path / "absent.gpkg")
    text = tmp_path / "notes.gpkg"
    text.write_text("not a database at all, just some words " * 40)
    with pytest.raises(InputError, match="notes.gpkg cannot be read as a GeoPackage"):
        read_run_table(text)


def test_missing_table_and_missing_columns(tmp_path: Path) -> None:
    path = tmp_path / "other.gpkg"
    with sqlite3.connect(path) as con:
        con.execute("CREATE TABLE stands (id TEXT)")
    con.close()
    with pytest.raises(InputError, match="other.gpkg has no 'run' table"):
        read_run_table(path)
    assert read_run_table(path, missing_ok=True) == {}
    with sqlite3.connect(path) as con:
        con.execute("CREATE TABLE run (name TEXT, val TEXT)")
    con.close()
    with pytest.raises(InputError, match=r"other.gpkg: table 'run' needs .*has name, val"):
        read_run_table(path)


def test_recorded_settings_round_trip_and_errors() -> None:
    s = Settings().with_overrides({"horizon.periods": 7, "rules.max_opening_ha": 25.0})
    assert recorded_settings({"settings_json": s.to_json()}, "p.gpkg") == s
    assert recorded_settings({"settings_json": ""}, "p.gpkg") is None
    with pytest.raises(InputError, match=r"p.gpkg: run.settings_json is not valid JSON"):
        recorded_settings({"settings_json": "{oops"}, "p.gpkg")
    with pytest.raises(InputError, match=r"p.gpkg: recorded settings are not valid.*periods"):
        recorded_settings({"settings_json": '{"horizon": {"periods": -1}}'}, "p.gpkg")
