"""``spatialplan verify`` end to end through click's CliRunner and the console entry point."""

from __future__ import annotations

import json
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
from click.testing import CliRunner

from spatialplan.cli import cli, main
from spatialplan.settings import settings_from_dict
from spatialplan.synthetic import synthetic_yield_table

SIDE = 200.0  # 4 ha squares
YIELDS = synthetic_yield_table()


def write_plan(path: Path, periods: dict[tuple[int, int], int], ages: dict, rules: dict) -> None:
    """A small plan GeoPackage: layer ``schedule`` and the ``run`` key/value table."""
    rows = [
        {
            "stand_id": f"C{c}R{r}",
            "age": ages.get((c, r), 60.0),
            "stratum": "S1",
            "period": periods.get((c, r)),
            "geometry": shapely.box(c * SIDE, r * SIDE, (c + 1) * SIDE, (r + 1) * SIDE),
        }
        for r in range(3)
        for c in range(6)
    ]
    gdf = gpd.GeoDataFrame(rows, crs="EPSG:32610")
    gdf["period"] = gdf["period"].astype("Int64")
    gdf.to_file(path, layer="schedule")
    s = settings_from_dict({"horizon": {"periods": 4, "period_length_yr": 5.0}, "rules": rules})
    run = pd.DataFrame(
        {
            "key": ["settings_json", "yields_csv", "solver_status"],
            "value": [s.to_json(), YIELDS.to_csv(index=False), "FEASIBLE"],
        }
    )
    pyogrio.write_dataframe(run, path, layer="run")


RULES = {"max_opening_ha": 10.0, "green_up_periods": 2, "min_age_yr": 40.0, "flow_tolerance": None}
# see tests/test_verify.py: 12 ha cut at once, 12 ha through green-up, one cut at 32.5 years
THREE = {(0, 0): 1, (1, 0): 1, (2, 0): 1, (4, 0): 1, (4, 1): 1, (5, 0): 2, (0, 2): 3}


@pytest.fixture
def three_plan(tmp_path: Path) -> Path:
    p = tmp_path / "out.gpkg"
    write_plan(p, THREE, {(0, 2): 20.0}, RULES)
    return p


def test_three_violations_exit_1(three_plan: Path) -> None:
    res = CliRunner().invoke(cli, ["verify", str(three_plan)])
    assert res.exit_code == 1, res.output
    lines = [x for x in res.output.splitlines() if x.startswith("violation:")]
    assert len(lines) == 3
    assert any(
        "max_opening period 1" in x and "C0R0,C1R0,C2R0" in x and "12.00 ha" in x for x in lines
    )
    assert any("green_up period 2" in x and "C5R0" in x for x in lines)
    assert any("min_age period 3" in x and "C0R2" in x for x in lines)
    assert res.output.strip().splitlines()[-1].startswith("failed: 3 violation(s)")


def test_flags_override_recorded_rules(three_plan: Path) -> None:
    runner = CliRunner()
    res = runner.invoke(cli, ["verify", str(three_plan), "--max-opening", "13"])
    assert res.exit_code == 1
    assert "failed: 1 violation(s) (min_age 1)" in res.output
    res = runner.invoke(cli, ["verify", str(three_plan), "--max-opening", "13", "--min-age", "30"])
    assert res.exit_code == 0, res.output
    assert "passed: all rules hold" in res.output
    res = runner.invoke(cli, ["verify", str(three_plan), "--green-up", "1"])
    assert res.exit_code == 1
    assert "green_up" not in res.output
    assert "max_opening 1" in res.output


def test_unit_restriction_and_settings_file(three_plan: Path, tmp_path: Path) -> None:
    res = CliRunner().invoke(cli, ["verify", str(three_plan), "--unit-restriction"])
    assert res.exit_code == 1
    assert "unit_restriction" in res.output
    toml = tmp_path / "plan.toml"
    toml.write_text(
        "[horizon]\nperiods = 4\n[rules]\nmax_opening_ha = 100.0\nmin_age_yr = 0.0\n"
        "flow_tolerance = 0.5\n"
    )
    res = CliRunner().invoke(cli, ["verify", str(three_plan), "--settings", str(toml)])
    # the TOML replaces the recorded rules: openings and ages pass, flow +-50% breaks
    assert "max_opening" not in res.output
    assert "min_age" not in res.output
    assert "even_flow" in res.output
    assert res.exit_code == 1


def test_yields_override_and_legal_plan(tmp_path: Path) -> None:
    p = tmp_path / "ok.gpkg"
    write_plan(p, {(0, 0): 1, (3, 0): 2, (0, 2): 3, (3, 2): 4}, {}, RULES)
    res = CliRunner().invoke(cli, ["verify", str(p)])
    assert res.exit_code == 0, res.output
    assert res.output.strip().splitlines()[-1].startswith("passed: ")
    other = tmp_path / "yields.csv"
    YIELDS[YIELDS.stratum == "S2"].to_csv(other, index=False)
    res = CliRunner().invoke(
        cli, ["verify", str(p), "--yields", str(other), "--flow-tolerance", "0.1"]
    )
    assert res.exit_code == 1
    assert "no yield curve for stratum S1" in res.output  # the override table is used


def test_console_entry_point_errors(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exc:
        main(["verify", str(tmp_path / "missing.gpkg")])
    assert exc.value.code == 1
    assert "plan file not found" in capsys.readouterr().err


def test_plan_written_before_the_estate_model(tmp_path: Path) -> None:
    """A plan file of the earlier format: schedule columns `harvest_year`, `age_at_harvest`,
    `value`, openings `area_ha`, run keys `lp_bound`/`cpsat_bound`, settings recorded with
    the retired keys `include_ending_value` and `reharvest`, and no harvests table."""
    p = tmp_path / "old.gpkg"
    # two 4 ha stands of S1, ages 60 and 70, cut in period 1 and 2 of 5 years
    sched = gpd.GeoDataFrame(
        {
            "stand_id": ["A", "B", "C"],
            "age": [60.0, 70.0, 20.0],
            "stratum": ["S1", "S1", "S1"],
            "period": pd.array([1, 2, None], dtype="Int64"),
        },
        geometry=[shapely.box(k * SIDE * 2, 0, k * SIDE * 2 + SIDE, SIDE) for k in range(3)],
        crs="EPSG:32610",
    )
    tab = YIELDS[YIELDS.stratum == "S1"]
    ages = np.array([62.5, 77.5])  # age + (p - 0.5) 5 at mid-period (common practice)
    v_ha = np.interp(ages, tab.age, tab.volume)  # numpy reference interpolation
    # (price - harvest cost) V discounted (1 + r)^-t by compound interest (textbook formula)
    t = np.array([2.5, 7.5])
    value = (40.0 - 10.0) * v_ha * 1.04**-t * 4.0
    sched["harvest_year"] = [2.5, 7.5, np.nan]
    sched["age_at_harvest"] = [*ages, np.nan]
    sched["volume_m3"] = [*(v_ha * 4.0), 0.0]
    sched["value"] = [*value, 0.0]
    sched["area_ha"] = 4.0
    sched.to_file(p, layer="schedule")
    openings = sched.iloc[:2][["geometry"]].assign(
        opening_id=["P01-0001", "P02-0001"], period=[1, 2], area_ha=4.0, new_harvest_ha=4.0
    )
    openings.to_file(p, layer="openings")
    recorded = {
        "horizon": {"periods": 3, "period_length_yr": 5.0},
        "rules": {"min_age_yr": 40.0, "flow_tolerance": None, "reharvest": False},
        "economics": {
            "price_per_m3": 40.0,
            "harvest_cost_per_m3": 10.0,
            "include_ending_value": False,
        },
    }
    run = pd.DataFrame(
        {
            "key": ["settings_json", "yields_csv", "lp_bound", "cpsat_bound"],
            "value": [json.dumps(recorded), YIELDS.to_csv(index=False), "1", ""],
        }
    )
    pyogrio.write_dataframe(run, p, layer="run")
    res = CliRunner().invoke(cli, ["verify", str(p)])
    assert res.exit_code == 0, res.output
    assert "recorded_value" in res.output  # the old `value` column was read and checked
    assert "ending values are not checked" in res.output
    # a wrong old `value` is found as before
    sched.loc[1, "value"] += 10.0
    sched.to_file(p, layer="schedule")
    res = CliRunner().invoke(cli, ["verify", str(p)])
    assert res.exit_code == 1
    assert "violation: recorded_value period 2 stands B" in res.output


def _old_plan(path: Path, tolerance_m: float) -> None:
    """Two 4 ha stands 1 m apart, both cut in period 1, written by an earlier version: its
    recorded settings use the old keys ``solver.gap`` and ``adjacency.gap_tolerance_m``."""
    gdf = gpd.GeoDataFrame(
        {
            "stand_id": ["A", "B"],
            "age": [60.0, 60.0],
            "stratum": ["S1", "S1"],
            "period": pd.array([1, 1], dtype="Int64"),
        },
        geometry=[shapely.box(0, 0, SIDE, SIDE), shapely.box(SIDE + 1, 0, 2 * SIDE + 1, SIDE)],
        crs="EPSG:32610",
    )
    gdf.to_file(path, layer="schedule")
    s = settings_from_dict(
        {
            "horizon": {"periods": 2, "period_length_yr": 5.0},
            "rules": {"max_opening_ha": 5.0, "green_up_periods": 1, "flow_tolerance": None},
        }
    ).to_dict()
    s["solver"]["gap"] = s["solver"].pop("stop_gap")
    del s["adjacency"]["digitising_tolerance_m"]
    s["adjacency"]["gap_tolerance_m"] = tolerance_m
    run = pd.DataFrame(
        {"key": ["settings_json", "yields_csv"], "value": [json.dumps(s), YIELDS.to_csv()]}
    )
    pyogrio.write_dataframe(run, path, layer="run")


def test_old_plan_with_renamed_keys(tmp_path: Path) -> None:
    # Hand computation: the facing edges are 200 m long and 1 m apart. With the recorded
    # 2 m digitising tolerance they count as shared boundary, so A and B form one 8 ha
    # opening above the 5 ha limit; with 0.5 m they are two 4 ha openings.
    p = tmp_path / "old.gpkg"
    _old_plan(p, tolerance_m=2.0)
    res = CliRunner().invoke(cli, ["verify", str(p)])
    assert res.exit_code == 1, res.output
    assert "is now called 'adjacency.digitising_tolerance_m'" in res.output
    assert "is now called 'solver.stop_gap'" in res.output
    assert any(ln.startswith("violation: max_opening period 1") for ln in res.output.splitlines())
    assert res.output.strip().splitlines()[-1].startswith("failed: 1 violation(s)")
    # The new flag overrides the recorded value; the old flag still works, with a note.
    for flag in ("--digitising-tolerance", "--gap-tolerance"):
        res = CliRunner().invoke(cli, ["verify", str(p), flag, "0.5"])
        assert res.exit_code == 0, res.output
        assert res.output.strip().splitlines()[-1].startswith("passed: ")
    assert "note: flag --gap-tolerance is now called --digitising-tolerance" in res.output


def test_usage_errors_use_the_error_prefix(tmp_path: Path) -> None:
    res = CliRunner().invoke(cli, ["verify", str(tmp_path / "x.gpkg"), "--no-such-flag"])
    assert res.exit_code == 1
    assert "error: No such option '--no-such-flag'" in res.output
    assert "Error:" not in res.output
