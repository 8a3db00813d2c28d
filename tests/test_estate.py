"""The estate model end to end: several harvests per stand, regrowth and the ending value,
checked against brute force, the single-stand Faustmann rotation and the closed-form land
expectation value, and the single-harvest model it reduces to."""

from __future__ import annotations

import dataclasses
import itertools
import sqlite3
from pathlib import Path

import geopandas as gpd
import numpy as np
import pyogrio
import pytest
import shapely
from click.testing import CliRunner

from spatialplan import pipeline, schedule
from spatialplan.cli import cli
from spatialplan.settings import settings_from_dict
from spatialplan.synthetic import synthetic_yield_table, voronoi_forest

CRS = "EPSG:32610"


def _run(path: Path) -> dict[str, str]:
    with sqlite3.connect(path) as con:
        return dict(con.execute("select key, value from run").fetchall())


# ---- brute force over every prescription of every stand ----------------------------------
ROW_WIDTHS_M = [180.0, 220.0, 200.0, 240.0]  # 200 m deep: 3.6 .. 4.8 ha
ROW_AGES = [30.0, 50.0, 75.0, 90.0]
G = 2  # green-up periods
LIMIT_HA = 8.5


def row_of_stands(tmp_path: Path) -> tuple[Path, Path]:
    x, boxes = 500_000.0, []
    for w in ROW_WIDTHS_M:
        boxes.append(shapely.box(x, 5_000_000.0, x + w, 5_000_200.0))
        x += w
    g = gpd.GeoDataFrame(
        {
            "stand_id": [f"R{k}" for k in range(1, len(ROW_AGES) + 1)],
            "age": ROW_AGES,
            "stratum": ["S1", "S2", "S1", "S2"],
        },
        geometry=boxes,
        crs=CRS,
    )
    stands, yields = tmp_path / "row.gpkg", tmp_path / "yields.csv"
    g.to_file(stands, layer="stands")
    synthetic_yield_table().to_csv(yields, index=False)
    return stands, yields


def brute_force(bundle: pipeline.PlanBundle) -> tuple[float, list[tuple[int, ...]]]:
    """The best NPV over every combination of the stands' prescriptions that keeps the rules,
    and the combinations reaching it, in plain Python (no scheduler code)."""
    pr = bundle.problem
    rx = pr.rx()
    n, P, L = pr.n_stands, pr.periods, pr.period_length_yr
    area = [float(a) for a in pr.area_ha]
    gross = [float(a) for a in pr.opening_area_ha]
    nbrs = {i: set() for i in range(n)}
    for a, b in pr.edges.tolist():
        nbrs[a].add(b)
        nbrs[b].add(a)
    options = []
    for i in range(n):
        opts = []
        for k in range(int(rx.stand_start[i]), int(rx.stand_start[i + 1])):
            h = range(int(rx.harvest_start[k]), int(rx.harvest_start[k + 1]))
            periods = [int(rx.harvest_period[j]) for j in h]
            vols = [float(rx.harvest_volume_m3_ha[j]) * area[i] for j in h]
            opts.append((k, periods, vols, float(rx.npv_per_ha[k]) * area[i]))
        options.append(opts)
    # young at the start: open while age + (p - 0.5) L < G L (green-up rule, common
    # practice, no source)
    young = [[ROW_AGES[i] + (p - 0.5) * L < G * L for p in range(1, P + 1)] for i in range(n)]
    best, arg = -np.inf, []
    for combo in itertools.product(*options):
        volume = [0.0] * P
        is_open = [list(young[i]) for i in range(n)]
        for i, (_k, periods, vols, _v) in enumerate(combo):
            for q, v in zip(periods, vols, strict=True):
                volume[q - 1] += v
                for p in range(q, min(q + G - 1, P) + 1):  # open q .. q + G - 1
                    is_open[i][p - 1] = True
        # non-declining flow: V[p + 1] >= V[p] (common practice, no source)
        if any(volume[p + 1] < volume[p] - 1e-6 for p in range(P - 1)):
            continue
        legal = True
        for p in range(P):
            seen: set[int] = set()
            for s in range(n):
                if not is_open[s][p] or s in seen:
                    continue
                group, todo = {s}, [s]  # connected open stands (depth-first search)
                while todo:
                    for b in nbrs[todo.pop()]:
                        if is_open[b][p] and b not in group:
                            group.add(b)
                            todo.append(b)
                seen |= group
                if sum(gross[g] for g in group) > LIMIT_HA + 1e-9:
                    legal = False
        if not legal:
            continue
        value = sum(c[3] for c in combo)
        if value > best + 1e-6:
            best, arg = value, [tuple(c[0] for c in combo)]
        elif value > best - 1e-6:
            arg.append(tuple(c[0] for c in combo))
    return best, arg


def test_plan_equals_brute_force_over_prescriptions(tmp_path: Path) -> None:
    stands, yields = row_of_stands(tmp_path)
    settings = settings_from_dict(
        {
            "horizon": {"periods": 6, "period_length_yr": 10.0},
            "rules": {"max_opening_ha": LIMIT_HA, "green_up_periods": G, "min_age_yr": 30.0,
                      "non_declining": True, "flow_tolerance": None},
            "economics": {"price_per_m3": 40.0, "harvest_cost_per_m3": 10.0,
                          "regeneration_cost_per_ha": 500.0, "discount_rate": 0.06,
                          "ending_value": "faustmann"},
            "solver": {"time_limit_s": 60.0, "workers": 1, "seed": 3, "stop_gap": 0.0},
            "output": {"no_map": True},
        }
    )  # fmt: skip
    inputs = pipeline.load_inputs(stands, yields, settings)
    out = tmp_path / "plan.gpkg"
    outcome = pipeline.run_plan(inputs, out)  # what `spatialplan plan` runs
    bundle = pipeline.build_problem(inputs)
    rx = bundle.problem.rx()
    assert max(len(rx.periods_of(k)) for k in range(rx.n_prescriptions)) == 2  # re-harvest
    best, optimal = brute_force(bundle)
    run = _run(out)
    assert run["solver_status"] == outcome.result.status == "optimal"
    assert outcome.result.npv == pytest.approx(best, rel=1e-9)
    assert float(run["npv"]) == pytest.approx(best, abs=0.01)
    sched = pyogrio.read_dataframe(out, layer="schedule")
    harvests = pyogrio.read_dataframe(out, layer="harvests", read_geometry=False)
    assert sched["npv"].sum() == pytest.approx(best, rel=1e-9)
    ids = [f"R{k}" for k in range(1, len(ROW_AGES) + 1)]
    chosen = tuple(sorted(zip(harvests["stand_id"], harvests["period"], strict=True)))
    want = {
        tuple(sorted((ids[i], int(q)) for i, k in enumerate(c) for q in rx.periods_of(k)))
        for c in optimal
    }
    assert chosen in want
    assert (harvests["harvest"] == 2).any()  # the optimum cuts a stand twice
    assert run["verify_verdict"].startswith("passed")


# ---- the single-stand Faustmann rotation -----------------------------------------------------
# Chapman-Richards curve (Richards 1959) and prices whose Faustmann rotation on the 1-year
# grid is exactly 40 years (asserted below from the closed form), 10 periods of 4 years.
CR = {"A": 600.0, "k": 0.024, "c": 3.0}
PRICE, REGEN, RATE = 40.0, 500.0, 0.04


def faustmann(ages: np.ndarray, delay: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """LEV(T) = (p V(T) - C (1 + r)^(T + d)) / ((1 + r)^(T + d) - 1) (Faustmann 1849)."""
    v = CR["A"] * (1.0 - np.exp(-CR["k"] * ages)) ** CR["c"]
    g = (1.0 + RATE) ** (ages + delay)
    return (PRICE * v - REGEN * g) / (g - 1.0), v


def estate_settings(periods: int, length: float, delay: float = 0.0):
    # No opening or flow rule; the minimum age of 20 years keeps the number of
    # prescriptions small and never binds (every cut below is at 40 years or older).
    return settings_from_dict(
        {
            "horizon": {"periods": periods, "period_length_yr": length},
            "rules": {"max_opening_ha": None, "flow_tolerance": None, "min_age_yr": 20.0},
            "economics": {"price_per_m3": PRICE, "regeneration_cost_per_ha": REGEN,
                          "discount_rate": RATE, "ending_value": "faustmann"},
            "regeneration": {"delay_yr": delay},
            "growth": {"chapman_richards": {"S1": CR}},
            "solver": {"time_limit_s": 60.0, "workers": 1, "seed": 1, "stop_gap": 0.0},
            "output": {"no_map": True},
        }
    )  # fmt: skip


def stands_apart(tmp_path: Path, ages: list[float]) -> Path:
    """1 ha squares 1 km apart (no two touch), stratum S1."""
    g = gpd.GeoDataFrame(
        {"stand_id": [f"A{k}" for k in range(len(ages))], "age": ages, "stratum": "S1"},
        geometry=[
            shapely.box(k * 1000.0, 0.0, k * 1000.0 + 100.0, 100.0) for k in range(len(ages))
        ],
        crs=CRS,
    )
    path = tmp_path / "apart.gpkg"
    g.to_file(path, layer="stands")
    return path


def test_every_harvest_at_the_faustmann_rotation(tmp_path: Path) -> None:
    ages = np.arange(1.0, 301.0)
    lev, _ = faustmann(ages)
    rotation = float(ages[np.argmax(lev)])
    assert rotation == 40.0
    L, P = 4.0, 20
    # Start ages 2 .. 38 reach 40 at a mid-period (age + (p - 0.5) L); 46 and 60 are past
    # the rotation and are cut at once.
    start = [2.0, 10.0, 18.0, 30.0, 38.0, 46.0, 60.0]
    s = estate_settings(P, L)
    inputs = pipeline.load_inputs(stands_apart(tmp_path, start), None, s)
    bundle, result = pipeline.solve_plan(inputs)
    assert result.status == "optimal"
    harvests = pipeline.harvests_frame(inputs, bundle, result)
    # The single-stand Faustmann policy on the period grid: cut when the crop reaches the
    # rotation (a crop already older, at the first mid-period), again every rotation.
    for a0, sid in zip(start, inputs.inventory.stands["stand_id"], strict=True):
        first = 1 if a0 + 0.5 * L >= rotation else int((rotation - a0) / L + 0.5)
        want = list(range(first, P + 1, int(rotation / L)))
        got = harvests.loc[harvests["stand_id"] == sid]
        assert got["period"].tolist() == want, sid
        ages_cut = got["age_at_harvest_yr"].to_numpy()
        assert ages_cut[0] == max(a0 + (first - 0.5) * L, rotation)
        np.testing.assert_allclose(ages_cut[1:], rotation)


def test_bare_land_at_the_end_is_worth_its_land_expectation_value(tmp_path: Path) -> None:
    L, P = 5.0, 6
    delay = L  # cut at mid-period P: the land is still bare at the end
    s = estate_settings(P, L, delay)
    inputs = pipeline.load_inputs(stands_apart(tmp_path, [55.0, 20.0]), None, s)
    bundle = pipeline.build_problem(inputs)
    rx = bundle.problem.rx()
    last = next(k for k in range(rx.stand_start[0], rx.stand_start[1])
                if rx.periods_of(k).tolist() == [P])  # fmt: skip
    plan = np.array([last, rx.stand_start[1]])  # the other stand is never cut
    sched = pipeline.schedule_frame(inputs, bundle, plan)
    ages = np.arange(1.0, 301.0)
    lev = faustmann(ages, delay)[0].max()
    # Faustmann (1849), with the land bare d years after each cut: bare land is worth
    # LEV = max_T (p V(T) - C (1 + r)^(T + d)) / ((1 + r)^(T + d) - 1), the regeneration
    # cost C still to pay. The stand cut at mid-period P paid C at that cut, so then it was
    # worth LEV + C; at the end, L / 2 years later, (LEV + C) (1 + r)^(L / 2). Discounted
    # to the start from P L.
    end = (1.0 + RATE) ** -(P * L)
    area = sched["net_area_ha"].to_numpy()
    want = (lev + REGEN) * (1.0 + RATE) ** (L / 2) * end * area[0]
    assert sched.loc[0, "ending_value_npv"] == pytest.approx(want, rel=1e-9)
    # Its value at the cut is the LEV itself once C is paid back out of it.
    at_cut = sched.loc[0, "ending_value_npv"] / area[0] / end * (1.0 + RATE) ** -(L / 2)
    assert at_cut - REGEN == pytest.approx(lev, rel=1e-9)
    # The uncut stand (age 20 + 30 = 50 at the end) is worth its best future cut, then the
    # land: max over a >= 50 of (p V(a) + LEV) (1 + r)^-(a - 50) (module docs).
    a = 50.0 + np.arange(0.0, 301.0)
    v = CR["A"] * (1.0 - np.exp(-CR["k"] * a)) ** CR["c"]
    best = np.max((PRICE * v + lev) * (1.0 + RATE) ** -(a - 50.0))
    assert sched.loc[1, "ending_value_npv"] == pytest.approx(best * end * area[1], rel=1e-9)
    assert sched.loc[0, "harvest_count"] == 1 and sched.loc[1, "harvest_count"] == 0


# ---- the single-harvest model is a special case --------------------------------------------
def test_one_harvest_and_no_ending_value_is_the_single_harvest_model(tmp_path: Path) -> None:
    g = voronoi_forest(12, seed=8, mean_area_ha=10.0)
    stands, yields = tmp_path / "s.gpkg", tmp_path / "y.csv"
    g.to_file(stands, layer="stands")
    synthetic_yield_table().to_csv(yields, index=False)
    out = tmp_path / "plan.gpkg"
    args = ["--price", "40", "--periods", "4", "--min-age", "30", "--max-opening", "25",
            "--time-limit", "60", "--workers", "1", "--seed", "5", "--stop-gap", "0"]  # fmt: skip
    res = CliRunner().invoke(
        cli,
        ["plan", str(stands), "--yields", str(yields), "--out", str(out), "--no-map", *args,
         "--max-harvests", "1", "--ending-value", "none"],
    )  # fmt: skip
    assert res.exit_code == 0, res.output
    run = _run(out)
    assert run["solver_status"] == "optimal"
    sched = pyogrio.read_dataframe(out, layer="schedule")
    assert sched["harvest_count"].max() <= 1 and (sched["ending_value_npv"] == 0).all()
    # The same problem without prescriptions: the scheduler's single-harvest model of the
    # (n, P) arrays, solved to proven optimality with the same seed.
    s = settings_from_dict(
        {
            "horizon": {"periods": 4},
            "rules": {"min_age_yr": 30.0, "max_opening_ha": 25.0},
            "economics": {"price_per_m3": 40.0},
            "solver": {"time_limit_s": 60.0, "workers": 1, "seed": 5, "stop_gap": 0.0},
        }
    )
    inputs = pipeline.load_inputs(stands, yields, s)
    bundle = pipeline.build_problem(inputs)
    single = dataclasses.replace(bundle.problem, prescriptions=None)
    ref = schedule.solve(single, s.solver)
    assert ref.status == "optimal"
    assert float(run["npv"]) == pytest.approx(ref.npv, abs=0.01)
    periods = sched["period"].fillna(0).astype(int).to_numpy()
    np.testing.assert_array_equal(periods, ref.period)


# ---- the forest by period: old-forest share and standing volume ----------------------------
def test_old_forest_share_and_standing_volume_by_period(tmp_path: Path) -> None:
    g = voronoi_forest(30, seed=11, mean_area_ha=6.0)
    stands, yields = tmp_path / "s.gpkg", tmp_path / "y.csv"
    g.to_file(stands, layer="stands")
    table = synthetic_yield_table()
    table.to_csv(yields, index=False)
    P, L = 6, 10.0
    s = settings_from_dict(
        {
            "horizon": {"periods": P, "period_length_yr": L},
            "rules": {"min_age_yr": 30.0, "max_opening_ha": 30.0, "flow_tolerance": None,
                      "old_forest_age_yr": 70.0, "old_forest_min_share": 0.2},
            "economics": {"price_per_m3": 40.0, "discount_rate": 0.05},
            "solver": {"time_limit_s": 5.0, "workers": 1, "seed": 2},
        }
    )  # fmt: skip
    inputs = pipeline.load_inputs(stands, yields, s)
    bundle, result = pipeline.solve_plan(inputs)
    layers, report = pipeline.plan_layers(inputs, bundle, result)
    assert report.ok, [v.line() for v in report.violations]
    periods, sched, harvests = layers["periods"], layers["schedule"], layers["harvests"]
    assert "old_forest" in report.rules_checked
    # Ages at every mid-period from the harvests table alone: before the first cut
    # age + (p - 0.5) L, from a cut in q on (p - q) L (regrowth from age 0, common practice,
    # no source); volumes by numpy.interp on the table with (0, 0) in front.
    ids = sched["stand_id"].tolist()
    age = sched["age"].to_numpy(float)[:, None] + (np.arange(1, P + 1) - 0.5)[None, :] * L
    for sid, q in zip(harvests["stand_id"], harvests["period"], strict=True):
        i = ids.index(sid)
        age[i, q - 1 :] = (np.arange(q, P + 1) - q) * L
    gross = sched["area_ha"].to_numpy(float)
    old = (gross[:, None] * (age >= 70.0)).sum(axis=0) / gross.sum()
    np.testing.assert_allclose(periods["old_forest_share"], old, rtol=1e-12)
    np.testing.assert_allclose(report.periods["old_forest_share"], old, rtol=1e-12)
    assert (old >= 0.2 - 1e-9).all()
    volume = np.zeros(P)
    for i, stratum in enumerate(sched["stratum"]):
        # the yield table rows of the stratum
        curve = table[table["stratum"] == stratum]
        ages = np.r_[0.0, curve["age"].to_numpy(float)]
        vols = np.r_[0.0, curve["volume"].to_numpy(float)]
        volume += np.interp(np.maximum(age[i], 0.0), ages, vols) * sched["net_area_ha"].iloc[i]
    np.testing.assert_allclose(periods["standing_volume_m3"], volume, rtol=1e-9)
    # every harvest counts in its period, and the periods add up with the ending value
    assert periods["stands_harvested"].sum() == len(harvests)
    ending = float(layers["run"].set_index("key").loc["ending_value_npv", "value"])
    assert periods["npv"].sum() + ending == pytest.approx(result.npv, rel=1e-6)
