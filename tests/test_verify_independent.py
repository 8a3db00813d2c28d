"""verify as a second code path: its own shared-edge measure, yield reading, regrowth and
value arithmetic, checked against hand arithmetic, numpy references and the planner's own
modules (which only the tests may import), plus a fault injected into the planner."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
from click.testing import CliRunner

from spatialplan.adjacency import build_adjacency
from spatialplan.cli import cli
from spatialplan.growth import build_growth_model, yield_table_from_frame
from spatialplan.inventory import RESERVE_TRUE_WORDS, is_reserve_flag, read_stands
from spatialplan.settings import (
    FieldMap,
    GrowthSettings,
    Settings,
    YieldColumns,
    settings_from_dict,
)
from spatialplan.synthetic import synthetic_yield_table, voronoi_forest
from spatialplan.verify import read_harvests, verify_schedule
from spatialplan.verify.geometry import metre_geometry, neighbours
from spatialplan.verify.yields import build_curves, read_yield_rows
from tests.conftest import grid_stands

CRS = "EPSG:32610"
YIELDS = synthetic_yield_table()


def measured(geoms: list[shapely.Geometry], tol: float, min_edge: float = 0.5, **kw: bool) -> dict:
    nb = neighbours(np.array(geoms, dtype=object), min_edge, tol, **kw)
    return {(int(a), int(b)): float(s) for (a, b), s in zip(nb.edges, nb.shared_m, strict=True)}


def edge_lengths(edges: np.ndarray, shared: np.ndarray) -> dict[tuple[int, int], float]:
    return {(int(a), int(b)): float(s) for (a, b), s in zip(edges, shared, strict=True)}


# ---- shared-edge measure: hand-drawn cases ----------------------------------------------
def test_unit_squares_by_hand_arithmetic() -> None:
    unit = shapely.box(0, 0, 1, 1)
    # offset neighbour: the y ranges [0, 1] and [0.4, 1.4] overlap by 0.6 m (drawing)
    assert measured([unit, shapely.box(1, 0.4, 2, 1.4)], tol=0.5) == {(0, 1): pytest.approx(0.6)}
    # corner contact only: nothing shared, adjacent only with corner adjacency
    corner = [unit, shapely.box(1, 1, 2, 2)]
    assert measured(corner, tol=0.5) == {}
    assert list(measured(corner, tol=0.5, corner_adjacency=True)) == [(0, 1)]
    # a 0.3 m gap along the whole 1 m side is bridged by a 0.5 m tolerance, not by 0.2 m
    gap = [unit, shapely.box(1.3, 0, 2.3, 1)]
    assert measured(gap, tol=0.5) == {(0, 1): pytest.approx(1.0)}
    assert measured(gap, tol=0.2) == {}
    # a corner across a 0.3 m x 0.3 m gap (0.42 m apart) faces nothing
    assert measured([unit, shapely.box(1.3, 1.3, 2.3, 2.3)], tol=0.5) == {}
    # the same gap turned by 30 degrees measures the same
    turned = [shapely.affinity.rotate(g, 30, origin=(0, 0)) for g in gap]
    assert measured(turned, tol=0.5) == {(0, 1): pytest.approx(1.0)}
    # overlap by 0.1 m: each boundary lies inside the other for 1 + 2 x 0.1 m (drawing)
    assert measured([unit, shapely.box(0.9, 0, 1.9, 1)], tol=0.05) == {(0, 1): pytest.approx(1.2)}


def test_feet_and_degrees_are_measured_in_metres() -> None:
    # 100 m squares side by side: shared 100 m; in US survey feet (EPSG:2927) the same
    # layer has coordinates 3.28 times larger, which must not change the metres measured
    gs = gpd.GeoSeries([shapely.box(0, 0, 100, 100), shapely.box(100, 0, 200, 100)], crs=CRS)
    gs = gs.translate(500_000, 5_200_000)
    for crs in (CRS, "EPSG:2927", "EPSG:4326"):
        notes: list[str] = []
        nb = neighbours(metre_geometry(gs.to_crs(crs), notes), 1.0, 0.5)
        assert nb.edges.tolist() == [[0, 1]]
        # 100 m up to the scale error of projecting to UTM and back (pyproj)
        assert nb.shared_m[0] == pytest.approx(100.0, rel=2e-3)


def test_self_crossing_stand_counts_its_repaired_area() -> None:
    # A bow-tie ring has signed area 0; repaired it is two triangles of 200 x 100 / 2 m2
    # (drawing): 2 ha. Cut with its 4 ha neighbour the opening is 6 ha, over a 5 ha limit.
    bow = shapely.Polygon([(0, 0), (200, 200), (200, 0), (0, 200)])
    sched = gpd.GeoDataFrame(
        {"stand_id": ["B", "N"], "age": [60.0, 60.0], "stratum": ["S1", "S1"], "period": [1, 1]},
        geometry=[bow, shapely.box(200, 0, 400, 200)],
        crs=CRS,
    )
    s = settings_from_dict({"rules": {"max_opening_ha": 5.0, "flow_tolerance": None}})
    rep = verify_schedule(sched, s, YIELDS)
    assert [(v.rule, v.stand_ids) for v in rep.violations] == [("max_opening", ("B", "N"))]
    assert rep.violations[0].value == pytest.approx(6.0)
    assert any("repaired" in n for n in rep.notes)


# ---- shared-edge measure against the planner's graph on generated layers ------------------
@pytest.mark.parametrize("layer", ["voronoi", "grid"])
def test_clean_layers_give_the_planners_graph(layer: str) -> None:
    gs = voronoi_forest(300, seed=5).geometry if layer == "voronoi" else grid_stands(6, 5).geometry
    mine = neighbours(metre_geometry(gs, []), 1.0, 0.5)
    plan = build_adjacency(gs, 1.0, 0.5)
    got, ref = edge_lengths(mine.edges, mine.shared_m), edge_lengths(plan.edges, plan.shared_m)
    assert set(got) == set(ref)
    # on a clean layer both are the exact shared edge (the planner's own tests compare it
    # with a shapely boundary intersection); 1 cm covers float noise in both
    for e, v in ref.items():
        assert got[e] == pytest.approx(v, abs=1e-2)


def test_grid_with_digitising_gaps_gives_the_planners_graph() -> None:
    gs = grid_stands(5, 4, size_m=100.0).geometry
    shrunk = gs.buffer(-0.2, join_style="mitre")  # every stand 0.2 m smaller: 0.4 m gaps
    mine = neighbours(metre_geometry(shrunk, []), 1.0, 0.5)
    plan = build_adjacency(shrunk, 1.0, 0.5)
    assert set(map(tuple, mine.edges.tolist())) == set(map(tuple, plan.edges.tolist()))
    assert len(mine.edges) == 5 * 3 + 4 * 4  # rook neighbours of a 5 x 4 grid (drawing)
    np.testing.assert_allclose(mine.shared_m, 100.0 - 2 * 0.2)  # facing sides (drawing)


@pytest.mark.parametrize("seed", [11, 3])
def test_generated_layer_with_digitising_gaps_gives_the_planners_graph(seed: int) -> None:
    gs = voronoi_forest(400, seed=seed).geometry
    d = 0.2
    shrunk = gs.buffer(-d)  # 0.4 m gaps, below the 0.5 m tolerance
    mine = neighbours(metre_geometry(shrunk, []), 1.0, 0.5)
    plan = build_adjacency(shrunk, 1.0, 0.5)
    got, ref = edge_lengths(mine.edges, mine.shared_m), edge_lengths(plan.edges, plan.shared_m)
    # Both measure the edges facing across the gap. A shrink by d moves the ends of a
    # facing edge by d cot(angle / 2), under d for the obtuse corners of a Voronoi layer
    # (geometry), so the two measures differ by less than 2 d; only an edge that close to
    # the 1 m threshold may fall on different sides of it.
    near = {e for e in set(got) ^ set(ref) if abs(got.get(e, ref.get(e, 0.0)) - 1.0) < 2 * d}
    assert set(got) ^ set(ref) == near
    assert len(near) <= 2
    assert len(got) > 1000
    for e in set(got) & set(ref):
        assert abs(got[e] - ref[e]) < 2 * d


# ---- one list of reserve words --------------------------------------------------------
def test_reserve_words_are_shared_and_reserved_cut_fails(tmp_path: Path) -> None:
    words = ["1", "true", "t", "yes", "y", "reserve", "reserved", "r", "x"]
    assert set(words) == RESERVE_TRUE_WORDS
    assert is_reserve_flag([w.upper() for w in words] + [f" {w} " for w in words]).all()
    assert not is_reserve_flag(["0", "no", "", None, "false", "n"]).any()
    sched = grid_stands(4, 1)
    sched["status"] = ["reserved", "Reserved", "R", "no"]
    sched["period"] = pd.array([1, 3, pd.NA, 2], dtype="Int64")
    s = settings_from_dict(
        {
            "horizon": {"periods": 3},
            "fields": {"reserve_field": "status"},
            "rules": {"max_opening_ha": None, "flow_tolerance": None},
        }
    )
    rep = verify_schedule(sched, s, YIELDS)
    assert sorted((v.rule, v.stand_ids) for v in rep.violations) == [
        ("reserve", ("S01",)),
        ("reserve", ("S02",)),
    ]
    # the inventory reads the same words from a stand layer
    path = tmp_path / "stands.gpkg"
    sched.drop(columns="period").to_file(path, layer="stands")
    inv = read_stands(path, FieldMap(reserve_field="status"))
    assert inv.stands["reserve"].tolist() == [True, True, True, False]
    # a planner-written schedule keeps the user's flag as status_input beside its own
    sched["status_input"] = sched["status"]
    sched["status"] = 0
    assert not verify_schedule(sched, s, YIELDS).ok


def test_operability_from_the_recorded_columns() -> None:
    # A stand the terrain stage found inoperable (operable = 0, or harvest_system
    # "inoperable") must not be cut; without terrain every stand is operable and verify
    # has nothing to note about it.
    sched = grid_stands(3, 1)
    sched["period"] = pd.array([1, 2, 3], dtype="Int64")
    s = settings_from_dict(
        {"horizon": {"periods": 3}, "rules": {"max_opening_ha": None, "flow_tolerance": None}}
    )
    rep = verify_schedule(sched, s, YIELDS)
    assert rep.ok and not [n for n in rep.notes if "operab" in n]
    sched["operable"] = [1, 0, 1]
    rep = verify_schedule(sched, s, YIELDS)
    assert [(v.rule, v.period, v.stand_ids) for v in rep.violations] == [
        ("inoperable", 2, ("S02",))
    ]
    sched = sched.drop(columns="operable")
    sched["harvest_system"] = ["ground", "ground", "inoperable"]
    rep = verify_schedule(sched, s, YIELDS)
    assert [(v.rule, v.stand_ids) for v in rep.violations] == [("inoperable", ("S03",))]


# ---- yield reading and interpolation --------------------------------------------------------
def test_own_interpolation_by_hand_and_against_the_planners_model() -> None:
    table = pd.DataFrame({"stratum": ["A", "A", "B"], "age": [10, 20, 30], "volume": [50, 150, 90]})
    rows = read_yield_rows(table, ["stratum"], YieldColumns())
    cr = {"C": {"A": 500.0, "k": 0.03, "c": 3.0}}
    curves = build_curves(rows, settings_from_dict({"growth": {"chapman_richards": cr}}).growth)
    got = curves.volume(np.array(["A", "A", "A", "B", "C"], dtype=object), [5, 15, 40, 10, 50])
    # linear from (0, 0) to (10, 50): 25; halfway from 50 to 150: 100; flat after 20: 150;
    # B from (0, 0) to (30, 90): 30; Chapman-Richards 500 (1 - e^-1.5)^3 (Richards 1959)
    expect = [25.0, 100.0, 150.0, 30.0, 500.0 * (1 - math.exp(-1.5)) ** 3]
    np.testing.assert_allclose(got, expect)
    # the planner's growth model on the same table agrees everywhere on a 1-year grid
    # (a second implementation of the same rules)
    keys = ["stratum"]
    model = build_growth_model(yield_table_from_frame(YIELDS, keys), GrowthSettings(), keys)
    mine = build_curves(read_yield_rows(YIELDS, keys, YieldColumns()), GrowthSettings())
    lab = np.repeat(np.array(["S1", "S3", "S5"], dtype=object), 200)
    age = np.tile(np.arange(200.0), 3)
    np.testing.assert_allclose(mine.volume(lab, age), model.volume(lab, age), rtol=1e-12)
    np.testing.assert_allclose(mine.diameter(lab, age), model.diameter(lab, age), rtol=1e-12)


def test_recorded_volume_and_value_by_hand() -> None:
    # one 4 ha stand of S1, age 60, cut in period 2 of 10 years: mid-period 15 years on
    sched = grid_stands(1, 1)
    sched["age"] = 60.0
    sched["stratum"] = "S1"
    sched["period"] = pd.array([2], dtype="Int64")
    tab = YIELDS[YIELDS.stratum == "S1"]
    v_ha = float(np.interp(75.0, tab.age, tab.volume))  # numpy reference interpolation
    econ = {"price_per_m3": 50.0, "harvest_cost_per_m3": 10.0, "regeneration_cost_per_ha": 900.0}
    # net stumpage value ((p - h) V - C) per ha, discounted (1 + r)^-t by compound
    # interest (textbook formula); harvest at mid-period t = 15 (common practice, no source)
    value = ((50.0 - 10.0) * v_ha - 900.0) * 1.04**-15.0 * 4.0
    sched["age_at_harvest"] = 75.0
    sched["volume_m3"] = v_ha * 4.0
    sched["value"] = value
    s = settings_from_dict(
        {
            "horizon": {"periods": 3, "period_length_yr": 10.0},
            "rules": {"flow_tolerance": None},
            "economics": {"discount_rate": 0.04, **econ},
        }
    )
    assert verify_schedule(sched, s, YIELDS).ok
    sched["volume_m3"] = v_ha * 4.0 * 1.01
    sched["value"] = value + 1.0
    sched["age_at_harvest"] = 70.0
    rep = verify_schedule(sched, s, YIELDS)
    assert sorted(v.rule for v in rep.violations) == [
        "recorded_age",
        "recorded_value",
        "recorded_volume",
    ]
    assert all(v.stand_ids == ("S01",) and v.period == 2 for v in rep.violations)


@pytest.mark.parametrize(
    ("parametric", "ending"), [(False, "faustmann"), (True, "faustmann"), (False, "standing"),
                               (True, "none")]
)  # fmt: skip
def test_recorded_figures_match_the_planners_economics(
    tmp_path: Path, parametric: bool, ending: str
) -> None:
    """Two implementations of the documented economics (price classes, cost classes,
    regeneration cost and delay, regenerated strata, the ending value) agree on every
    harvest and every stand of a plan that cuts stands up to three times."""
    from spatialplan import pipeline

    forest = voronoi_forest(40, seed=2, mean_area_ha=8.0)
    forest["cost"] = np.where(np.arange(len(forest)) % 3 == 0, "steep", "flat")
    path, ypath = tmp_path / "stands.gpkg", tmp_path / "yields.csv"
    forest.to_file(path, layer="stands")
    YIELDS.to_csv(ypath, index=False)
    cr = {f"S{j}": {"A": 300.0 + 100 * j, "k": 0.03, "c": 2.5} for j in range(1, 6)}
    s = settings_from_dict(
        {
            "fields": {"cost_class_field": "cost"},
            "horizon": {"periods": 8, "period_length_yr": 10.0},
            "rules": {"flow_tolerance": None, "max_opening_ha": None, "min_age_yr": 20.0},
            "economics": {
                "discount_rate": 0.03,
                "price_per_m3": 30.0,
                "price_schedule": [
                    {"product": "pulp", "min_diameter_cm": 0, "price_per_m3": 20.0},
                    {"product": "saw", "min_diameter_cm": 25, "price_per_m3": 60.0},
                ],
                "harvest_cost_by_class": {"steep": 25.0, "flat": 12.0},
                "regeneration_cost_per_ha": 800.0,
                "ending_value": ending,
            },
            "regeneration": {"delay_yr": 2.0, "stratum_map": {"S1": "S2", "S2": "S3"}},
            "growth": {"chapman_richards": cr if parametric else {}},
        }
    )
    inputs = pipeline.load_inputs(path, None if parametric else ypath, s)
    bundle = pipeline.build_problem(inputs)
    rx = bundle.problem.rx()
    # a random prescription of every stand (the last of each: the most harvests)
    rng = np.random.default_rng(4)
    plan = rx.stand_start[:-1] + (rng.random(len(forest)) * np.diff(rx.stand_start)).astype(int)
    plan[:5] = rx.stand_start[1:6] - 1
    sched = pipeline.schedule_frame(inputs, bundle, plan)
    harvests = pipeline.harvests_frame(inputs, bundle, plan)
    assert harvests["harvest"].max() >= 3  # regrown crops of mapped strata are cut too
    rep = verify_schedule(sched, s, inputs.yield_table, harvests=harvests)
    assert not [v.line() for v in rep.violations if v.rule.startswith("recorded_")]
    want = {"recorded_volume", "recorded_value", "recorded_ending_value", "recorded_npv"}
    assert want <= set(rep.rules_checked)
    assert (harvests["npv"] != 0).all()  # values were there to compare
    if ending != "none":
        assert (sched["ending_value_npv"] != 0).sum() > len(forest) // 2
    # the period volumes agree with the planner's prescriptions (a second implementation)
    h0 = rx.harvest_start[plan]
    ref = np.zeros(8)
    for i, k in enumerate(plan):
        for h in range(h0[i], rx.harvest_start[k + 1]):
            ref[rx.harvest_period[h] - 1] += rx.harvest_volume_m3_ha[h] * bundle.problem.area_ha[i]
    np.testing.assert_allclose(rep.periods["harvest_volume_m3"], ref, rtol=1e-9)
    # a wrong ending value or stand NPV is caught, stand by stand
    for col, rule in (("ending_value_npv", "recorded_ending_value"), ("npv", "recorded_npv")):
        bad = sched.copy()
        bad.loc[3, col] += 5.0
        rep = verify_schedule(bad, s, inputs.yield_table, harvests=harvests)
        assert [(v.rule, v.period, v.stand_ids) for v in rep.violations] == [
            (rule, None, (str(sched.loc[3, "stand_id"]),))
        ]


# ---- a fault injected into the planner --------------------------------------------------------
def test_dropped_edge_makes_the_planner_cut_an_oversize_opening(tmp_path: Path) -> None:
    from spatialplan import pipeline, schedule

    # A and B (6.25 ha each) touch; C stands apart. All are old, so with 5 % discounting
    # each is worth most when cut in period 1, but A and B together (12.5 ha) exceed the
    # 10 ha limit: a legal plan cuts one of them in period 2.
    side, x0, y0 = 250.0, 500_000.0, 5_000_000.0
    boxes = [shapely.box(x0 + k * side, y0, x0 + (k + 1) * side, y0 + side) for k in (0, 1, 4)]
    stands = gpd.GeoDataFrame(
        {"stand_id": ["A", "B", "C"], "age": [100, 100, 100], "stratum": ["S1"] * 3},
        geometry=boxes,
        crs=CRS,
    )
    path, ypath = tmp_path / "stands.gpkg", tmp_path / "yields.csv"
    stands.to_file(path, layer="stands")
    YIELDS.to_csv(ypath, index=False)
    s = settings_from_dict(
        {
            "horizon": {"periods": 3, "period_length_yr": 10.0},
            "rules": {"max_opening_ha": 10.0, "green_up_periods": 1, "flow_tolerance": None},
            "economics": {"discount_rate": 0.05, "price_per_m3": 50.0},
            "solver": {"time_limit_s": 20.0, "workers": 2, "stop_gap": 0.0},
            "output": {"no_map": True},
        }
    )
    inputs = pipeline.load_inputs(path, ypath, s)
    bundle = pipeline.build_problem(inputs)
    assert bundle.problem.edges.tolist() == [[0, 1]]
    legal = schedule.solve(bundle.problem, s.solver)
    assert sorted(legal.period[:2].tolist()) == [1, 2]
    assert pipeline.write_plan(inputs, bundle, legal, tmp_path / "legal.gpkg").verify.ok
    # the fault: the planner loses the A-B edge and cuts both in period 1
    faulty = dataclasses.replace(
        bundle, problem=dataclasses.replace(bundle.problem, edges=np.zeros((0, 2), np.int64))
    )
    bad = schedule.solve(faulty.problem, s.solver)
    assert bad.period.tolist() == [1, 1, 1]
    out = tmp_path / "faulty.gpkg"
    rep = pipeline.write_plan(inputs, faulty, bad, out).verify
    assert [(v.rule, v.period, v.stand_ids) for v in rep.violations] == [
        ("max_opening", 1, ("A", "B"))
    ]
    assert rep.violations[0].value == pytest.approx(12.5)  # 2 x 250 m x 250 m
    res = CliRunner().invoke(cli, ["verify", str(out)])
    assert res.exit_code == 1
    assert "violation: max_opening period 1 stands A,B" in res.output


# ---- plans that harvest a stand twice -------------------------------------------------------
TWICE_RULES = {
    "max_opening_ha": 10.0,
    "green_up_periods": 2,
    "min_age_yr": 30.0,
    "flow_tolerance": None,
}


def twice_plan(a_second: int) -> tuple[gpd.GeoDataFrame, pd.DataFrame]:
    """Three 4 ha squares in a row: S01 cut in period 1 and ``a_second``, its neighbours
    S02 and S03 both cut in period 4 (open in 4 and 5 with a green-up of 2 periods)."""
    sched = grid_stands(3, 1)
    sched["age"] = [50.0, 60.0, 60.0]
    sched["stratum"] = "S1"
    harvests = pd.DataFrame(
        {
            "stand_id": ["S01", "S01", "S02", "S03"],
            "harvest": [1, 2, 1, 1],
            "period": [1, a_second, 4, 4],
        }
    )
    return sched, harvests


def test_two_harvest_plan_legal_too_young_and_green_up() -> None:
    s = settings_from_dict(
        {"horizon": {"periods": 6, "period_length_yr": 10.0}, "rules": TWICE_RULES}
    )
    sched, harvests = twice_plan(6)
    # ages at harvest: 50 + 5 = 55; the new crop (6 - 1) 10 = 50 years (a clear-cut
    # regrows from age 0: common practice, no source); neighbours 60 + 35 = 95. Volumes by
    # numpy.interp on S1 (reference interpolation).
    tab = YIELDS[YIELDS.stratum == "S1"]
    ages = np.array([55.0, 50.0, 95.0, 95.0])
    harvests["age_at_harvest"] = ages
    harvests["volume_m3"] = 4.0 * np.interp(ages, np.r_[0, tab.age], np.r_[0, tab.volume])
    rep = verify_schedule(sched, s, YIELDS, harvests=harvests)
    assert rep.ok, [v.line() for v in rep.violations]
    assert rep.periods["stands_harvested"].tolist() == [1, 0, 0, 2, 0, 1]
    # second harvest after 10 years: the crop is (2 - 1) 10 = 10 < 30 years old
    sched, harvests = twice_plan(2)
    rep = verify_schedule(sched, s, YIELDS, harvests=harvests)
    assert [(v.rule, v.period, v.stand_ids, v.value) for v in rep.violations] == [
        ("min_age", 2, ("S01",), 10.0)
    ]
    # second harvest in period 5 while S02 and S03 (cut in 4) are still open: 12 ha
    sched, harvests = twice_plan(5)
    rep = verify_schedule(sched, s, YIELDS, harvests=harvests)
    assert [(v.rule, v.period, set(v.stand_ids)) for v in rep.violations] == [
        ("green_up", 5, {"S01", "S02", "S03"})
    ]
    assert "period(s) 4" in rep.violations[0].message
    # a second harvest breaks the one-harvest rule when at most one is allowed
    s1 = s.with_overrides({"rules.max_harvests": 1})
    sched, harvests = twice_plan(6)
    rep = verify_schedule(sched, s1, YIELDS, harvests=harvests)
    assert [(v.rule, v.stand_ids) for v in rep.violations] == [("reharvest", ("S01",))]


def test_two_harvest_plan_file_through_the_cli(tmp_path: Path) -> None:
    s = settings_from_dict(
        {"horizon": {"periods": 6, "period_length_yr": 10.0}, "rules": TWICE_RULES}
    )
    path = tmp_path / "plan.gpkg"
    for second, code in ((6, 0), (5, 1)):
        sched, harvests = twice_plan(second)
        sched.to_file(path, layer="schedule")
        pyogrio.write_dataframe(harvests, path, layer="harvests")
        run = pd.DataFrame(
            {"key": ["settings_json", "yields_csv"], "value": [s.to_json(), YIELDS.to_csv()]}
        )
        pyogrio.write_dataframe(run, path, layer="run")
        assert read_harvests(path)["period"].tolist() == harvests["period"].tolist()
        res = CliRunner().invoke(cli, ["verify", str(path)])
        assert res.exit_code == code, res.output
    assert "green_up period 5" in res.output


def test_regeneration_delay_and_stratum_map_are_read_when_set() -> None:
    # [regeneration] delay_yr and stratum_map: the crop after a cut, its stratum and age.
    def with_delay(delay: float) -> Settings:
        return settings_from_dict(
            {
                "horizon": {"periods": 6, "period_length_yr": 10.0},
                "rules": TWICE_RULES,
                "regeneration": {"delay_yr": delay, "stratum_map": {"S1": "S2"}},
            }
        )

    s = with_delay(3.0)
    sched, harvests = twice_plan(6)
    # the second crop is S2 and (6 - 1) 10 - 3 = 47 years old; volumes by numpy.interp
    tab1, tab2 = YIELDS[YIELDS.stratum == "S1"], YIELDS[YIELDS.stratum == "S2"]
    v1 = np.interp([55.0, 95.0, 95.0], np.r_[0, tab1.age], np.r_[0, tab1.volume])
    v2 = np.interp(47.0, np.r_[0, tab2.age], np.r_[0, tab2.volume])
    harvests["age_at_harvest"] = [55.0, 47.0, 95.0, 95.0]
    harvests["volume_m3"] = 4.0 * np.array([v1[0], v2, v1[1], v1[2]])
    rep = verify_schedule(sched, s, YIELDS, harvests=harvests)
    assert rep.ok, [v.line() for v in rep.violations]
    # with 28 years' delay the second crop is only 50 - 28 = 22 years old
    rep = verify_schedule(sched, with_delay(28.0), YIELDS, harvests=harvests)
    assert ("min_age", 6, ("S01",)) in [(v.rule, v.period, v.stand_ids) for v in rep.violations]


def test_old_forest_retention_by_hand() -> None:
    # Three 4 ha squares, ages 90, 60, 30 at the start; periods of 10 years; at least 30 %
    # of the area (3.6 ha) 80 years or older at every mid-period. Cutting S01 in period 1
    # leaves no old stand until S02 reaches 60 + 25 = 85 in period 3 (ages at mid-period,
    # common practice, no source): periods 1 and 2 break the rule.
    sched = grid_stands(3, 1)
    sched["age"] = [90.0, 60.0, 30.0]
    sched["stratum"] = "S1"
    sched["unit"] = ["north", "south", "south"]
    rules = {"flow_tolerance": None, "old_forest_age_yr": 80.0, "old_forest_min_share": 0.3}
    s = settings_from_dict({"horizon": {"periods": 4, "period_length_yr": 10.0}, "rules": rules})
    sched["period"] = pd.array([1, None, None], dtype="Int64")
    rep = verify_schedule(sched, s, YIELDS)
    assert [(v.rule, v.period) for v in rep.violations] == [("old_forest", 1), ("old_forest", 2)]
    assert rep.violations[0].value == 0.0 and rep.violations[0].limit == pytest.approx(3.6)
    np.testing.assert_allclose(rep.periods["old_forest_share"], [0.0, 0.0, 1 / 3, 1 / 3])
    sched["period"] = pd.array([None, 1, None], dtype="Int64")  # the old stand kept
    assert verify_schedule(sched, s, YIELDS).ok
    # per management unit: "south" (S02 cut in period 1, S03 at most 30 + 35 = 65 years)
    # has no old stand in any period; "north" keeps S01
    by_unit = settings_from_dict(
        {"fields": {"unit_field": "unit"}, "horizon": {"periods": 4, "period_length_yr": 10.0},
         "rules": rules}
    )  # fmt: skip
    rep = verify_schedule(sched, by_unit, YIELDS)
    assert [(v.rule, v.period) for v in rep.violations] == [("old_forest", p) for p in (1, 2, 3, 4)]
    assert all("unit south" in v.message for v in rep.violations)
