"""The independent checker: hand-drawn schedules with known breaches, brute force over all
stand subsets, and volumes recomputed with numpy's linear interpolation."""

from __future__ import annotations

import itertools
import json

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely

from spatialplan.errors import InputError
from spatialplan.settings import settings_from_dict
from spatialplan.synthetic import synthetic_yield_table, voronoi_forest
from spatialplan.verify import read_plan, verify_schedule

CRS = "EPSG:32610"
SIDE = 200.0  # 200 m squares are 4 ha


def grid_schedule(
    ncol: int, nrow: int, periods: dict[tuple[int, int], int], ages: dict[tuple[int, int], float]
) -> gpd.GeoDataFrame:
    """A grid of 4 ha squares with ids C<col>R<row>, age 60 unless given."""
    rows = []
    for r in range(nrow):
        for c in range(ncol):
            rows.append(
                {
                    "stand_id": f"C{c}R{r}",
                    "age": ages.get((c, r), 60.0),
                    "stratum": "S1",
                    "period": periods.get((c, r)),
                    "geometry": shapely.box(c * SIDE, r * SIDE, (c + 1) * SIDE, (r + 1) * SIDE),
                }
            )
    gdf = gpd.GeoDataFrame(rows, crs=CRS)
    gdf["period"] = gdf["period"].astype("Int64")
    return gdf


def base_settings(**rules: object) -> object:
    r = {"max_opening_ha": 10.0, "green_up_periods": 2, "min_age_yr": 40.0, "flow_tolerance": None}
    r.update(rules)
    return settings_from_dict({"horizon": {"periods": 4, "period_length_yr": 5.0}, "rules": r})


YIELDS = synthetic_yield_table()

# One over-size opening (three 4 ha stands cut together in period 1 = 12 ha > 10 ha), one
# green-up breach (8 ha cut in period 1, a 4 ha neighbour cut in period 2 while they are
# still open with G = 2: 12 ha), one under-age harvest (age 20 + 12.5 = 32.5 < 40, the age at
# mid-period 3 of 5 years; mid-period timing is common practice, no source).
THREE = {
    "periods": {(0, 0): 1, (1, 0): 1, (2, 0): 1, (4, 0): 1, (4, 1): 1, (5, 0): 2, (0, 2): 3},
    "ages": {(0, 2): 20.0},
}


def rules_of(report: object) -> list[tuple[str, int | None]]:
    return sorted((v.rule, v.period) for v in report.violations)


def test_exactly_three_violations() -> None:
    sched = grid_schedule(6, 3, **THREE)
    rep = verify_schedule(sched, base_settings(), YIELDS)
    assert rules_of(rep) == [("green_up", 2), ("max_opening", 1), ("min_age", 3)]
    by = {v.rule: v for v in rep.violations}
    assert set(by["max_opening"].stand_ids) == {"C0R0", "C1R0", "C2R0"}
    assert by["max_opening"].value == pytest.approx(12.0)  # 3 x 4 ha
    assert set(by["green_up"].stand_ids) == {"C4R0", "C4R1", "C5R0"}
    assert "period(s) 1" in by["green_up"].message
    assert by["min_age"].stand_ids == ("C0R2",)
    assert by["min_age"].value == pytest.approx(32.5)
    assert not rep.ok
    assert rep.verdict.startswith("failed: 3 violation(s)")
    frame = rep.to_frame()
    assert len(frame) == 3
    assert set(frame["kind"]) == {"violation"}


def test_legal_schedule_passes_and_green_up_one_allows_it() -> None:
    sched = grid_schedule(6, 3, **THREE)
    # with a 13 ha limit the 12 ha openings are legal, with minimum age 30 the harvest too
    rep = verify_schedule(sched, base_settings(max_opening_ha=13.0, min_age_yr=30.0), YIELDS)
    assert rep.ok, rep.violations
    assert rep.verdict.startswith("passed: all rules hold")
    # with green-up of one period the period-1 cuts no longer count in period 2
    rep = verify_schedule(sched, base_settings(green_up_periods=1), YIELDS)
    assert rules_of(rep) == [("max_opening", 1), ("min_age", 3)]


def test_preexisting_young_opening_is_not_a_breach() -> None:
    young = {(0, 0): 2.0, (1, 0): 3.0, (2, 0): 1.0}  # 12 ha of stands young at the start
    sched = grid_schedule(6, 2, periods={(5, 1): 1}, ages=young)
    rep = verify_schedule(sched, base_settings(), YIELDS)
    assert rep.ok
    assert [(v.rule, v.period) for v in rep.preexisting] == [("max_opening", 1)]
    assert set(rep.preexisting[0].stand_ids) == {"C0R0", "C1R0", "C2R0"}
    # a cut next to the young stands joins them: a green-up breach ("young at the start")
    sched = grid_schedule(6, 2, periods={(3, 0): 1}, ages=young)
    rep = verify_schedule(sched, base_settings(), YIELDS)
    assert rules_of(rep) == [("green_up", 1)]
    assert "young at the start" in rep.violations[0].message


def test_unit_restriction_reserve_and_period_range() -> None:
    sched = grid_schedule(4, 1, periods={(0, 0): 1, (1, 0): 1, (3, 0): 5}, ages={})
    sched["reserve"] = [0, 1, 0, 0]
    sched["period"] = sched["period"].astype(object)
    s = settings_from_dict(
        {
            "horizon": {"periods": 4},
            "rules": {"unit_restriction": True, "flow_tolerance": None},
            "fields": {"reserve_field": "reserve"},
        }
    )
    rep = verify_schedule(sched, s, YIELDS)
    assert rules_of(rep) == [("period_range", None), ("reserve", 1), ("unit_restriction", 1)]
    assert next(v for v in rep.violations if v.rule == "period_range").stand_ids == ("C3R0",)
    sched.loc[3, "period"] = "2.5"
    rep = verify_schedule(sched, s, YIELDS)
    assert ("period_range", None) in rules_of(rep)


def test_even_flow_both_directions() -> None:
    # volumes recomputed here with numpy.interp on the yield table: linear between
    # tabulated ages, (0, 0) below the first (common practice, no source), at mid-period
    # age + (p - 0.5) L (common practice, no source)
    tab = YIELDS[YIELDS.stratum == "S1"]
    xs = np.concatenate([[0.0], tab.age.to_numpy(float)])
    ys = np.concatenate([[0.0], tab.volume.to_numpy(float)])

    def vol(age: float, p: int) -> float:
        return 4.0 * float(np.interp(age + (p - 0.5) * 5.0, xs, ys))

    s = settings_from_dict(
        {"horizon": {"periods": 2}, "rules": {"flow_tolerance": 0.10, "max_opening_ha": None}}
    )
    for cuts, bad in (
        ({(0, 0): 1, (2, 0): 2}, False),  # one stand each period, similar volume
        ({(0, 0): 1, (2, 0): 2, (4, 0): 2}, True),  # volume doubles
        ({(0, 0): 1, (2, 0): 1, (4, 0): 2}, True),  # volume halves
    ):
        sched = grid_schedule(6, 1, periods=cuts, ages={})
        rep = verify_schedule(sched, s, YIELDS)
        v = np.zeros(2)
        for p in cuts.values():
            v[p - 1] += vol(60.0, p)
        np.testing.assert_allclose(rep.periods["harvest_volume_m3"], v, rtol=1e-12)
        flow = [x for x in rep.violations if x.rule == "even_flow"]
        # Even flow as a band around the previous period's volume, |V2 - V1| <= 0.10 V1
        # (common practice in harvest scheduling, no source)
        ref_bad = abs(v[1] - v[0]) > 0.10 * v[0]
        assert ref_bad == bad
        assert [x.period for x in flow] == ([2] if bad else [])


def test_net_area_bounds_and_ending_inventory() -> None:
    sched = grid_schedule(4, 1, periods={(0, 0): 1, (2, 0): 1}, ages={})
    sched["net_area_ha"] = [2.0, 4.0, 1.0, 4.0]
    s = base_settings(
        period_area_min_ha=1.0,
        period_volume_max_m3=10.0,
        non_declining=True,
        ending_mean_age_yr=70.0,
    )
    rep = verify_schedule(sched, s, YIELDS)
    assert rep.periods["harvest_net_area_ha"].tolist() == [3.0, 0.0, 0.0, 0.0]  # net areas 2 + 1
    got = rules_of(rep)
    assert ("volume_max", 1) in got
    assert ("non_declining", 2) in got
    assert [p for r, p in got if r == "area_min"] == [2, 3, 4]
    # mean age at the end: uncut stands 60 + 20, cut stands 20 - 2.5; net-area weights
    mean = (2 * 17.5 + 4 * 80 + 1 * 17.5 + 4 * 80) / 11
    ending = next(v for v in rep.violations if v.rule == "ending_age")
    assert ending.value == pytest.approx(mean)


def connected(sub: tuple[int, ...], nbrs: dict[int, set[int]]) -> bool:
    """Breadth-first search written out (reference for subset connectivity)."""
    todo, seen = [sub[0]], {sub[0]}
    while todo:
        x = todo.pop()
        for y in nbrs[x]:
            if y in sub and y not in seen:
                seen.add(y)
                todo.append(y)
    return len(seen) == len(sub)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_max_opening_equals_brute_force(seed: int) -> None:
    gdf = voronoi_forest(12, seed=seed, mean_area_ha=6.0)
    rng = np.random.default_rng(seed)
    gdf["age"] = rng.choice([2.0, 50.0, 70.0], size=len(gdf))
    gdf["period"] = pd.array(rng.choice([0, 1, 2, 3], size=len(gdf)), dtype="Int64")
    s = base_settings(max_opening_ha=1e6, min_age_yr=0.0)
    rep = verify_schedule(gdf, s, YIELDS)
    # independent adjacency: shared boundary by plain line intersection (clean layer)
    geo = gdf.geometry.to_numpy()
    nbrs: dict[int, set[int]] = {i: set() for i in range(len(gdf))}
    for i, j in itertools.combinations(range(len(gdf)), 2):
        if shapely.length(shapely.intersection(geo[i].boundary, geo[j].boundary)) > 1.0:
            nbrs[i].add(j)
            nbrs[j].add(i)
    area = gdf.area.to_numpy() / 1e4
    per = gdf["period"].to_numpy(dtype=int)
    age = gdf["age"].to_numpy(float)
    for p in range(1, 5):
        # Open in period p: cut in p .. p + G - 1 (G = 2), or young at the start (age at
        # mid-period below G L = 10 years); green-up rule: common practice, no source.
        is_open = [
            i
            for i in range(len(gdf))
            if (0 < per[i] <= p <= per[i] + 1) or age[i] + (p - 0.5) * 5 < 10
        ]
        best = 0.0
        for k in range(1, len(is_open) + 1):  # every subset of open stands
            for sub in itertools.combinations(is_open, k):
                if connected(sub, nbrs):
                    best = max(best, float(area[list(sub)].sum()))
        assert rep.periods["largest_opening_ha"].iloc[p - 1] == pytest.approx(best)


def test_geographic_crs_gives_same_verdict() -> None:
    sched = grid_schedule(6, 3, **THREE)
    rep = verify_schedule(sched.to_crs("EPSG:4326"), base_settings(), YIELDS)
    assert rules_of(rep) == [("green_up", 2), ("max_opening", 1), ("min_age", 3)]
    assert any("projected" in n for n in rep.notes)


def test_missing_fields_and_ages_are_input_errors() -> None:
    sched = grid_schedule(2, 1, periods={}, ages={})
    with pytest.raises(InputError, match="age_class"):
        verify_schedule(sched, settings_from_dict({"fields": {"age_field": "age_class"}}), YIELDS)
    sched.loc[1, "age"] = np.nan
    with pytest.raises(InputError, match="C1R0"):
        verify_schedule(sched, base_settings(), YIELDS)


def test_read_plan_round_trip(tmp_path: object) -> None:
    path = tmp_path / "plan.gpkg"
    sched = grid_schedule(6, 3, **THREE)
    sched.to_file(path, layer="schedule")
    s = base_settings()
    run = pd.DataFrame(
        {"key": ["settings_json", "yields_csv"], "value": [s.to_json(), YIELDS.to_csv(index=False)]}
    )
    pyogrio.write_dataframe(run, path, layer="run")
    got_sched, got_s, table = read_plan(path)
    assert got_s == s
    assert table.strata == ["S1", "S2", "S3", "S4", "S5"]
    assert len(got_sched) == 18
    rep = verify_schedule(got_sched, got_s, table)
    assert rules_of(rep) == [("green_up", 2), ("max_opening", 1), ("min_age", 3)]
    # overrides apply to the recorded settings
    _, s2, _ = read_plan(path, {"rules.max_opening_ha": 20.0})
    assert s2.rules.max_opening_ha == 20.0
    assert s2.rules.min_age_yr == 40.0
    assert json.loads(s2.to_json())["rules"]["green_up_periods"] == 2
    gpd.GeoDataFrame(geometry=[shapely.box(0, 0, 1, 1)], crs=CRS).to_file(
        tmp_path / "other.gpkg", layer="stands"
    )
    with pytest.raises(InputError, match="no layer 'schedule'"):
        read_plan(tmp_path / "other.gpkg")


def test_generated_layer_legal_schedule_passes() -> None:
    # A schedule that is legal by construction: each period cuts one colour class of a
    # greedy graph colouring (networkx), so no two cut stands touch; green-up of one
    # period; stands next to young ones are left alone.
    gdf = voronoi_forest(300, seed=8)
    s = settings_from_dict(
        {"rules": {"green_up_periods": 1, "min_age_yr": 0.0, "flow_tolerance": None}}
    )
    from spatialplan.adjacency import build_adjacency

    graph = build_adjacency(gdf.geometry).graph
    young = set(np.flatnonzero(gdf["age"].to_numpy() + 2.5 < 5.0).tolist())
    near_young = young | {j for i in young for j in graph[i]}
    colour = nx_greedy_colour(graph)
    big = set(np.flatnonzero(gdf.area.to_numpy() / 1e4 > 40.0).tolist())
    gdf["period"] = pd.array(
        [0 if i in near_young | big or colour[i] >= 10 else colour[i] + 1 for i in range(len(gdf))],
        dtype="Int64",
    )
    rep = verify_schedule(gdf, s, YIELDS)
    assert rep.ok, [v.line() for v in rep.violations]
    assert (gdf["period"] > 0).sum() > 200
    # moving one stand into the period of a neighbour breaks the unit restriction
    i, j = next((a, b) for a, b in graph.edges if gdf["period"][a] > 0 and gdf["period"][b] > 0)
    gdf.loc[j, "period"] = gdf["period"][i]
    s2 = settings_from_dict(
        {
            "rules": {
                "green_up_periods": 1,
                "min_age_yr": 0.0,
                "flow_tolerance": None,
                "max_opening_ha": None,
                "unit_restriction": True,
            }
        }
    )
    rep = verify_schedule(gdf, s2, YIELDS)
    assert {v.rule for v in rep.violations} == {"unit_restriction"}
    jid = gdf["stand_id"][j]
    assert all(jid in v.stand_ids for v in rep.violations)
    assert any(set(v.stand_ids) == {gdf["stand_id"][i], jid} for v in rep.violations)


def nx_greedy_colour(graph: object) -> dict[int, int]:
    import networkx as nx

    return nx.greedy_color(graph, strategy="largest_first")


def test_green_up_by_height_and_ending_volume() -> None:
    sched = grid_schedule(6, 3, **THREE)
    hcurve = {"S1": {"ages": [5, 10], "values": [1.0, 2.0]}}  # 1 m at 5 years, 2 m at 10
    for height, expect_green_up in ((1.5, True), (0.5, False)):
        s = settings_from_dict(
            {
                "horizon": {"periods": 4},
                "rules": {
                    "max_opening_ha": 10.0,
                    "min_age_yr": 40.0,
                    "flow_tolerance": None,
                    "green_up_height_m": height,
                },
                "growth": {"height_by_age": hcurve},
            }
        )
        rep = verify_schedule(sched, s, YIELDS)
        assert (("green_up", 2) in rules_of(rep)) == expect_green_up
    # ending volume: numpy.interp on the S1 table at the end ages (uncut 60 + 20 years,
    # cut in period p: (4 - p + 0.5) 5 years), 4 ha each, against 100 % of the start
    tab = YIELDS[YIELDS.stratum == "S1"]
    xs = np.concatenate([[0.0], tab.age.to_numpy(float)])
    ys = np.concatenate([[0.0], tab.volume.to_numpy(float)])
    per = sched["period"].fillna(0).to_numpy(int)
    age = sched["age"].to_numpy(float)
    end_age = np.where(per > 0, (4 - per + 0.5) * 5.0, age + 20.0)
    v_end = 4.0 * np.interp(end_age, xs, ys).sum()
    v_start = 4.0 * np.interp(age, xs, ys).sum()
    assert v_end < v_start
    s = base_settings(ending_volume_fraction=1.0, max_opening_ha=None, min_age_yr=0.0)
    rep = verify_schedule(sched, s, YIELDS)
    (viol,) = rep.violations
    assert viol.rule == "ending_volume"
    assert viol.value == pytest.approx(v_end)
    assert viol.limit == pytest.approx(v_start)
    s = base_settings(ending_volume_fraction=0.5, max_opening_ha=None, min_age_yr=0.0)
    assert verify_schedule(sched, s, YIELDS).ok == (v_end >= 0.5 * v_start)
