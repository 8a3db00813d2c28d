"""The flat Python API (``import spatialplan``) against the commands on the same inputs."""

from __future__ import annotations

import dataclasses
import subprocess
import sys
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
from click.testing import CliRunner
from geopandas.testing import assert_geodataframe_equal

import spatialplan
from spatialplan.cli import cli
from spatialplan.errors import InputError, OutputError, SettingsError
from spatialplan.runtable import read_run_table
from spatialplan.synthetic import synthetic_yield_table, voronoi_forest

# A tiny forest solved to proven optimality (gap 0, one worker, fixed seed): the optimum
# NPV is one number, so the command and the API must both reach it.
FLAGS = {
    "--price": "40",
    "--periods": "3",
    "--min-age": "30",
    "--max-opening": "25",
    "--time-limit": "60",
    "--workers": "1",
    "--seed": "7",
    "--stop-gap": "0",
}
OVERRIDES = {
    "economics.price_per_m3": 40.0,
    "horizon.periods": 3,
    "rules.min_age_yr": 30.0,
    "rules.max_opening_ha": 25.0,
    "solver.time_limit_s": 60.0,
    "solver.workers": 1,
    "solver.seed": 7,
    "solver.stop_gap": 0.0,
    "output.no_map": True,
}


@pytest.fixture(scope="module")
def files(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("api")
    stands = voronoi_forest(14, seed=4, mean_area_ha=10.0, reserve_share=0.15)
    stands.to_file(d / "stands.gpkg", layer="stands", driver="GPKG")
    synthetic_yield_table().to_csv(d / "yields.csv", index=False)
    return {"dir": d, "stands": d / "stands.gpkg", "yields": d / "yields.csv"}


@pytest.fixture(scope="module")
def settings(files: dict[str, Path]) -> spatialplan.Settings:
    return spatialplan.load_settings(None, {**OVERRIDES, "fields.reserve_field": "reserve"})


@pytest.fixture(scope="module")
def api_plan(files: dict[str, Path], settings: spatialplan.Settings) -> spatialplan.HarvestPlan:
    return spatialplan.plan(files["stands"], files["yields"], settings)


@pytest.fixture(scope="module")
def cli_plan(files: dict[str, Path]) -> Path:
    out = files["dir"] / "cli_plan.gpkg"
    args = ["plan", str(files["stands"]), "--yields", str(files["yields"]), "--out", str(out)]
    args += [*(x for kv in FLAGS.items() for x in kv), "--reserve-field", "reserve", "--no-map"]
    res = CliRunner().invoke(cli, args)
    assert res.exit_code == 0, res.output
    return out


def test_plan_matches_the_command(api_plan: spatialplan.HarvestPlan, cli_plan: Path) -> None:
    run = read_run_table(cli_plan)
    assert api_plan.status == run["solver_status"] == "optimal"
    assert api_plan.npv == pytest.approx(float(run["npv"]), abs=0.01)  # recorded to 2 decimals
    assert api_plan.lp_bound == pytest.approx(float(run["bound_aspatial_lp"]), abs=0.01)
    assert api_plan.verify.ok and run["verify_verdict"] == api_plan.verdict
    # The in-memory layers add up like the written ones (same NPV from the stand values).
    sched = pyogrio.read_dataframe(cli_plan, layer="schedule")
    assert api_plan.schedule["npv"].sum() == pytest.approx(sched["npv"].sum(), rel=1e-9)
    # The plan NPV is every harvest (by period) plus the discounted ending value.
    ending = api_plan.schedule["ending_value_npv"].sum()
    assert api_plan.periods["npv"].sum() + ending == pytest.approx(api_plan.npv, rel=1e-9)
    harvests = pyogrio.read_dataframe(cli_plan, layer="harvests", read_geometry=False)
    pd.testing.assert_frame_equal(harvests, api_plan.harvests, check_dtype=False)
    assert len(api_plan.schedule) == len(sched) == 14
    assert api_plan.schedule.crs == sched.crs


def test_write_outputs_writes_what_plan_holds(
    api_plan: spatialplan.HarvestPlan, files: dict[str, Path]
) -> None:
    out = files["dir"] / "api_plan.gpkg"
    written = spatialplan.write_outputs(api_plan, out)
    assert written == [out]  # output.no_map: the GeoPackage only
    sched = gpd.read_file(out, layer="schedule")
    cols = ["stand_id", "period", "harvest_periods", "volume_m3", "npv", "opening_id"]
    expected = api_plan.schedule[[*cols, "geometry"]].copy()
    assert_geodataframe_equal(
        sched[[*cols, "geometry"]], expected, check_dtype=False, check_less_precise=True
    )
    periods = pyogrio.read_dataframe(out, layer="periods")
    pd.testing.assert_frame_equal(periods, api_plan.periods, check_dtype=False)
    run = read_run_table(out)
    for key in ("npv", "best_bound", "solver_status", "verify_verdict", "settings_json"):
        assert run[key] == api_plan.run[key]
    # Outputs are checked before writing: no silent replacement, never an input.
    with pytest.raises(OutputError, match="--overwrite"):
        spatialplan.write_outputs(api_plan, out)
    with pytest.raises(OutputError, match="same file as input"):
        spatialplan.write_outputs(api_plan, files["stands"], overwrite=True)


def test_write_outputs_with_review_files(
    api_plan: spatialplan.HarvestPlan, files: dict[str, Path]
) -> None:
    s = api_plan.settings.with_overrides({"output.no_map": False})
    with_map = dataclasses.replace(
        api_plan, inputs=dataclasses.replace(api_plan.inputs, settings=s)
    )
    out = files["dir"] / "with_map.gpkg"
    written = spatialplan.write_outputs(with_map, out)
    names = {p.name for p in written}
    assert {"with_map.gpkg", "with_map.map.html", "with_map.report.html"} <= names
    assert all(p.is_file() for p in written)


def test_render_review_files_matches_the_command(
    api_plan: spatialplan.HarvestPlan, files: dict[str, Path]
) -> None:
    out = files["dir"] / "review.gpkg"
    spatialplan.write_outputs(api_plan, out)
    done = spatialplan.render_review_files(out)
    report = done["report"].read_text(encoding="utf-8")
    assert f"{api_plan.npv:,.0f}" in report
    res = CliRunner().invoke(cli, ["map", str(out), "--overwrite"])
    assert res.exit_code == 0, res.output
    assert f"{api_plan.npv:,.0f}" in done["report"].read_text(encoding="utf-8")
    assert sorted(p.name for p in done["charts"]) == sorted(
        p.name for p in (files["dir"] / "review_charts").glob("*.png")
    )
    with pytest.raises(OutputError, match="--overwrite"):
        spatialplan.render_review_files(out)


def test_verify_plan_matches_the_command(api_plan: spatialplan.HarvestPlan, cli_plan: Path) -> None:
    res = CliRunner().invoke(cli, ["verify", str(cli_plan)])
    assert res.exit_code == 0, res.output
    from_file = spatialplan.verify_plan(cli_plan)
    assert res.output.strip().splitlines()[-1] == from_file.verdict
    assert spatialplan.verify_plan(api_plan).verdict == api_plan.verdict
    # Harvesting every stand in period 1 breaks the opening rule; the API and the command
    # (run on the same schedule written to a file) name the same broken rules.
    keep = ["stand_id", "age", "stratum", "reserve", "net_area_ha", "geometry"]
    bad = api_plan.schedule[keep].copy()
    bad["period"] = 1
    report = spatialplan.verify_plan(bad, api_plan.settings, api_plan.inputs.growth)
    assert not report.ok
    rules = {v.rule for v in report.violations}
    assert "max_opening" in rules
    path = cli_plan.parent / "bad.gpkg"
    pyogrio.write_dataframe(bad, path, layer="schedule")
    pyogrio.write_dataframe(pyogrio.read_dataframe(cli_plan, layer="run"), path, layer="run")
    res = CliRunner().invoke(cli, ["verify", str(path)])
    assert res.exit_code == 1
    assert res.output.strip().splitlines()[-1] == spatialplan.verify_plan(path).verdict
    assert {ln.split()[1] for ln in res.output.splitlines() if ln.startswith("violation:")} == rules


def test_plan_again_under_other_rules(api_plan: spatialplan.HarvestPlan) -> None:
    inputs = api_plan.inputs
    tighter = inputs.settings.with_overrides({"rules.max_opening_ha": 12.0})
    again = spatialplan.plan(inputs, settings=tighter)
    assert again.verify.ok and again.settings.rules.max_opening_ha == 12.0
    assert again.openings["gross_area_ha"].max() <= 12.0 + 1e-9
    # A tighter rule cannot raise the optimum (both solved to proven optimality).
    assert again.npv <= api_plan.npv + 0.01
    with pytest.raises(SettingsError, match=r"\[terrain\].*read_inputs"):
        spatialplan.plan(inputs, settings=tighter.with_overrides({"terrain.stream_buffer_m": 5}))


def test_read_inputs_from_frames_equals_files(files: dict[str, Path]) -> None:
    s = spatialplan.load_settings(None, {"fields.reserve_field": "reserve"})
    from_files = spatialplan.read_inputs(files["stands"], files["yields"], s)
    frame = gpd.read_file(files["stands"])
    from_frames = spatialplan.read_inputs(frame, pd.read_csv(files["yields"]), s)
    assert_geodataframe_equal(from_frames.inventory.stands, from_files.inventory.stands)
    pd.testing.assert_frame_equal(
        from_frames.yield_table.frame, from_files.yield_table.frame, check_dtype=False
    )
    # read_yields: a DataFrame is parsed as its CSV file is.
    pd.testing.assert_frame_equal(
        spatialplan.read_yields(pd.read_csv(files["yields"]), s).frame,
        spatialplan.read_yields(files["yields"], s).frame,
    )
    assert str(from_frames.stands_path) == "stands GeoDataFrame"
    assert from_frames.yields_path is None
    # Errors name the frame, not a temporary file.
    dup = frame.copy()
    dup.loc[1, "stand_id"] = dup.loc[0, "stand_id"]
    with pytest.raises(InputError) as err:
        spatialplan.read_inputs(dup, files["yields"], s)
    assert "stands GeoDataFrame" in str(err.value) and "repeated" in str(err.value)
    assert "spatialplan-" not in str(err.value)
    bad = pd.read_csv(files["yields"])
    bad.loc[3, "volume"] = -1.0
    with pytest.raises(InputError, match=r"(?s)yields DataFrame .*line 5 .*negative volume"):
        spatialplan.read_inputs(frame, bad, s)


def test_check_inputs_matches_the_command(files: dict[str, Path]) -> None:
    s = spatialplan.load_settings(None, {"fields.reserve_field": "reserve"})
    summary = spatialplan.check_inputs(files["stands"], files["yields"], s)
    res = CliRunner().invoke(
        cli, ["check", str(files["stands"]), "--yields", str(files["yields"]),
              "--reserve-field", "reserve"],
    )  # fmt: skip
    assert res.exit_code == 0 and summary.usable
    rows = {
        ln.split("│")[1].strip(): ln.split("│")[2].strip()
        for ln in res.output.splitlines()
        if ln.count("│") == 3
    }
    assert rows["stands"] == str(summary.n_stands)
    assert rows["reserve stands"] == str(summary.reserve_stands) != "0"
    assert rows["net harvestable area (ha)"] == f"{summary.harvestable_net_area_ha:,.1f}"
    # Without streams or a DEM the harvestable area is the gross area of non-reserves.
    st = gpd.read_file(files["stands"]).to_crs(summary.working_crs)
    gross = st.area.to_numpy() / 10_000.0
    assert summary.harvestable_net_area_ha == pytest.approx(
        gross[st["reserve"].to_numpy() == 0].sum(), rel=1e-9
    )


def test_rotation_table_matches_the_command(tmp_path: Path) -> None:
    yields = synthetic_yield_table(["S1", "S2"], max_age=120)
    out = tmp_path / "rot.csv"
    path = tmp_path / "y.csv"
    yields.to_csv(path, index=False)
    args = ["rotation", "--yields", str(path), "--price", "40", "--discount-rate", "0.03"]
    res = CliRunner().invoke(cli, [*args, "--out", str(out), "--no-charts"])
    assert res.exit_code == 0, res.output
    settings = spatialplan.load_settings(
        None, {"economics.price_per_m3": 40.0, "economics.discount_rate": 0.03}
    )
    df = spatialplan.rotation_table(yields, settings)
    csv = pd.read_csv(out)
    assert csv["stratum"].tolist() == df["stratum"].tolist() == ["S1", "S2"]
    for col in ("mai_max_age", "fisher_age", "faustmann_age", "lev_per_ha"):
        np.testing.assert_allclose(csv[col], df[col], rtol=1e-5)  # CSV keeps 6 digits


def test_flat_api_is_lazy_and_complete() -> None:
    code = (
        "import sys, spatialplan; "
        "assert 'spatialplan.api' not in sys.modules and 'pandas' not in sys.modules; "
        "names = [n for n in spatialplan.__all__ if not callable(getattr(spatialplan, n))]; "
        "assert names == ['__version__'], names"
    )
    subprocess.run([sys.executable, "-c", code], check=True)
    # A submodule import must not shadow an API function (hence verify_plan, not verify).
    import spatialplan.verify

    assert callable(spatialplan.verify_plan)
    assert set(spatialplan.__all__) <= set(dir(spatialplan))
    with pytest.raises(AttributeError, match="no attribute 'nonesuch'"):
        _ = spatialplan.nonesuch  # type: ignore[attr-defined]
