"""Attribute problems: missing fields, bad ids and ages, text encodings, markup in values."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely

from spatialplan.synthetic import synthetic_yield_table
from tests.conftest import grid_stands, write_layer
from tests.robustness.conftest import FAST, GuardedCli, assert_user_error

_TIP = re.compile(r'"sp_tip":\s*("(?:[^"\\]|\\.)*")')


def table_rows(output: str) -> list[list[str]]:
    """The cells of every row of the tables ``check`` prints (box-drawing borders)."""
    return [
        [c.strip() for c in line.strip().strip("│").split("│")]
        for line in output.splitlines()
        if line.startswith("│")
    ]


def map_tooltips(html_path: Path) -> list[str]:
    """The tooltip HTML of every feature, decoded from the map's embedded GeoJSON."""
    return [json.loads(m) for m in _TIP.findall(html_path.read_text(encoding="utf-8"))]


@pytest.mark.parametrize(
    ("flag", "value", "role"),
    [
        ("--id-field", "STAND_NO", "id_field"),
        ("--age-field", "AGE_2024", "age_field"),
        ("--yield-keys", "species,site", "yield_keys"),
    ],
)
def test_mapped_field_missing_lists_fields(
    run: GuardedCli, stands: Path, yields: Path, flag: str, value: str, role: str
) -> None:
    run.guard(stands, yields)
    res = run("check", stands, "--yields", yields, flag, value)
    wanted = value.split(",")[0]
    assert_user_error(
        res,
        1,
        f"'{wanted}' ({role}) not found",
        "fields in the layer: stand_id, age, stratum",
        flag,
    )


def test_field_names_match_case_insensitively(
    run: GuardedCli, tmp_path: Path, yields: Path
) -> None:
    g = grid_stands().rename(columns={"stand_id": "STAND_ID", "age": "Age"})
    p = write_layer(g, tmp_path / "caps.gpkg")
    run.guard(p, yields)
    res = run("check", p, "--yields", yields)
    assert res.exit_code == 0, res.output
    rows = table_rows(res.output)
    # Polygon areas from shapely: 1 ha = 10,000 m2 (SI definition of the hectare).
    area_ha = shapely.area(np.asarray(g.geometry.values)) / 10_000.0
    assert ["stands", str(len(g))] in rows
    assert ["total area (ha)", f"{area_ha.sum():,.1f}"] in rows
    # The ages were read from 'Age': 10-year age classes (output.age_class_width_yr,
    # default; common practice, no source) summed here from the layer's own values.
    lo = (g["Age"].to_numpy() // 10) * 10
    for c in sorted(set(lo)):
        assert [f"{c}-{c + 9}", f"{area_ha[lo == c].sum():,.1f}"] in rows
    for s in sorted(set(g["stratum"])):
        sel = (g["stratum"] == s).to_numpy()
        assert [s, str(sel.sum()), f"{area_ha[sel].sum():,.1f}"] in rows
    assert "passed: the inputs are usable for planning" in res.output
    # The plan keeps the user's field names and uses 'Age' as the start age: age at
    # harvest = start age + (p - 0.5) L at mid-period (common practice, no source).
    out = tmp_path / "o.gpkg"
    res = run("plan", p, "--yields", yields, "--out", out, *FAST, "--no-map")
    assert res.exit_code == 0, res.output
    sched = pyogrio.read_dataframe(out, layer="schedule")
    assert list(sched["STAND_ID"]) == list(g["STAND_ID"])
    assert list(sched["Age"]) == list(g["Age"])
    cut = sched["period"].notna()
    assert cut.any()
    expected_age = sched.loc[cut, "Age"] + (sched.loc[cut, "period"] - 0.5) * 5.0
    np.testing.assert_allclose(sched.loc[cut, "age_at_harvest_yr"], expected_age, rtol=0, atol=1e-9)


def test_duplicate_and_missing_ids(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g = grid_stands()
    g.loc[[3, 7], "stand_id"] = "S01"
    g.loc[5, "stand_id"] = None
    p = write_layer(g, tmp_path / "ids.gpkg")
    run.guard(p, yields)
    res = run("check", p, "--yields", yields)
    assert res.exit_code == 1
    assert "must be unique; repeated: S01" in res.output
    assert "have no id in 'stand_id': row 6" in res.output
    # plan collects both problems into one message, then stops before solving.
    out = tmp_path / "o.gpkg"
    res = run("plan", p, "--yields", yields, "--out", out, *FAST)
    assert_user_error(res, 1, "2 problem(s)", "repeated: S01", "row 6")
    assert not out.exists()


def test_bad_ages_each_named(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g = grid_stands().astype({"age": object})
    g.loc[0, "age"] = "old growth"
    g.loc[1, "age"] = None
    g.loc[2, "age"] = -5
    g.loc[3, "age"] = 5000  # not a plausible stand age in years
    p = tmp_path / "ages.gpkg"
    write_layer(g, p)
    run.guard(p, yields)
    res = run("check", p, "--yields", yields)
    assert res.exit_code == 1
    assert "'age' is not a number: S01" in res.output
    assert "'age' is empty: S02" in res.output
    assert "'age' is negative: S03" in res.output
    assert "not plausible" in res.output and "S04" in res.output
    res = run("plan", p, "--yields", yields, "--out", tmp_path / "o.gpkg", *FAST)
    assert_user_error(res, 1, "4 problem(s)", "S01", "S02", "S03", "S04")


def test_non_finite_ages_in_a_numeric_field(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g = grid_stands().astype({"age": float})
    g.loc[0, "age"] = np.nan
    g.loc[1, "age"] = np.inf
    p = write_layer(g, tmp_path / "inf.gpkg")
    run.guard(p, yields)
    res = run("check", p, "--yields", yields)
    assert res.exit_code == 1
    assert "'age' is empty: S01" in res.output and "S02" in res.output


def test_empty_yield_key_named(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g = grid_stands()
    g.loc[2, "stratum"] = None
    p = write_layer(g, tmp_path / "nokey.gpkg")
    run.guard(p, yields)
    res = run("check", p, "--yields", yields)
    assert res.exit_code == 1 and "yield-key field(s) stratum empty: S03" in res.output


def test_non_ascii_names_and_values_round_trip(run: GuardedCli, tmp_path: Path) -> None:
    g = grid_stands(3, 2)
    g["stand_id"] = ["Øvre-1", "Älvsbyn-2", "Çamlık-3", "森林-4", "Łąka-5", "Ñandú-6"]
    g["stratum"] = ["Épicéa", "Épicéa", "杉", "杉", "Épicéa", "杉"]
    g["Bemerkung"] = ["Fläche am Bach", "naïve café", "ağaç", "北の森", "żółw", "señal"]
    stands = write_layer(g, tmp_path / "stands_ü.gpkg")
    yt = synthetic_yield_table(["Épicéa", "杉"])
    yields = tmp_path / "yields_é.csv"
    yt.to_csv(yields, index=False, encoding="utf-8")
    run.guard(stands, yields)
    out = tmp_path / "plan_ø.gpkg"
    res = run("plan", stands, "--yields", yields, "--out", out, *FAST)
    assert res.exit_code == 0, res.output
    sched = pyogrio.read_dataframe(out, layer="schedule")
    assert list(sched["stand_id"]) == list(g["stand_id"])
    assert list(sched["Bemerkung"]) == list(g["Bemerkung"])
    assert set(sched["stratum"]) == {"Épicéa", "杉"}
    tips = "\n".join(map_tooltips(out.with_name("plan_ø.map.html")))
    for sid in g["stand_id"]:
        assert f"<td>{sid}</td>" in tips
    assert "<td>Épicéa</td>" in tips and "<td>杉</td>" in tips
    assert run("verify", out).exit_code == 0


def test_shapefile_in_latin1_is_decoded(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g = grid_stands(2, 1)
    g["stand_id"] = ["Forêt-1", "Forêt-2"]
    p = tmp_path / "latin.shp"
    g.to_file(p, encoding="ISO-8859-1")  # writes the .cpg that names the code page
    run.guard(p, yields)
    out = tmp_path / "plan.gpkg"
    res = run("plan", p, "--yields", yields, "--out", out, *FAST, "--no-map")
    assert res.exit_code == 0, res.output
    sched = pyogrio.read_dataframe(out, layer="schedule")
    assert list(sched["stand_id"]) == ["Forêt-1", "Forêt-2"]


def test_markup_in_values_is_escaped_in_map(run: GuardedCli, tmp_path: Path, yields: Path) -> None:
    g = grid_stands(3, 1)
    evil = ['<script>alert("x")</script>', "<img src=x onerror=alert(1)>", 'A&B "quoted"']
    g["stand_id"] = evil
    g["note"] = ["</table><b>bold</b>", "javascript:alert(2)", "<!-- comment -->"]
    p = write_layer(g, tmp_path / "evil.gpkg")
    run.guard(p, yields)
    out = tmp_path / "plan.gpkg"
    res = run("plan", p, "--yields", yields, "--out", out, *FAST)
    assert res.exit_code == 0, res.output
    # The values survive unchanged in the GeoPackage ...
    sched = pyogrio.read_dataframe(out, layer="schedule")
    assert list(sched["stand_id"]) == evil and list(sched["note"]) == list(g["note"])
    # ... and reach the map only escaped (html.escape is the reference).
    import html as html_mod

    for page in (out.with_name("plan.map.html"), out.with_name("plan.report.html")):
        text = page.read_text(encoding="utf-8")
        assert "<script>alert" not in text and "<img src=x" not in text, page
    tips = "\n".join(map_tooltips(out.with_name("plan.map.html")))
    for sid in evil:
        assert f"<td>{html_mod.escape(sid)}</td>" in tips
        if "<" in sid:
            assert sid not in tips


def test_numeric_ids_and_keys_from_other_systems(run: GuardedCli, tmp_path: Path) -> None:
    # Ids stored as floats and yield keys as 1.0 / "1" must match the table's "1".
    g = grid_stands(2, 2)
    g["stand_id"] = [101.0, 102.0, 103.0, 104.0]
    g["stratum"] = [1.0, 2.0, 1.0, 2.0]
    g["age"] = [60, 70, 80, 90]  # old enough to be cut in a 3-period plan
    p = write_layer(g, tmp_path / "num.gpkg")
    yt = synthetic_yield_table(["1", "2"])
    y = tmp_path / "y.csv"
    pd.DataFrame(yt).to_csv(y, index=False)
    run.guard(p, y)
    res = run("check", p, "--yields", y)
    assert res.exit_code == 0, res.output
    rows = table_rows(res.output)
    # Each key has its two 4 ha stands (200 m squares; 1 ha = 10,000 m2, SI definition).
    assert ["1", "2", "8.0"] in rows and ["2", "2", "8.0"] in rows
    assert "no yield curve" not in res.output
    assert "yield curves with no stand" not in res.output  # both keys of the table matched
    # The plan reads each stand's volume from its own key's curve: area x the table's
    # volume at the age at harvest, read linearly between tabulated ages with (0, 0) below
    # the first (common practice, no source), numpy.interp as the reference.
    # Four stands cannot keep a +-10 % flow over 3 periods: the loosest flow band lets
    # the plan cut them.
    out = tmp_path / "o.gpkg"
    res = run("plan", p, "--yields", y, "--out", out, *FAST, "--no-map", "--flow-tolerance", "1")
    assert res.exit_code == 0, res.output
    sched = pyogrio.read_dataframe(out, layer="schedule")
    assert list(sched["stand_id"]) == [101.0, 102.0, 103.0, 104.0]
    assert list(sched["stratum"]) == ["1", "2", "1", "2"]
    cut = sched["period"].notna().to_numpy()
    assert set(sched.loc[cut, "stratum"]) == {"1", "2"}, sched
    harvests = pyogrio.read_dataframe(out, layer="harvests", read_geometry=False)
    assert set(harvests["stand_id"]) == set(sched.loc[cut, "stand_id"])
    area = dict(zip(sched["stand_id"], sched["net_area_ha"], strict=True))
    for _, r in harvests.iterrows():
        curve = yt[yt["stratum"] == r["stratum"]]
        per_ha = np.interp(
            r["age_at_harvest_yr"],
            np.r_[0.0, curve["age"].to_numpy(float)],
            np.r_[0.0, curve["volume"].to_numpy(float)],
        )
        assert r["volume_m3"] == pytest.approx(area[r["stand_id"]] * per_ha, abs=0.05), r
