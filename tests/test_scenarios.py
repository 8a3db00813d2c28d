"""Scenario files, scenario comparison on a real Dask LocalCluster, management units."""

from __future__ import annotations

import itertools
import re
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd
import pytest

from spatialplan.errors import InfeasibleError, SettingsError
from spatialplan.pipeline import load_inputs, run_plan
from spatialplan.scenarios import (
    cross_unit_edges,
    load_scenarios,
    plan_by_unit,
    run_comparison,
    split_threads,
)
from spatialplan.settings import Settings, apply_overrides, load_settings
from spatialplan.synthetic import synthetic_yield_table, voronoi_forest

# Small instances that CP-SAT proves optimal in seconds: 30 stands, 3 periods, one
# search worker and a fixed seed (solver.stop_gap = 0: "optimal" means proven).
BASE = {
    "solver.workers": 1,
    "solver.seed": 0,
    "solver.stop_gap": 0.0,
    "solver.time_limit_s": 30,
    "horizon.periods": 3,
    "economics.price_per_m3": 50.0,
    "rules.min_age_yr": 30,
    "output.no_map": True,
}


def _toml_value(v: object) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return f'"{v}"'
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return repr(v)


def _table(d: dict) -> str:
    return "\n".join(f'"{k}" = {_toml_value(v)}' for k, v in d.items())


def write_forest(folder: Path, n: int = 30, seed: int = 7) -> tuple[Path, Path]:
    stands = folder / "stands.gpkg"
    voronoi_forest(n, seed=seed, mean_area_ha=8).to_file(stands, layer="stands", driver="GPKG")
    yields = folder / "yields.csv"
    synthetic_yield_table().to_csv(yields, index=False)
    return stands, yields


def write_scenarios(
    folder: Path, scenarios: dict[str, dict], sweeps: list[str] = (), base: dict | None = None
) -> Path:
    parts = [
        '[inputs]\nstands = "stands.gpkg"\nyields = "yields.csv"\n',
        "[base]\n" + _table({**BASE, **(base or {})}) + "\n",
    ]
    for name, ov in scenarios.items():
        parts.append(f"[scenarios.{name}]\n{_table(ov)}\n")
    parts.extend(sweeps)
    p = folder / "scenarios.toml"
    p.write_text("\n".join(parts), encoding="utf-8")
    return p


def sequential(
    stands: Path, yields: Path, settings: Settings, out: Path
) -> tuple[float, np.ndarray]:
    """The reference: the plain ``plan`` pipeline in this process."""
    outcome = run_plan(load_inputs(stands, yields, settings), out)
    return outcome.result.npv, np.asarray(outcome.result.period)


@pytest.fixture(scope="module")
def client():
    """A real dask.distributed LocalCluster: 2 worker processes, 1 thread each."""
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        host="127.0.0.1",
        dashboard_address=":0",
        silence_logs=40,
    )
    c = distributed.Client(cluster)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


# ---------------------------------------------------------------------------------------
# scenario file
# ---------------------------------------------------------------------------------------
def test_sweep_cross_is_cartesian_product(tmp_path: Path) -> None:
    write_forest(tmp_path, n=12)
    sweep = (
        '[[sweep]]\nvary = { "rules.max_opening_ha" = [20, 40, 60], '
        '"economics.discount_rate" = [0.03, 0.05] }\n'
        'labels = { "rules.max_opening_ha" = "open", "economics.discount_rate" = "rate" }\n'
        '[[sweep]]\nname = "flow"\nvary = { "rules.flow_tolerance" = [0.05, "off"] }\n'
    )
    p = write_scenarios(tmp_path, {"base": {}}, [sweep])
    scen = load_scenarios(p)
    # Cartesian product definition: |A x B| = |A| |B|, every pair once (itertools.product).
    grid = list(itertools.product([20, 40, 60], [0.03, 0.05]))
    names = [f"open{a:g}_rate{r:g}" for a, r in grid]
    assert scen.names == ["base", *names, "flow_flow_tolerance0.05", "flow_flow_toleranceoff"]
    by = {s.name: s.settings for s in scen.scenarios}
    for (a, r), n in zip(grid, names, strict=True):
        assert by[n].rules.max_opening_ha == a
        assert by[n].economics.discount_rate == r
        assert by[n].solver.workers == 1  # [base] reaches every scenario
    assert by["flow_flow_tolerance0.05"].rules.flow_tolerance == 0.05
    assert by[scen.names[-1]].rules.flow_tolerance is None  # "off" switches the rule off
    assert by["base"].rules.max_opening_ha == Settings().rules.max_opening_ha


def test_scenario_file_errors_name_the_key(tmp_path: Path) -> None:
    write_forest(tmp_path, n=12)
    p = write_scenarios(tmp_path, {"a": {"rules.max_openin_ha": 30}})
    with pytest.raises(SettingsError, match=r"scenario 'a'.*rules\.max_openin_ha.*max_opening_ha"):
        load_scenarios(p)
    p = write_scenarios(tmp_path, {"a": {"rules.flow_tolerance": 3.0}})
    with pytest.raises(SettingsError, match=r"rules\.flow_tolerance.*out of range"):
        load_scenarios(p)
    p = write_scenarios(tmp_path, {"a": {"rules.green_up_periods": "off"}})
    with pytest.raises(SettingsError, match=r"rules\.green_up_periods"):
        load_scenarios(p)
    sweep = '[[sweep]]\nvary = { "rules.max_opening_ha" = [20, 20] }\n'
    p = write_scenarios(tmp_path, {}, [sweep])
    with pytest.raises(SettingsError, match="duplicate scenario name"):
        load_scenarios(p)
    p.write_text('[inputs]\nstands = "stands.gpkg"\n[scenario.a]\nx = 1\n', encoding="utf-8")
    with pytest.raises(SettingsError, match=r"unknown section.*did you mean '\[scenarios\]'"):
        load_scenarios(p)
    p.write_text('[inputs]\nstands = "missing.gpkg"\n[scenarios.a]\n', encoding="utf-8")
    with pytest.raises(SettingsError, match=r"inputs\.stands.*not found"):
        load_scenarios(p)


def test_unit_overrides_checked_at_load(tmp_path: Path) -> None:
    write_forest(tmp_path, n=12)
    p = write_scenarios(tmp_path, {"a": {}})
    text = p.read_text(encoding="utf-8")
    p.write_text(text + '[units.North]\n"rules.flow_tolerance" = 0.05\n', encoding="utf-8")
    assert load_scenarios(p).unit_overrides == {"North": {"rules.flow_tolerance": 0.05}}
    p.write_text(text + '[units.North]\n"rules.flow_tolerance" = 3.0\n', encoding="utf-8")
    with pytest.raises(SettingsError, match=r"\[units\.North\].*rules\.flow_tolerance.*range"):
        load_scenarios(p)
    # The inputs (layer, yield table, slope, stream buffers) are read once for all units,
    # so a unit cannot change how they are read.
    p.write_text(text + '[units.North]\n"terrain.stream_buffer_m" = 30\n', encoding="utf-8")
    with pytest.raises(SettingsError, match=r"\[units\.North\].*terrain\.stream_buffer_m"):
        load_scenarios(p)


def test_split_threads_stays_within_cores() -> None:
    # Arithmetic of the split (common practice, no source: do not oversubscribe cores).
    for cores in (1, 2, 3, 8, 16):
        for n in (1, 2, 5, 8, 40):
            w, t = split_threads(n, cores=cores)
            assert w * t <= max(cores, t)
            assert 1 <= w <= n
            if n >= cores:
                assert (w, t) == (cores, 1)


def test_setting_columns_are_plain_and_never_clash(tmp_path: Path) -> None:
    from spatialplan.scenarios import column_name, comparison_table
    from spatialplan.settings import flatten_overrides

    write_forest(tmp_path, n=12)
    scen = load_scenarios(write_scenarios(tmp_path, {"a": {"rules.max_opening_ha": 20}}))
    fixed = set(comparison_table(scen, {}).columns) - {"rules_max_opening_ha"}
    # Brute force over every settings key: each maps to its own plain name (letters,
    # digits, "_"), and none meets a column that is not a setting.
    names = [column_name(k) for k in flatten_overrides(Settings().to_dict())]
    assert len(set(names)) == len(names)
    assert all(re.fullmatch(r"[A-Za-z0-9_]+", n) for n in names)
    assert not set(names) & fixed
    assert not [n for n in names if n.startswith(("cost_", "ref_", "volume_m3_p", "area_ha_p"))]


def test_best_bound_is_the_tightest_proven_bound() -> None:
    from spatialplan.scenarios import ScenarioResult, best_bound

    # Both the LP relaxation and CP-SAT's bound are upper bounds on the optimum (LP
    # relaxation of a MIP; CP-SAT's objective bound), so the smaller one is kept.
    r = ScenarioResult("a", True, "time_limit", npv=90.0, lp_bound=110.0, cpsat_bound=100.0)
    r.gap = 0.1
    assert best_bound(r) == 100.0
    r.cpsat_bound = None  # only sub-models were solved: the LP bound is all there is
    assert best_bound(r) == 110.0
    r.gap = 0.0  # the solver proved the plan optimal: the bound is the NPV itself
    assert best_bound(r) == 90.0
    r = ScenarioResult("b", True, "optimal", npv=90.0, lp_bound=89.9999, gap=1e-7)
    assert best_bound(r) == 90.0  # a bound is never below a plan that reaches it
    assert np.isnan(best_bound(ScenarioResult("c", False, "infeasible")))


# ---------------------------------------------------------------------------------------
# Dask
# ---------------------------------------------------------------------------------------
def test_local_cluster_matches_sequential_runs(tmp_path: Path, client) -> None:
    stands, yields = write_forest(tmp_path, n=40, seed=11)
    scen_ov = {
        "open8": {"rules.max_opening_ha": 8},
        "open12_flow20": {"rules.max_opening_ha": 12, "rules.flow_tolerance": 0.2},
        "noflow": {"rules.max_opening_ha": 10, "rules.flow_tolerance": "off"},
    }
    p = write_scenarios(tmp_path, scen_ov)
    scen = load_scenarios(p)
    res = run_comparison(scen, tmp_path / "out", client=client)
    assert res.mode == "shared"
    assert not res.failed, res.table[["scenario", "status", "error"]]
    workers = {r.worker for r in res.results.values()}
    assert all(":" in w for w in workers)
    for s in scen.scenarios:
        # Reference: the same settings through the plain pipeline, one after another.
        npv, period = sequential(stands, yields, s.settings, tmp_path / f"seq_{s.name}.gpkg")
        r = res.results[s.name]
        assert r.status == "optimal"
        assert r.npv == pytest.approx(npv, rel=1e-9)
        np.testing.assert_array_equal(r.period, period)
        assert (tmp_path / "out" / f"{s.name}.gpkg").is_file()
        # The GeoPackage written from the worker's bytes holds the same plan.
        sched = pd.read_csv(tmp_path / "out" / "comparison.csv").set_index("scenario")
        assert sched.loc[s.name, "npv"] == pytest.approx(npv, rel=1e-9)


def test_monotone_in_opening_size_and_flow_tolerance(tmp_path: Path, client, monkeypatch) -> None:
    import spatialplan.charts as charts

    legends: list[str] = []
    save = charts._save

    def keep_legends(fig, path):  # read the chart's legends before it is written
        legends.extend(
            t.get_text() for ax in fig.axes if ax.get_legend() for t in ax.get_legend().get_texts()
        )
        return save(fig, path)

    monkeypatch.setattr(charts, "_save", keep_legends)
    write_forest(tmp_path, n=30, seed=7)
    sweeps = [
        '[[sweep]]\nname = "a"\nset = { "rules.flow_tolerance" = 0.2 }\n'
        'vary = { "rules.max_opening_ha" = [8, 12, "off"] }\n'
        'labels = { "rules.max_opening_ha" = "open" }\n',
        '[[sweep]]\nname = "f"\nset = { "rules.max_opening_ha" = 12 }\n'
        'vary = { "rules.flow_tolerance" = [0.05, 0.2, "off"] }\n'
        'labels = { "rules.flow_tolerance" = "tol" }\n',
    ]
    scen = load_scenarios(write_scenarios(tmp_path, {}, sweeps))
    res = run_comparison(scen, tmp_path / "out", client=client, ship=True)
    assert res.mode == "shipped"
    t = res.table.set_index("scenario")
    assert (t["status"] == "optimal").all(), t[["status", "error"]]
    # Relaxation argument: every plan feasible under the tighter rule is feasible under
    # the looser one, so the optimal NPV cannot rise as the rule tightens.
    eps = 1e-6 * t["npv"].abs().max()
    assert t.loc["a_open8", "npv"] <= t.loc["a_open12", "npv"] + eps
    assert t.loc["a_open12", "npv"] <= t.loc["a_openoff", "npv"] + eps
    assert t.loc["f_tol0.05", "npv"] <= t.loc["f_tol0.2", "npv"] + eps
    assert t.loc["f_tol0.2", "npv"] <= t.loc["f_toloff", "npv"] + eps
    # The aspatial LP relaxation bounds every plan from above (LP relaxation of a MIP).
    assert (t["cost_spatial_rules_upper"] >= -eps).all()
    assert (t["cost_spatial_rules_lower"] >= -eps).all()
    # The optimum lies between the NPV and every proven upper bound (LP bound, CP-SAT's
    # bound), so the best bound is the smaller bound, never below the NPV.
    bounds = t[["bound_aspatial_lp", "bound_cpsat", "bound_cover_lp"]].min(axis=1)
    assert (t["best_bound"] >= t["npv"] - eps).all()
    assert (t["best_bound"] <= bounds + eps).all()
    assert t["cost_spatial_rules_upper"].to_numpy() == pytest.approx(
        t["bound_aspatial_lp"] - t["npv"]
    )
    assert t["cost_spatial_rules_lower"].to_numpy() == pytest.approx(
        t["bound_aspatial_lp"] - t["best_bound"]
    )
    # Proven optimal (gap 0): no solver shortfall, the two estimates agree.
    proven = t["gap"] == 0
    assert proven.any()
    assert t.loc[proven, "cost_spatial_rules_lower"].to_numpy() == pytest.approx(
        t.loc[proven, "cost_spatial_rules_upper"].to_numpy()
    )
    # Cost of the rule: NPV of the loosest value at the same other settings minus NPV.
    c = t["cost_rules_max_opening_ha"]
    assert t.loc["a_open8", "ref_rules_max_opening_ha"] == "a_openoff"
    assert c["a_open8"] == pytest.approx(t.loc["a_openoff", "npv"] - t.loc["a_open8", "npv"])
    assert c["a_openoff"] == 0.0
    assert t.loc["f_tol0.05", "ref_rules_flow_tolerance"] == "f_toloff"
    assert (t["cost_rules_flow_tolerance"].dropna() >= -eps).all()
    # The varied settings under plain column names, with the values each scenario ran with
    # (the "f" sweep fixes the opening at 12 ha, the "a" sweep the tolerance at 0.2).
    assert t.loc["a_open8", "rules_max_opening_ha"] == 8
    assert t.loc["a_openoff", "rules_max_opening_ha"] == "off"
    assert t.loc["f_tol0.05", "rules_max_opening_ha"] == 12
    assert t.loc["a_open8", "rules_flow_tolerance"] == 0.2
    assert t.loc["f_toloff", "rules_flow_tolerance"] == "off"
    csv = pd.read_csv(tmp_path / "out" / "comparison.csv")
    assert not [c for c in csv.columns if not re.fullmatch(r"[A-Za-z0-9_]+", c)]
    assert list(csv.columns) == list(res.table.columns)
    # The chart speaks words: readable settings, no dotted keys, the spatial rules' cost
    # labelled as including the solver gap.
    assert (tmp_path / "out" / "comparison.png").stat().st_size > 10_000
    assert "cost of spatial rules + solver gap (upper estimate)" in legends
    assert "cost of spatial rules, lower estimate (best proven bound)" in legends
    assert {"cost of max opening", "cost of flow tolerance"} <= set(legends)
    assert "a_open8: max opening 8 ha" in legends
    assert "f_tol0.05: flow tolerance 5 %" in legends
    assert not [t for t in legends if "rules." in t or "rules_" in t]


def test_infeasible_scenario_reported_others_complete(tmp_path: Path, client) -> None:
    stands, yields = write_forest(tmp_path, n=30, seed=7)
    scen_ov = {
        "ok_a": {"rules.max_opening_ha": 8},
        "too_much": {"rules.period_volume_min_m3": 1e9},  # far above the standing volume
        "ok_b": {"rules.max_opening_ha": 12},
    }
    scen = load_scenarios(write_scenarios(tmp_path, scen_ov))
    res = run_comparison(scen, tmp_path / "out", client=client)
    bad = res.results["too_much"]
    assert not bad.ok
    assert bad.status == "infeasible"
    # The diagnosis is the one the plain pipeline raises for the same rules.
    with pytest.raises(InfeasibleError) as ei:
        sequential(stands, yields, scen.scenarios[1].settings, tmp_path / "seq.gpkg")
    assert bad.diagnosis == list(ei.value.diagnosis)
    assert bad.diagnosis, "an infeasible scenario is reported with its diagnosis"
    assert res.failed == ["too_much"]
    assert res.results["ok_a"].ok
    assert res.results["ok_b"].ok
    t = pd.read_csv(tmp_path / "out" / "comparison.csv").set_index("scenario")
    assert t.loc["too_much", "status"] == "infeasible"
    assert not (tmp_path / "out" / "too_much.gpkg").exists()
    assert (tmp_path / "out" / "ok_a.gpkg").is_file()


# ---------------------------------------------------------------------------------------
# management units
# ---------------------------------------------------------------------------------------
def _two_units(folder: Path, gap_m: float) -> tuple[Path, Path]:
    """Two small forests side by side, ``gap_m`` apart (0 = touching), as units N and S."""
    a = voronoi_forest(14, seed=3, mean_area_ha=8)
    b = voronoi_forest(14, seed=4, mean_area_ha=8)
    side = float(a.total_bounds[2] - a.total_bounds[0])
    b["geometry"] = b.geometry.translate(xoff=side + gap_m)
    a["stand_id"] = "N" + a["stand_id"]
    b["stand_id"] = "S" + b["stand_id"]
    a["unit"] = "N"
    b["unit"] = "S"
    g = pd.concat([a, b], ignore_index=True)
    stands = folder / "units.gpkg"
    g.to_file(stands, layer="stands", driver="GPKG")
    yields = folder / "yields.csv"
    synthetic_yield_table().to_csv(yields, index=False)
    return stands, yields


def test_plan_by_unit_equals_whole_plan_when_separable(tmp_path: Path, client) -> None:
    stands, yields = _two_units(tmp_path, gap_m=500.0)
    s = load_settings(
        None,
        {**BASE, "fields.unit_field": "unit", "fields.layer": "stands", "rules.max_opening_ha": 10},
    )
    s = apply_overrides(s, {"rules.flow_tolerance": "off"})
    by_unit = plan_by_unit(load_inputs(stands, yields, s), tmp_path / "merged.gpkg", client=client)
    whole = run_plan(load_inputs(stands, yields, s), tmp_path / "whole.gpkg")
    assert whole.result.status == "optimal"
    assert by_unit.result.status == "optimal"
    # Separable problem (no shared constraint, no edge between units): the optimum of the
    # sum is the sum of the optima of the blocks.
    assert by_unit.result.npv == pytest.approx(whole.result.npv, rel=1e-9)
    assert by_unit.verify.ok, by_unit.verify.verdict
    assert by_unit.result.stats["cross_unit_edges"] == 0
    assert not any("different units" in m for m in by_unit.messages)
    assert (tmp_path / "merged.gpkg").is_file()


def test_plan_by_unit_per_unit_flow_and_adjacency_warning(tmp_path: Path) -> None:
    stands, yields = _two_units(tmp_path, gap_m=0.0)
    s = load_settings(
        None,
        {
            **BASE,
            "fields.unit_field": "unit",
            "fields.layer": "stands",
            "rules.max_opening_ha": 10,
            "rules.flow_tolerance": 0.2,
        },
    )
    out = plan_by_unit(load_inputs(stands, yields, s), tmp_path / "merged.gpkg")  # in-process
    # Cross-unit pairs, checked against networkx on the whole adjacency graph.
    from spatialplan.pipeline import build_problem

    inputs = load_inputs(stands, yields, s)
    bundle = build_problem(inputs)
    units = inputs.inventory.stands["unit"].to_numpy(dtype=object)
    g = nx.Graph()
    g.add_edges_from(map(tuple, bundle.problem.edges))
    ref = sum(1 for a, b in g.edges if units[a] != units[b])
    assert len(cross_unit_edges(bundle.problem.edges, units)) == ref > 0
    assert out.result.stats["cross_unit_edges"] == ref
    assert any("different units" in m for m in out.messages)
    # Each unit keeps its own +-20 % flow (by-unit planning), hence so does the sum:
    # |V_u[p+1] - V_u[p]| <= 0.2 V_u[p] summed over units gives the forest-wide bound.
    sched = out.schedule
    for u in ("N", "S"):
        sub = sched[sched["unit"] == u]
        vol = sub.groupby("period")["volume_m3"].sum().reindex([1, 2, 3], fill_value=0.0)
        v = vol.to_numpy(float)
        assert np.all(np.abs(np.diff(v)) <= 0.2 * v[:-1] + 1e-6 * max(v.max(), 1.0))


def test_plan_by_unit_refuses_forest_wide_targets(tmp_path: Path) -> None:
    stands, yields = _two_units(tmp_path, gap_m=500.0)
    s = load_settings(
        None,
        {
            **BASE,
            "fields.unit_field": "unit",
            "fields.layer": "stands",
            "rules.period_volume_min_m3": 100.0,
        },
    )
    with pytest.raises(SettingsError, match=r"rules\.period_volume_min_m3.*per unit"):
        plan_by_unit(load_inputs(stands, yields, s), tmp_path / "merged.gpkg")
    s = load_settings(None, {**BASE, "fields.layer": "stands"})
    with pytest.raises(SettingsError, match=r"fields\.unit_field"):
        plan_by_unit(load_inputs(stands, yields, s), tmp_path / "merged.gpkg")


def test_compare_by_unit_merges_units(tmp_path: Path, client) -> None:
    stands, yields = _two_units(tmp_path, gap_m=500.0)
    p = tmp_path / "units.toml"
    p.write_text(
        '[inputs]\nstands = "units.gpkg"\nyields = "yields.csv"\n'
        "[base]\n"
        + _table(
            {
                **BASE,
                "fields.unit_field": "unit",
                "fields.layer": "stands",
                "rules.flow_tolerance": "off",
            }
        )
        + "\n"
        '[scenarios.open10]\n"rules.max_opening_ha" = 10\n'
        '[scenarios.open12]\n"rules.max_opening_ha" = 12\n'
        '[units.S]\n"rules.flow_tolerance" = 0.05\n',
        encoding="utf-8",
    )
    scen = load_scenarios(p)
    res = run_comparison(scen, tmp_path / "out", client=client, by_unit=True, ship=True)
    assert not res.failed, res.table[["scenario", "status", "error"]]
    # Reference: each unit planned on its own through the plain pipeline (separable
    # problem: no constraint and no adjacency links the units), NPVs added.
    from spatialplan.inventory import read_stands

    total = 0.0
    g = read_stands(stands, scen.scenarios[0].settings.fields).stands
    for u, extra in (("N", {}), ("S", {"rules.flow_tolerance": 0.05})):
        sub = tmp_path / f"unit_{u}.gpkg"
        import geopandas as gpd

        layer = gpd.read_file(stands, layer="stands")
        layer[layer["unit"] == u].to_file(sub, layer="stands", driver="GPKG")
        s = apply_overrides(scen.scenarios[0].settings, extra)
        npv, _ = sequential(sub, yields, s, tmp_path / f"seq_{u}.gpkg")
        total += npv
    assert len(g) == 28
    r = res.results["open10"]
    assert r.status == "optimal"
    assert r.npv == pytest.approx(total, rel=1e-9)
    assert (tmp_path / "out" / "open10.gpkg").is_file()


def _terrain_files(folder: Path, stands: Path) -> tuple[Path, Path]:
    """A DEM with slope rising to the east and a stream across both units."""
    import geopandas as gpd
    import rasterio
    from affine import Affine
    from shapely.geometry import LineString

    x0, y0, x1, y1 = gpd.read_file(stands, layer="stands").total_bounds
    cell = 20.0
    cols, rows = int((x1 - x0) // cell) + 10, int((y1 - y0) // cell) + 10
    xs = (np.arange(cols) + 0.5) * cell
    z = np.tile(1e-4 * xs**2, (rows, 1))  # slope 2e-4 x: steeper to the east
    dem = folder / "dem.tif"
    profile = {
        "driver": "GTiff",
        "height": rows,
        "width": cols,
        "count": 1,
        "dtype": "float32",
        "crs": "EPSG:32610",
        "transform": Affine(cell, 0.0, x0 - 5 * cell, 0.0, -cell, y1 + 5 * cell),
    }
    with rasterio.open(dem, "w", **profile) as dst:
        dst.write(z.astype(np.float32), 1)
    ym = (y0 + y1) / 2
    streams = folder / "streams.gpkg"
    gpd.GeoDataFrame(
        {"name": ["main"]}, geometry=[LineString([(x0, ym), (x1, ym + 50)])], crs="EPSG:32610"
    ).to_file(streams, layer="streams", driver="GPKG")
    return dem, streams


def test_plan_by_unit_reads_inputs_once(tmp_path: Path, monkeypatch) -> None:
    from collections import Counter

    from click.testing import CliRunner

    import spatialplan.pipeline as pipeline
    import spatialplan.terrain as terrain
    from spatialplan.cli import cli

    stands, yields = _two_units(tmp_path, gap_m=500.0)
    dem, streams = _terrain_files(tmp_path, stands)
    calls: Counter[str] = Counter()

    def count(module: object, name: str) -> None:
        f = getattr(module, name)

        def counted(*a, **k):
            calls[name] += 1
            return f(*a, **k)

        monkeypatch.setattr(module, name, counted)

    count(pipeline, "load_inputs")
    count(pipeline, "read_stands")
    count(terrain, "stand_terrain")
    count(terrain, "net_area")
    out = tmp_path / "units_plan.gpkg"
    args = ["plan", str(stands), "--yields", str(yields), "--out", str(out), "--by-unit"]
    args += ["--unit-field", "unit", "--layer", "stands", "--dem", str(dem)]
    args += ["--streams", str(streams), "--periods", "3", "--min-age", "30", "--price", "50"]
    args += ["--time-limit", "10", "--workers", "1", "--seed", "0", "--no-map"]
    res = CliRunner().invoke(cli, args)
    assert res.exit_code == 0, res.output
    # Two units: the layer, the slope and the stream buffers are read and computed once
    # (before the split they were read once per unit plus twice more).
    assert calls == {"load_inputs": 1, "read_stands": 1, "stand_terrain": 1, "net_area": 1}
    import sqlite3

    with sqlite3.connect(out) as con:
        run = dict(con.execute("select key, value from run").fetchall())
    assert run["planned_by_unit"] == "true"
    assert run["units"].startswith("N: ") and "; S: " in run["units"]


def test_subset_inputs_equals_reading_the_unit_alone(tmp_path: Path) -> None:
    import geopandas as gpd

    from spatialplan.scenarios import subset_inputs

    stands, yields = _two_units(tmp_path, gap_m=500.0)
    dem, streams = _terrain_files(tmp_path, stands)
    s = load_settings(
        None,
        {
            **BASE,
            "fields.unit_field": "unit",
            "fields.layer": "stands",
            "terrain.dem": str(dem),
            "terrain.streams": str(streams),
        },
    )
    whole = load_inputs(stands, yields, s)
    layer = gpd.read_file(stands, layer="stands")
    for u in ("N", "S"):
        # Reference: the unit's stands written as a layer of their own and read through
        # the full pipeline (slope and stream buffer of a stand depend on that stand only).
        path = tmp_path / f"only_{u}.gpkg"
        layer[layer["unit"] == u].to_file(path, layer="stands", driver="GPKG")
        alone = load_inputs(path, yields, s)
        mask = whole.inventory.stands["unit"].to_numpy(dtype=object) == u
        sub = subset_inputs(whole, mask)
        cols = ["stand_id", "age", "stratum", "area_ha"]
        pd.testing.assert_frame_equal(
            sub.inventory.stands[cols], alone.inventory.stands[cols], check_exact=False
        )
        pd.testing.assert_frame_equal(sub.terrain.stands, alone.terrain.stands, rtol=1e-9)
        pd.testing.assert_frame_equal(sub.net.stands, alone.net.stands, rtol=1e-9)
        assert sub.net.stands["buffer_area_ha"].sum() > 0  # the stream crosses every unit
        assert sub.terrain.stands["slope_pct_mean"].std() > 0
