"""``spatialplan plan`` and ``spatialplan demo`` end to end."""

from __future__ import annotations

import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyogrio
import pytest
from click.testing import CliRunner

from spatialplan.cli import cli
from spatialplan.synthetic import voronoi_forest
from tests.conftest import sha256


@pytest.fixture
def small_forest(tmp_path: Path, yields_csv: Path) -> tuple[Path, Path]:
    g = voronoi_forest(60, seed=3, mean_area_ha=10.0)
    p = tmp_path / "forest.gpkg"
    g.to_file(p, layer="stands", driver="GPKG")
    return p, yields_csv


def _plan_args(stands: Path, yields: Path, out: Path, *extra: str) -> list[str]:
    return [
        "plan",
        str(stands),
        "--yields",
        str(yields),
        "--out",
        str(out),
        "--price",
        "40",
        "--periods",
        "4",
        "--min-age",
        "30",
        "--time-limit",
        "8",
        "--workers",
        "2",
        "--no-map",
        *extra,
    ]


def test_plan_writes_verified_geopackage(tmp_path: Path, small_forest: tuple[Path, Path]) -> None:
    stands, yields = small_forest
    before = (sha256(stands), sha256(yields))
    out = tmp_path / "plan.gpkg"
    res = CliRunner().invoke(cli, _plan_args(stands, yields, out))
    assert res.exit_code == 0, res.output
    assert "passed: all rules hold" in res.output
    assert (sha256(stands), sha256(yields)) == before  # inputs untouched
    sched = pyogrio.read_dataframe(out, layer="schedule")
    harvests = pyogrio.read_dataframe(out, layer="harvests", read_geometry=False)
    assert len(sched) == 60
    for col in (
        "stand_id",
        "age",
        "stratum",
        "period",
        "harvest_count",
        "harvest_periods",
        "harvest_mid_year",
        "age_at_harvest_yr",
        "volume_m3",
        "gross_value",
        "npv",
        "ending_value_npv",
        "operable",
    ):
        assert col in sched.columns
    assert list(harvests.columns) == [
        "stand_id",
        "harvest",
        "period",
        "harvest_mid_year",
        "age_at_harvest_yr",
        "stratum",
        "volume_m3",
        "gross_value",
        "npv",
    ]
    cut = sched["period"].notna()
    assert cut.any()
    assert sched["harvest_count"].sum() == len(harvests)
    # Objective with only a single price: area x volume x price x (1 + r)^-t, annual
    # compounding (standard compound-interest discounting, the factor numpy_financial.npv
    # applies), harvest at mid-period t = (p - 0.5) L (common practice, no source);
    # each harvest's `npv` is its share of it.
    t = (harvests["period"].astype(float) - 0.5) * 5.0
    assert np.allclose(harvests["npv"], harvests["volume_m3"] * 40.0 * 1.04**-t, rtol=1e-9)
    assert np.allclose(harvests["gross_value"], harvests["volume_m3"] * 40.0, rtol=1e-9)
    assert (harvests["age_at_harvest_yr"] >= 30 - 1e-9).all()
    # A stand's npv is its harvests plus its discounted ending value.
    by_stand = harvests.groupby("stand_id")["npv"].sum()
    own = sched.set_index("stand_id")["ending_value_npv"].add(by_stand, fill_value=0.0)
    np.testing.assert_allclose(sched.set_index("stand_id")["npv"], own[sched["stand_id"]])
    first = harvests[harvests["harvest"] == 1].set_index("stand_id")
    np.testing.assert_array_equal(
        sched.loc[cut, "period"].astype(int), first.loc[sched.loc[cut, "stand_id"], "period"]
    )
    with sqlite3.connect(out) as con:
        run = dict(con.execute("select key, value from run").fetchall())
    assert run["verify_verdict"].startswith("passed: ")
    assert float(run["npv"]) == pytest.approx(sched["npv"].sum(), rel=1e-6)
    assert float(run["ending_value_npv"]) == pytest.approx(
        sched["ending_value_npv"].sum(), rel=1e-6
    )
    assert float(run["bound_aspatial_lp"]) >= float(run["npv"]) - 1e-6
    # A bound is an upper bound: never below a legal plan's value; the best is the least.
    if run["bound_cpsat"]:
        assert float(run["bound_cpsat"]) >= float(run["npv"]) * (1 - 1e-6)
    if run["bound_cover_lp"]:
        assert float(run["npv"]) * (1 - 1e-6) <= float(run["bound_cover_lp"])
        assert float(run["bound_cover_lp"]) <= float(run["bound_aspatial_lp"]) * (1 + 1e-6)
    keys = ("bound_aspatial_lp", "bound_cover_lp", "bound_cpsat")
    bounds = [float(run[k]) for k in keys if run[k]]
    assert float(run["npv"]) - 0.01 <= float(run["best_bound"]) <= min(bounds) + 0.01
    methods = ("aspatial LP (HiGHS)", "LP with opening covers (HiGHS)", "CP-SAT")
    assert run["best_bound_method"] in methods
    assert float(run["ltsy_mai_m3_yr"]) >= float(run["ltsy_rotation_m3_yr"]) > 0
    # The independent checker agrees when run on the file.
    res = CliRunner().invoke(cli, ["verify", str(out)])
    assert res.exit_code == 0, res.output


def test_plan_refuses_to_overwrite(tmp_path: Path, small_forest: tuple[Path, Path]) -> None:
    stands, yields = small_forest
    out = tmp_path / "plan.gpkg"
    out.write_bytes(b"earlier output")
    res = CliRunner().invoke(cli, _plan_args(stands, yields, out))
    assert res.exit_code == 1 and "--overwrite" in res.output
    assert out.read_bytes() == b"earlier output"
    res = CliRunner().invoke(cli, _plan_args(stands, yields, stands, "--overwrite"))
    assert res.exit_code == 1 and "same file as input" in res.output


def test_plan_infeasible_rules_exit_two(tmp_path: Path, small_forest: tuple[Path, Path]) -> None:
    stands, yields = small_forest
    settings = tmp_path / "s.toml"
    settings.write_text("[rules]\nperiod_volume_min_m3 = 1e9\n")
    res = CliRunner().invoke(
        cli, [*_plan_args(stands, yields, tmp_path / "o.gpkg"), "--settings", str(settings)]
    )
    assert res.exit_code == 2, res.output
    assert not (tmp_path / "o.gpkg").exists()


@pytest.mark.slow
def test_demo_subprocess(tmp_path: Path) -> None:
    out = tmp_path / "demo"
    res = subprocess.run(
        [sys.executable, "-m", "spatialplan", "demo", "--out", str(out), "--time-limit", "15"],
        capture_output=True,
        text=True,
        check=False,
        timeout=600,
    )
    assert res.returncode == 0, res.stderr[-3000:]
    for name in ("brennick_plan.gpkg", "brennick_plan.map.html", "brennick_plan.report.html"):
        assert (out / name).is_file()
    assert any((out / "brennick_plan_charts").glob("*.png"))
    assert "passed: all rules hold" in res.stdout


def test_plan_by_unit_merges_units(tmp_path: Path, yields_csv: Path) -> None:
    import pandas as pd

    # Two management units 1 km apart: no stand of one touches the other, so planning them
    # apart is exact (a separable problem: no rule or adjacency links the units, so the
    # optimum is the sum of the units' optima) and the merged plan must pass the
    # forest-wide check.
    a = voronoi_forest(25, seed=5, mean_area_ha=10.0)
    b = voronoi_forest(25, seed=6, mean_area_ha=10.0, origin=(520_000.0, 5_200_000.0))
    a["mu"], b["mu"] = "north", "south"
    b["stand_id"] = "U" + b["stand_id"]
    g = pd.concat([a, b], ignore_index=True)
    p = tmp_path / "units.gpkg"
    g.to_file(p, layer="stands", driver="GPKG")
    out = tmp_path / "units_plan.gpkg"
    res = CliRunner().invoke(
        cli, [*_plan_args(p, yields_csv, out), "--by-unit", "--unit-field", "mu"]
    )
    assert res.exit_code == 0, res.output
    sched = pyogrio.read_dataframe(out, layer="schedule")
    assert set(sched["mu"]) == {"north", "south"}
    with sqlite3.connect(out) as con:
        run = dict(con.execute("select key, value from run").fetchall())
    assert run["planned_by_unit"] == "true"
    res = CliRunner().invoke(
        cli,
        [
            "plan",
            str(p),
            "--yields",
            str(yields_csv),
            "--out",
            str(tmp_path / "x.gpkg"),
            "--by-unit",
        ],
    )
    assert res.exit_code == 1 and "--unit-field" in res.output


def test_plan_console_tables_fit_80_columns(
    tmp_path: Path, small_forest: tuple[Path, Path], monkeypatch: pytest.MonkeyPatch
) -> None:
    import re

    import pandas as pd

    from spatialplan.cli import _common
    from spatialplan.runtable import read_run_table

    stands, yields = small_forest
    settings = tmp_path / "s.toml"
    settings.write_text("[horizon]\nstart_year = 2025\n", encoding="utf-8")
    out = tmp_path / "plan.gpkg"
    monkeypatch.setenv("COLUMNS", "80")  # rich reads the terminal width from it
    _common.console.cache_clear()  # the console is made once per process: make it anew
    try:
        res = CliRunner().invoke(
            cli, [*_plan_args(stands, yields, out), "--settings", str(settings)]
        )
    finally:
        _common.console.cache_clear()
    assert res.exit_code == 0, res.output
    assert "…" not in res.output  # rich marks a cut cell with an ellipsis
    table_lines = [ln for ln in res.output.splitlines() if ln[:1] in "┏┃┡│└"]
    assert table_lines and max(len(ln) for ln in table_lines) <= 80
    rows = [[c.strip() for c in re.split("[┃│]", ln)[1:-1]] for ln in table_lines]
    items = [tuple(r) for r in rows if len(r) == 3]

    run = read_run_table(out)
    npv = float(run["npv"])
    lp = float(run.get("bound_aspatial_lp") or run["lp_bound"])
    cp_text = run.get("bound_cpsat", run.get("cpsat_bound", ""))
    bounds = {"aspatial LP (HiGHS)": lp}
    if run.get("bound_cover_lp"):
        bounds["LP with opening covers (HiGHS)"] = float(run["bound_cover_lp"])
    if cp_text:
        bounds["CP-SAT"] = float(cp_text)
    assert ("NPV", f"{npv:,.0f}", "") in items
    shown = {r[2]: float(r[1].replace(",", "")) for r in items if r[0] == "upper bound"}
    for method, b in bounds.items():  # every bound, with its kind
        # The run table keeps two decimals: a bound ending in .5 there may round either
        # way on the console.
        assert abs(shown[method] - b) <= 1.0, (method, shown, b)
    # The best proven bound: the smallest upper bound, never below a legal plan's NPV
    # (an upper bound on the optimum bounds every plan), the NPV once proven optimal.
    gap = float(run["gap"])
    method = min(bounds, key=bounds.__getitem__)
    best = npv if gap == 0 else max(npv, bounds[method])
    best_row = [r for r in items if r[0] == "best proven upper bound"]
    assert len(best_row) == 1 and best_row[0][2] == method
    assert abs(float(best_row[0][1].replace(",", "")) - best) <= 1.0
    assert ("gap to the best proven bound", f"{100 * gap:.2f} %", "") in items
    assert ("independent verification", "passed", "verdict below") in items

    # Harvest by period: calendar years start_year + (p - 1) L to start_year + p L, the
    # numbers of the written periods table, net harvest area and gross opening sizes.
    periods = pd.DataFrame(pyogrio.read_dataframe(out, layer="periods", read_geometry=False))
    area = periods.get("harvest_net_area_ha", periods.get("harvest_area_ha"))
    value = periods.get("npv", periods.get("discounted_value"))
    by_period = {r[0]: r[1:] for r in rows if len(r) == 6 and r[0].isdigit()}
    assert len(by_period) == 4
    for i, p in enumerate(periods["period"].astype(int)):
        assert by_period[str(p)] == [
            f"{2025 + (p - 1) * 5}-{2025 + p * 5}",
            f"{area[i]:,.1f}",
            f"{periods['harvest_volume_m3'][i]:,.0f}",
            f"{value[i]:,.0f}",
            f"{periods['largest_opening_ha'][i]:,.1f}",
        ]
    text = " ".join(res.output.split())
    for header in ("harvest area (net, ha)", "largest opening (gross, ha)"):
        words = header.split()
        assert all(w in text for w in words)  # headers may wrap inside their cell
    assert res.output.count("passed: all rules hold") == 1
