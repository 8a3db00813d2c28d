"""Bad yield tables: every problem named with its file, line and key."""

from __future__ import annotations

import io
import sqlite3
from pathlib import Path

import pandas as pd
import pyogrio
import pytest

from spatialplan.synthetic import synthetic_yield_table
from tests.robustness.conftest import FAST, GuardedCli, assert_user_error


def _write(tmp_path: Path, df: pd.DataFrame, name: str = "y.csv") -> Path:
    p = tmp_path / name
    df.to_csv(p, index=False)
    return p


@pytest.fixture
def table() -> pd.DataFrame:
    return synthetic_yield_table().astype({"age": object, "volume": object})


def test_missing_columns_listed(run: GuardedCli, stands: Path, tmp_path: Path) -> None:
    y = _write(tmp_path, synthetic_yield_table().rename(columns={"volume": "vol_m3ha"}))
    run.guard(stands, y)
    res = run("check", stands, "--yields", y)
    assert_user_error(
        res, 1, str(y), "lacks column(s) volume", "it has: stratum, age, vol_m3ha, diameter"
    )


def test_ages_not_increasing(
    run: GuardedCli, stands: Path, tmp_path: Path, table: pd.DataFrame
) -> None:
    table.loc[3, "age"] = 5  # line 5 of the CSV (header is line 1)
    y = _write(tmp_path, table)
    run.guard(stands, y)
    assert_user_error(
        run("check", stands, "--yields", y), 1, "line 5", "key S1", "not strictly increasing"
    )


def test_negative_and_text_volumes(
    run: GuardedCli, stands: Path, tmp_path: Path, table: pd.DataFrame
) -> None:
    table.loc[3, "volume"] = -12.5
    table.loc[20, "volume"] = "n/a"
    y = _write(tmp_path, table)
    run.guard(stands, y)
    res = run("check", stands, "--yields", y)
    # Both problems in one message: collect all, report once.
    assert_user_error(
        res, 1, "2 problem(s)", "line 5", "negative volume", "line 22", "'n/a' is not a number"
    )


def test_duplicate_rows(run: GuardedCli, stands: Path, tmp_path: Path, table: pd.DataFrame) -> None:
    y = _write(tmp_path, pd.concat([table, table.iloc[[3]]], ignore_index=True))
    run.guard(stands, y)
    assert_user_error(
        run("check", stands, "--yields", y), 1, "duplicate row for age 40", "also on line 5"
    )


def test_keys_with_no_stand_are_only_noted(run: GuardedCli, stands: Path, yields: Path) -> None:
    run.guard(stands, yields)
    res = run("check", stands, "--yields", yields)
    assert res.exit_code == 0
    assert "yield curves with no stand in the layer: S3, S4, S5" in res.output


def test_stands_with_no_key(run: GuardedCli, stands: Path, tmp_path: Path) -> None:
    yt = synthetic_yield_table()
    y = _write(tmp_path, yt[yt["stratum"] != "S2"])
    run.guard(stands, y)
    res = run("check", stands, "--yields", y)
    assert res.exit_code == 1
    assert "no yield curve" in res.output and "'S2'" in res.output
    assert "S02, S04, S05, S07, S10, S12" in res.output and "--skip-unmatched" in res.output
    out = tmp_path / "o.gpkg"
    assert_user_error(run("plan", stands, "--yields", y, "--out", out, *FAST), 1, "'S2'")
    assert not out.exists()
    # With --skip-unmatched those stands are left out and the plan is made.
    res = run("plan", stands, "--yields", y, "--out", out, *FAST, "--skip-unmatched", "--no-map")
    assert res.exit_code == 0, res.output
    assert len(pyogrio.read_dataframe(out, layer="schedule")) == 6


@pytest.mark.parametrize(
    ("content", "needle"),
    [
        (b"", "cannot be read as CSV"),
        (b"stratum,age,volume\n", "no rows"),
        ("stratum,age,volume\nS\xe9,10,5\n".encode("latin-1"), "not UTF-8 text (line 2)"),
        (b"stratum;age;volume\nS1;10;5\n", "';'-, tab- or '|'-separated"),
    ],
)
def test_unreadable_tables(
    run: GuardedCli, stands: Path, tmp_path: Path, content: bytes, needle: str
) -> None:
    y = tmp_path / "y.csv"
    y.write_bytes(content)
    run.guard(stands, y)
    assert_user_error(run("check", stands, "--yields", y), 1, str(y), needle)


def test_excel_bom_is_accepted(run: GuardedCli, stands: Path, tmp_path: Path) -> None:
    # Excel's "CSV UTF-8" starts the file with the byte-order mark EF BB BF, the UTF-8
    # encoding of U+FEFF (Unicode Standard, section 23.8 "Specials", from memory); Python's
    # "utf-8-sig" codec writes it.
    text = synthetic_yield_table().to_csv(index=False)
    y = tmp_path / "excel.csv"
    y.write_text(text, encoding="utf-8-sig")
    assert y.read_bytes()[:3] == b"\xef\xbb\xbf"
    plain = tmp_path / "plain.csv"
    plain.write_text(text, encoding="utf-8")
    run.guard(stands, y, plain)
    res = run("check", stands, "--yields", y)
    assert res.exit_code == 0, res.output
    # The first column is still 'stratum' (not '\ufeffstratum'): every key of the table is
    # read, the layer's S1 and S2 match and the other three are noted.
    assert "yield curves with no stand in the layer: S3, S4, S5" in res.output
    assert "passed: the inputs are usable for planning" in res.output
    # The mark changes nothing: the same report as for the table without it.
    ref = run("check", stands, "--yields", plain)
    assert ref.exit_code == 0, ref.output
    assert res.output == ref.output
    # The plan records the table it used: the same rows and values as the plain file read
    # by pandas (the reference reader).
    out = tmp_path / "bom.gpkg"
    res = run("plan", stands, "--yields", y, "--out", out, *FAST, "--no-map")
    assert res.exit_code == 0, res.output
    with sqlite3.connect(out) as con:
        recorded = dict(con.execute("select key, value from run").fetchall())["yields_csv"]
    pd.testing.assert_frame_equal(
        pd.read_csv(io.StringIO(recorded)), pd.read_csv(plain), check_dtype=False
    )
