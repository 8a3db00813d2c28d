"""The scheduler on prescriptions (Model I with re-harvest) against independent references.

* Brute force over every combination of prescriptions (one per stand) with a rule checker
  written here from the definitions (openness after every harvest, flow, old forest,
  ending inventory), using networkx connected components for the openings (reference
  library).
* The prescription LP against scipy.optimize.linprog on a dense matrix built here.
"""

from __future__ import annotations

import dataclasses
import itertools
import re
import time

import networkx as nx
import numpy as np
import pytest
import shapely
from scipy.optimize import linprog

from spatialplan.errors import InfeasibleError
from spatialplan.problem import FlowRules, PlanProblem, Prescriptions
from spatialplan.schedule import diagnose, lp_bound, solve
from spatialplan.settings import SolverSettings
from spatialplan.synthetic import synthetic_prescriptions, voronoi_forest
from tests.graphs import grid_edges, opening_breaches, touch_edges

EXACT = SolverSettings(time_limit_s=60.0, workers=2, seed=1, stop_gap=0.0)
RATE, PRICE = 0.04, 50.0


def rx_problem(
    edges: np.ndarray,
    age: np.ndarray,
    seed: int,
    area: np.ndarray | None = None,
    periods: int = 6,
    length: float = 10.0,
    min_age: float = 40.0,
    max_harvests: int = 2,
    green: int = 2,
    max_opening: float | None = 22.0,
    unit: bool = False,
    flow: FlowRules | None = None,
    groups: np.ndarray | None = None,
) -> PlanProblem:
    """A small instance whose stands may be cut again once the regrowth is old enough.

    Volumes follow a Chapman-Richards curve per stand (common practice, no source).
    """
    rng = np.random.default_rng(seed)
    age = np.asarray(age, dtype=float)
    n = len(age)
    area = rng.uniform(5.0, 15.0, n) if area is None else np.asarray(area, dtype=float)
    asym = rng.uniform(300.0, 600.0, n)

    def volume(i: np.ndarray, a: np.ndarray) -> np.ndarray:
        return asym[i] * (1.0 - np.exp(-0.03 * a)) ** 2.5

    flow = flow or FlowRules(flow_tolerance=None)
    rx = synthetic_prescriptions(
        age, volume, periods, length, min_age, max_harvests, RATE, PRICE, flow.old_forest_age_yr
    )
    t = (np.arange(1, periods + 1) - 0.5) * length
    age_mid = age[:, None] + t[None, :]
    vol = volume(np.repeat(np.arange(n), periods), age_mid.ravel()).reshape(n, periods)
    return PlanProblem(
        stand_ids=np.array([f"S{i}" for i in range(n)], dtype=object),
        area_ha=area,
        opening_area_ha=area,
        age_start_yr=age,
        eligible=age_mid >= min_age,  # the first harvest only (diagnosis, charts)
        volume_m3_ha=vol,
        npv_per_ha=vol * PRICE * (1 + RATE) ** -t[None, :],
        green_up_periods=np.full(n, green),
        initially_open=age_mid < green * length,
        edges=edges,
        periods=periods,
        period_length_yr=length,
        max_opening_ha=max_opening,
        unit_restriction=unit,
        flow=flow,
        prescriptions=rx,
        old_forest_group=groups,
    )


# ---- independent checker and brute force ------------------------------------------------
def harvest_periods(rx: Prescriptions, k: int) -> list[int]:
    return [int(rx.harvest_period[h]) for h in range(rx.harvest_start[k], rx.harvest_start[k + 1])]


def rule_breaks(pr: PlanProblem, plan: np.ndarray) -> list[str]:
    """Every rule a plan (one prescription index per stand) breaks, from the definitions."""
    rx = pr.prescriptions
    assert rx is not None
    n, P, f = pr.n_stands, pr.periods, pr.flow
    out = []
    cuts = []
    for i in range(n):
        k = int(plan[i])
        if not rx.stand_start[i] <= k < rx.stand_start[i + 1]:
            out.append(f"stand {i} has a prescription of another stand")
        cuts.append(harvest_periods(rx, k))
    V = np.zeros(P)
    for i in range(n):
        for h in range(rx.harvest_start[plan[i]], rx.harvest_start[plan[i] + 1]):
            V[rx.harvest_period[h] - 1] += pr.area_ha[i] * rx.harvest_volume_m3_ha[h]
    eps = 1e-9 * max(V.max(), 1.0)
    for p in range(P - 1):
        if f.flow_tolerance is not None and abs(V[p + 1] - V[p]) > f.flow_tolerance * V[p] + eps:
            out.append(f"flow {p}")
        if f.non_declining and V[p + 1] < V[p] - eps:
            out.append(f"declining {p}")
    for p in range(P):
        if f.volume_min_m3 is not None and V[p] < f.volume_min_m3 - eps:
            out.append(f"volume min {p}")
    if f.ending_volume_min_m3 is not None:
        ev = sum(pr.area_ha[i] * rx.ending_volume_m3_ha[plan[i]] for i in range(n))
        if ev < f.ending_volume_min_m3 - 1e-9 * ev:
            out.append("ending volume")
    if f.ending_mean_age_min_yr is not None:
        ea = sum(pr.area_ha[i] * rx.ending_age_yr[plan[i]] for i in range(n)) / pr.area_ha.sum()
        if ea < f.ending_mean_age_min_yr - 1e-9:
            out.append("ending age")
    if f.old_forest_min_share is not None:
        grp = np.zeros(n, int) if pr.old_forest_group is None else pr.old_forest_group
        for g in set(grp.tolist()):
            members = [i for i in range(n) if grp[i] == g]
            total = sum(pr.opening_area_ha[i] for i in members)
            for p in range(P):
                old = sum(
                    pr.opening_area_ha[i] for i in members if (int(rx.old_mask[plan[i]]) >> p) & 1
                )
                if old < f.old_forest_min_share * total - 1e-9 * total:
                    out.append(f"old forest group {g} period {p + 1}")
    return out + opening_breaches(pr, cuts)


def spatial_ok(pr: PlanProblem, p: int, open_set: int, new_set: int) -> bool:
    """Opening rules in period ``p`` for open stands ``open_set`` (bit i = stand i), of
    which ``new_set`` are open because of a harvest (networkx components)."""
    n = pr.n_stands
    g = nx.Graph()
    g.add_nodes_from(i for i in range(n) if open_set >> i & 1)
    g.add_edges_from(
        (a, b) for a, b in np.asarray(pr.edges) if open_set >> a & 1 and open_set >> b & 1
    )
    new = {i for i in range(n) if new_set >> i & 1}
    if pr.max_opening_ha is not None:
        for comp in nx.connected_components(g):
            if comp & new and sum(pr.opening_area_ha[i] for i in comp) > pr.max_opening_ha:
                return False
    if pr.unit_restriction:
        for a, b in g.edges:
            if a in new or b in new:
                return False
    return True


def combinations(pr: PlanProblem) -> dict:
    """Every combination of prescriptions (one per stand) with its NPV, period volumes,
    old-forest area per group and period, ending sums and spatial legality."""
    rx = pr.prescriptions
    assert rx is not None
    n, P = pr.n_stands, pr.periods
    choices = [range(rx.stand_start[i], rx.stand_start[i + 1]) for i in range(n)]
    grid = np.array(list(itertools.product(*choices)), dtype=np.int64)
    K = rx.n_prescriptions
    vol_k = np.zeros((K, P))  # volume cut per ha by prescription and period
    new_k = np.zeros((K, P), dtype=bool)  # open because of one of its harvests
    old_k = np.zeros((K, P), dtype=bool)
    stand = np.repeat(np.arange(n), np.diff(rx.stand_start))
    for k in range(K):
        G = pr.green_up_periods[stand[k]]
        for q in harvest_periods(rx, k):
            for p in range(1, P + 1):
                if q <= p <= q + G - 1:  # cut in q -> open in q .. q + G - 1
                    new_k[k, p - 1] = True
        for h in range(rx.harvest_start[k], rx.harvest_start[k + 1]):
            vol_k[k, rx.harvest_period[h] - 1] += rx.harvest_volume_m3_ha[h]
        for p in range(P):
            old_k[k, p] = bool((int(rx.old_mask[k]) >> p) & 1)
    grp = np.zeros(n, int) if pr.old_forest_group is None else np.asarray(pr.old_forest_group)
    labels = sorted(set(grp.tolist()))
    C = len(grid)
    out = {
        "grid": grid,
        "npv": np.zeros(C),
        "volume": np.zeros((C, P)),
        "old": np.zeros((C, len(labels), P)),
        "old_total": np.array([pr.opening_area_ha[grp == g].sum() for g in labels]),
        "ending_volume": np.zeros(C),
        "ending_age": np.zeros(C),
    }
    open_bits = np.zeros((C, P), dtype=np.int64)
    new_bits = np.zeros((C, P), dtype=np.int64)
    for i in range(n):
        k = grid[:, i]
        out["npv"] += pr.area_ha[i] * rx.npv_per_ha[k]
        out["volume"] += pr.area_ha[i] * vol_k[k]
        out["old"][:, labels.index(grp[i]), :] += pr.opening_area_ha[i] * old_k[k]
        out["ending_volume"] += pr.area_ha[i] * rx.ending_volume_m3_ha[k]
        out["ending_age"] += pr.area_ha[i] * rx.ending_age_yr[k] / pr.area_ha.sum()
        new_bits |= new_k[k].astype(np.int64) << i
        open_bits |= (new_k[k] | pr.initially_open[i][None, :]).astype(np.int64) << i
    spatial = np.ones(C, dtype=bool)
    for p in range(P):
        keys, inv = np.unique(open_bits[:, p] * (1 << n) + new_bits[:, p], return_inverse=True)
        ok = np.array([spatial_ok(pr, p, int(key) >> n, int(key) & ((1 << n) - 1)) for key in keys])
        spatial &= ok[inv.ravel()]
    out["spatial"] = spatial
    return out


def brute_force(pr: PlanProblem) -> tuple[float, np.ndarray | None, int]:
    """Best NPV over every combination of prescriptions; (npv, plan, combinations)."""
    c = combinations(pr)
    f, P = pr.flow, pr.periods
    V = c["volume"]
    ok = c["spatial"].copy()
    eps = 1e-9 * max(V.max(), 1.0)
    for p in range(P - 1):
        if f.flow_tolerance is not None:
            ok &= np.abs(V[:, p + 1] - V[:, p]) <= f.flow_tolerance * V[:, p] + eps
        if f.non_declining:
            ok &= V[:, p + 1] >= V[:, p] - eps
    if f.volume_min_m3 is not None:
        ok &= (f.volume_min_m3 - eps <= V).all(axis=1)
    if f.ending_volume_min_m3 is not None:
        ok &= c["ending_volume"] >= f.ending_volume_min_m3 * (1 - 1e-9)
    if f.ending_mean_age_min_yr is not None:
        ok &= c["ending_age"] >= f.ending_mean_age_min_yr - 1e-9
    if f.old_forest_min_share is not None:
        need = f.old_forest_min_share * c["old_total"][None, :, None]
        ok &= (c["old"] >= need - 1e-9 * need).all(axis=(1, 2))
    idx = np.nonzero(ok)[0]
    if idx.size == 0:
        return -np.inf, None, len(ok)
    best = idx[np.argmax(c["npv"][idx])]
    plan = c["grid"][best]
    assert rule_breaks(pr, plan) == []  # the two checkers agree on the optimum
    return float(c["npv"][best]), plan, len(ok)


def assert_matches_brute_force(pr: PlanProblem, reharvest: bool = True) -> tuple[float, object]:
    best, plan, combos = brute_force(pr)
    assert 1_000 < combos < 2_000_000  # a real search, small enough to enumerate
    assert plan is not None and best > 0
    rx = pr.prescriptions
    assert rx is not None
    if reharvest:  # the optimum cuts some stand twice: the case is about re-harvest
        assert any(rx.harvest_start[k + 1] - rx.harvest_start[k] >= 2 for k in plan)
    res = solve(pr, EXACT)
    assert res.prescription is not None
    assert rule_breaks(pr, res.prescription) == []
    assert res.status == "optimal"
    # CP-SAT optimises integer-scaled values; equal up to the reported rounding bound.
    tol = res.stats["objective_rounding_error_bound"] + 1e-9 * abs(best)
    assert abs(res.npv - best) <= 2 * tol + 1e-6
    # Every bound is at or above the optimum.
    assert res.lp_bound >= best - 1e-6 * abs(best)
    if res.cpsat_bound is not None:
        assert res.cpsat_bound >= best - 2 * tol - 1e-6
    # period is the first harvest; harvests() lists them all.
    stand, no, period = res.harvests(pr)
    for i in range(pr.n_stands):
        want = harvest_periods(rx, int(res.prescription[i]))
        assert period[stand == i].tolist() == want
        assert no[stand == i].tolist() == list(range(1, len(want) + 1))
        assert res.period[i] == (want[0] if want else 0)
    return best, res


# ---- tests ----------------------------------------------------------------------------------
AGES6 = np.array([62.0, 25.0, 85.0, 15.0, 71.0, 48.0])


@pytest.mark.parametrize("seed", [1, 2])
def test_grid_area_restriction_matches_brute_force(seed: int) -> None:
    pr = rx_problem(grid_edges(2, 3), AGES6, seed, flow=FlowRules(flow_tolerance=0.7))
    assert_matches_brute_force(pr)


def test_voronoi_stands_match_brute_force() -> None:
    gdf = voronoi_forest(7, seed=4, mean_area_ha=10.0)
    area = shapely.area(np.asarray(gdf.geometry.values)) / 10_000.0
    age = np.array([70.0, 22.0, 90.0, 35.0, 12.0, 55.0, 28.0])[: len(gdf)]
    pr = rx_problem(touch_edges(gdf), age, 5, area=area, max_opening=20.0)
    assert len(pr.edges) > 0
    assert_matches_brute_force(pr)


def test_unit_restriction_matches_brute_force() -> None:
    pr = rx_problem(grid_edges(2, 3), AGES6, 7, max_opening=None, unit=True, green=1)
    assert_matches_brute_force(pr)


def test_flow_floor_and_ending_rules_match_brute_force() -> None:
    pr0 = rx_problem(grid_edges(2, 3), AGES6, 9, green=1, max_opening=30.0)
    lp = lp_bound(pr0)
    flow = FlowRules(
        flow_tolerance=0.8,
        volume_min_m3=0.3 * lp.period_volume_m3.min(),
        ending_volume_min_m3=0.5
        * float(pr0.area_ha @ pr0.rx().ending_volume_m3_ha[pr0.rx().stand_start[:-1]]),
        ending_mean_age_min_yr=25.0,
    )
    pr = dataclasses.replace(pr0, flow=flow)
    assert_matches_brute_force(pr, reharvest=False)


def _old_case(share: float | None, groups: np.ndarray | None = None) -> PlanProblem:
    return rx_problem(
        grid_edges(2, 3),
        AGES6,
        3,
        max_opening=40.0,
        flow=FlowRules(flow_tolerance=None, old_forest_age_yr=60.0, old_forest_min_share=share),
        groups=groups,
    )


def test_old_forest_rule_binds_and_is_kept() -> None:
    free, _, _ = brute_force(_old_case(None))
    pr = _old_case(0.3)
    best, res = assert_matches_brute_force(pr, reharvest=False)
    assert best < free * (1 - 1e-6)  # the rule costs something: it binds
    # In some period the plan keeps close to the minimum old area, never below it.
    rx = pr.prescriptions
    assert rx is not None
    oa = pr.opening_area_ha
    old = [
        sum(oa[i] for i in range(pr.n_stands) if (int(rx.old_mask[res.prescription[i]]) >> p) & 1)
        for p in range(pr.periods)
    ]
    assert min(old) >= 0.3 * oa.sum() * (1 - 1e-9)


def test_old_forest_rule_by_group_matches_brute_force() -> None:
    groups = np.array([0, 1, 1, 0, 0, 1])
    free, _, _ = brute_force(_old_case(None, groups))
    best, _ = assert_matches_brute_force(_old_case(0.3, groups), reharvest=False)
    whole, _, _ = brute_force(_old_case(0.3))
    assert best < free * (1 - 1e-6)
    # A share in every group is stricter than the same share of the whole forest (each
    # group's old area adds up to the forest's), and strictly so on this layer.
    assert best < whole * (1 - 1e-6)


def test_old_forest_alone_infeasible_is_diagnosed() -> None:
    pr = _old_case(0.9)
    _, plan, _ = brute_force(pr)
    assert plan is None  # no combination keeps 90 % old forest in every period
    # Largest share any plan can keep in every period (over the same combinations; the
    # forest has no other rule that could bind here).
    c = combinations(pr)
    threshold = float((c["old"][:, 0, :].min(axis=1) / c["old_total"][0]).max())
    assert 0.0 < threshold < 0.9
    with pytest.raises(InfeasibleError) as ei:
        solve(pr, SolverSettings(time_limit_s=10.0, workers=2))
    diag = ei.value.diagnosis
    line = next(d for d in diag if d.startswith("old-forest share"))
    m = re.match(r"old-forest share 0\.9 is infeasible, ([0-9.]+) is feasible", line)
    assert m, diag
    v = float(m.group(1))
    # 7 bisection steps between 0.9 and 0: within 0.9 / 128 below the true threshold.
    assert threshold - 0.9 / 128 - 1e-3 <= v <= threshold + 1e-3
    assert not any(d.startswith("relaxing old forest") for d in diag)
    assert diag == diagnose(pr, SolverSettings(time_limit_s=10.0))


@pytest.mark.parametrize(
    ("column_generation", "volume_min"), [(False, None), (True, None), (True, 1500.0)]
)
def test_lp_bound_matches_linprog(
    column_generation: bool, volume_min: float | None, monkeypatch: pytest.MonkeyPatch
) -> None:
    if column_generation:  # price prescriptions in rounds even on this small model
        monkeypatch.setattr("spatialplan.schedule.bound.CG_MIN_COLUMNS", 0)
        monkeypatch.setattr("spatialplan.schedule.bound.CG_START", 1)
        monkeypatch.setattr("spatialplan.schedule.bound.CG_ADD", 1)
    pr = _old_case(0.25)
    pr = dataclasses.replace(
        pr,
        flow=dataclasses.replace(
            pr.flow, flow_tolerance=0.2, volume_max_m3=9000.0, volume_min_m3=volume_min
        ),
    )
    rx = pr.prescriptions
    assert rx is not None
    n, P, K = pr.n_stands, pr.periods, rx.n_prescriptions
    stand = np.repeat(np.arange(n), np.diff(rx.stand_start))
    c = -pr.area_ha[stand] * rx.npv_per_ha
    vol = np.zeros((K, P))  # V[p] = sum_k vol[k, p] x_k
    old = np.zeros((K, P))
    for k in range(K):
        for h in range(rx.harvest_start[k], rx.harvest_start[k + 1]):
            vol[k, rx.harvest_period[h] - 1] += pr.area_ha[stand[k]] * rx.harvest_volume_m3_ha[h]
        for p in range(P):
            old[k, p] = pr.opening_area_ha[stand[k]] * ((int(rx.old_mask[k]) >> p) & 1)
    a_ub, b_ub = [], []
    t = 0.2
    for p in range(P - 1):  # |V[p+1] - V[p]| <= t V[p]
        a_ub.append(vol[:, p + 1] - (1 + t) * vol[:, p])
        a_ub.append((1 - t) * vol[:, p] - vol[:, p + 1])
        b_ub += [0.0, 0.0]
    for p in range(P):
        a_ub.append(vol[:, p])
        b_ub.append(9000.0)
        if volume_min is not None:
            a_ub.append(-vol[:, p])
            b_ub.append(-volume_min)
        a_ub.append(-old[:, p])  # old area >= 0.25 x forest area
        b_ub.append(-0.25 * pr.opening_area_ha.sum())
    a_eq = np.array([(stand == i).astype(float) for i in range(n)])  # one rx per stand
    ref = linprog(c, A_ub=np.array(a_ub), b_ub=b_ub, A_eq=a_eq, b_eq=np.ones(n), bounds=(0, 1))
    assert ref.status == 0
    got = lp_bound(pr)
    assert got.status == "optimal"
    assert got.value == pytest.approx(-ref.fun, rel=1e-7)
    assert got.x_rx is not None and got.x_rx.shape == (K,)
    if column_generation:
        assert got.rounds > 1
    # Harvest shares by period and volumes agree with the prescription shares.
    assert got.period_volume_m3 == pytest.approx(got.x_rx @ vol, rel=1e-9, abs=1e-6)


def test_single_harvest_prescriptions_give_the_same_plan_value() -> None:
    # The generator with one harvest at most reproduces the single-harvest model built
    # from the (n, P) arrays: the same optimum either way.
    pr = rx_problem(grid_edges(2, 3), AGES6, 4, max_harvests=1, flow=FlowRules(flow_tolerance=0.6))
    single = dataclasses.replace(pr, prescriptions=None)
    best, _, _ = brute_force(pr)
    a = solve(pr, EXACT)
    b = solve(single, EXACT)
    assert a.status == b.status == "optimal"
    assert a.npv == pytest.approx(best, rel=1e-6) and b.npv == pytest.approx(best, rel=1e-6)
    assert a.lp_bound == pytest.approx(b.lp_bound, rel=1e-9)


# ---- chained flow rules over long horizons ----------------------------------------------
def _non_declining_landscape(seed: int) -> PlanProblem:
    """About 150 Voronoi stands, 12 periods of 5 years, up to 3 clear-cuts per stand."""
    gdf = voronoi_forest(150, seed=seed)
    area = shapely.area(np.asarray(gdf.geometry.values)) / 10_000.0
    return rx_problem(
        touch_edges(gdf),
        gdf["age"].to_numpy(float),
        seed,
        area=area,
        periods=12,
        length=5.0,
        max_harvests=3,
        max_opening=40.0,
        flow=FlowRules(
            flow_tolerance=None,
            non_declining=True,
            old_forest_age_yr=80.0,
            old_forest_min_share=0.1,
        ),
    )


@pytest.mark.parametrize("seed", [1, 2])
def test_non_declining_construction_reaches_most_of_the_lp_bound(seed: int) -> None:
    # The construction alone (LP rounding, repair by moving stands between periods, flow
    # sweep) must give a plan the independent checker accepts with at least 85 % of the
    # aspatial LP bound; measured 0.92 on both seeds. Before the repair moved stands, the
    # trim dropped every stand on this kind of instance (a period one stand short forces
    # every earlier period down).
    pr = _non_declining_landscape(seed)
    _assert_legal_construction_harvests_every_period(pr, 0.85, 120.0)


def _assert_legal_construction_harvests_every_period(
    pr: PlanProblem, share: float, time_limit_s: float
) -> None:
    """The construction alone: legal by the independent checker, at least ``share`` of the
    aspatial LP bound, a harvest in every period (the volumes are non-declining and
    positive)."""
    res = solve(pr, dataclasses.replace(EXACT, time_limit_s=time_limit_s), _strategy="heuristic")
    assert res.prescription is not None
    assert rule_breaks(pr, res.prescription) == []
    assert res.npv >= share * res.lp_bound
    _, _, period = res.harvests(pr)
    assert set(period.tolist()) == set(range(1, pr.periods + 1))


@pytest.mark.parametrize("max_opening", [None, 40.0])
@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_capped_non_declining_construction_does_not_collapse(
    seed: int, max_opening: float | None
) -> None:
    # Non-declining flow, at most a 10 % rise per period and a volume cap at the median of
    # the LP's period volumes (a sustained-yield cap, common practice, no source): the
    # chain of rows is tight in every period. The construction alone must return a plan
    # the independent checker accepts that harvests in every period and reaches 80 % of
    # the aspatial LP bound (HiGHS). Measured 0.87-0.92 on these eight cases; aiming only
    # at the LP's own volumes, the flow repair failed and the trim left the empty plan on
    # six of them.
    pr0 = _non_declining_landscape(seed)
    cap = float(np.median(lp_bound(pr0).period_volume_m3))
    flow = dataclasses.replace(pr0.flow, flow_tolerance=0.1, volume_max_m3=cap)
    pr = dataclasses.replace(pr0, max_opening_ha=max_opening, flow=flow)
    _assert_legal_construction_harvests_every_period(pr, 0.8, 60.0)


@pytest.mark.parametrize("seed", [1, 4])
def test_non_declining_matches_brute_force(seed: int) -> None:
    pr = rx_problem(
        grid_edges(2, 3), AGES6, seed, flow=FlowRules(flow_tolerance=None, non_declining=True)
    )
    best, _ = assert_matches_brute_force(pr, reharvest=False)
    # The construction alone already gives a legal, non-empty plan no better than the
    # optimum.
    res = solve(pr, EXACT, _strategy="heuristic")
    assert res.prescription is not None
    assert rule_breaks(pr, res.prescription) == []
    assert 0 < res.npv <= best + 1e-6 * abs(best)


def test_annealing_improves_a_legal_non_declining_plan() -> None:
    # Under non-declining flow over 12 periods (a chain of 11 rows) the annealing, started
    # from the construction's legal plan, must return a plan the independent rule check
    # accepts with a strictly higher NPV (the plan is 92 % of the LP bound, so it is not
    # proven optimal). With the rows as a penalty, a plan was recorded only when all 11
    # rows held at once, and on this seed no round improved it (measured 0 improving
    # rounds); with the rows kept hard every accepted plan is legal (measured 92.0 -> 95.4 %
    # of the bound with 6 rounds of 200k moves).
    from spatialplan.schedule.anneal import anneal
    from spatialplan.schedule.model import prepare

    pr = _non_declining_landscape(2)
    res = solve(pr, dataclasses.replace(EXACT, time_limit_s=120.0), _strategy="heuristic")
    assert res.prescription is not None
    assert rule_breaks(pr, res.prescription) == []
    assert res.npv < 0.99 * res.lp_bound  # room left: the start is not proven optimal
    out = anneal(prepare(pr), res.prescription, seed=0, round_moves=100_000, max_rounds=3)
    assert rule_breaks(pr, out.prescription) == []
    assert out.npv > res.npv * (1 + 1e-6)
    # The value it reports is the plan's NPV summed from scratch: area x NPV per ha of the
    # chosen prescription, stand by stand.
    rx = pr.rx()
    total = float(np.sum(np.asarray(pr.area_ha) * np.asarray(rx.npv_per_ha)[out.prescription]))
    assert out.npv == pytest.approx(total, rel=1e-9)


def _capped_non_declining(seed: int, max_opening: float | None) -> PlanProblem:
    """The capped non-declining landscape: a cap at the median LP period volume (HiGHS)."""
    pr0 = _non_declining_landscape(seed)
    cap = float(np.median(lp_bound(pr0).period_volume_m3))
    flow = dataclasses.replace(pr0.flow, flow_tolerance=0.1, volume_max_m3=cap)
    return dataclasses.replace(pr0, max_opening_ha=max_opening, flow=flow)


@pytest.mark.parametrize("max_opening", [None, 40.0])
@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_flow_sweep_of_a_plan_without_the_chain_breaks_no_other_rule(
    seed: int, max_opening: float | None
) -> None:
    # A legal plan of the problem without its non-declining rows (the construction, all
    # other rules kept) swept back into the chain (construct.sweep_flow): every sweep move
    # keeps the openings, the flow tolerance, the cap and the old forest, so whatever the
    # independent check finds can only be a declining pair; and a sweep either mends every
    # pair or is rejected by the caller. Measured on these eight cases: legal on (2, None),
    # (2, 40), (3, 40), (4, 40) at 0.916-0.956 of the LP bound, one to three declining
    # pairs left on the others.
    from spatialplan.schedule.model import prepare
    from spatialplan.schedule.repair import sweep_flow

    pr = _capped_non_declining(seed, max_opening)
    loose = dataclasses.replace(pr, flow=dataclasses.replace(pr.flow, non_declining=False))
    res = solve(loose, dataclasses.replace(EXACT, time_limit_s=60.0), _strategy="heuristic")
    assert res.prescription is not None
    assert rule_breaks(loose, res.prescription) == []
    swept = sweep_flow(prepare(pr), res.prescription, time.perf_counter() + 60.0)
    left = rule_breaks(pr, swept)
    assert all(b.startswith("declining") for b in left), left
    rx = pr.prescriptions
    assert rx is not None
    V = np.zeros(pr.periods)
    for i, k in enumerate(swept.tolist()):
        for h in range(rx.harvest_start[k], rx.harvest_start[k + 1]):
            V[rx.harvest_period[h] - 1] += pr.area_ha[i] * rx.harvest_volume_m3_ha[h]
    assert pr.flow.volume_max_m3 is not None
    assert V.max() <= pr.flow.volume_max_m3 * (1 + 1e-9)
    if (seed, max_opening) in ((2, None), (2, 40.0), (3, 40.0), (4, 40.0)):
        assert left == []


@pytest.mark.parametrize("seed", [2, 3])
def test_search_under_non_declining_flow_keeps_the_best_construction(seed: int) -> None:
    # The local search with the phase on the problem without the non-declining rows
    # (_relaxed_chain) returns a plan the independent check accepts, at least as good as
    # the construction alone (both constructions run first; every plan is offered to the
    # same best) and at least 90 % of the aspatial LP bound (HiGHS).
    pr = _capped_non_declining(seed, 40.0)
    st = dataclasses.replace(EXACT, time_limit_s=30.0)
    heur = solve(pr, st, _strategy="heuristic")
    res = solve(pr, st, _strategy="local")
    assert res.prescription is not None
    assert rule_breaks(pr, res.prescription) == []
    assert res.npv >= heur.npv - 1e-6 * abs(heur.npv)
    assert res.npv >= 0.9 * res.lp_bound
    assert "relaxed_chain" in res.stats


@pytest.mark.parametrize("seed", [1, 2])
def test_construction_runs_stop_at_their_budget(seed: int) -> None:
    # Once a plan that harvests is built, no further assignment order starts after the
    # construction budget is spent (budget 0: only the first order runs); with time to
    # spare all four run. Each plan kept passes the independent check. Common practice,
    # no source: a start heuristic gets a bounded share of the solve time.
    from spatialplan.schedule.model import prepare
    from spatialplan.schedule.starts import HEURISTIC_ORDERS, construct_runs

    pr = _non_declining_landscape(seed)
    flow = dataclasses.replace(pr.flow, non_declining=False, flow_tolerance=0.1)
    pr = dataclasses.replace(pr, flow=flow)
    prep = prepare(pr)
    lp = lp_bound(pr)
    runs = [(o, 0.0) for o in HEURISTIC_ORDERS]
    far = time.perf_counter() + 120.0
    best, info = construct_runs(prep, lp, runs, far, 0.0, lambda plan: None)
    assert best is not None and list(info) == [HEURISTIC_ORDERS[0]]
    assert rule_breaks(pr, best[0]) == []
    best_all, info_all = construct_runs(prep, lp, runs, far, 120.0, lambda plan: None)
    assert best_all is not None and list(info_all) == list(HEURISTIC_ORDERS)
    assert rule_breaks(pr, best_all[0]) == []
    assert best_all[1] >= best[1] - 1e-6 * abs(best[1])
