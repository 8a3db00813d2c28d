"""Scheduler checks against independent references.

* Brute force over every schedule ((P + 1)^n of them) with a rule checker written here,
  using networkx connected components for the openings (reference library).
* The aspatial LP against scipy.optimize.linprog (HiGHS) on a matrix built here.
"""

from __future__ import annotations

import itertools
import os
import re
import signal
import subprocess
import sys

import numpy as np
import pytest
import shapely
from scipy.optimize import linprog

from spatialplan.errors import InfeasibleError
from spatialplan.problem import FlowRules, PlanProblem
from spatialplan.schedule import diagnose, lp_bound, solve
from spatialplan.settings import SolverSettings
from spatialplan.synthetic import voronoi_forest
from tests.graphs import grid_edges, opening_breaches, touch_edges

EXACT = SolverSettings(time_limit_s=30.0, workers=2, seed=1, stop_gap=0.0)


# ---- small instances -------------------------------------------------------------------
def make_problem(
    n: int,
    edges: np.ndarray,
    seed: int,
    periods: int = 3,
    length: float = 10.0,
    area: np.ndarray | None = None,
    age: np.ndarray | None = None,
    min_age: float = 30.0,
    green: int = 1,
    max_opening: float | None = 25.0,
    unit: bool = False,
    flow: FlowRules | None = None,
    rate: float = 0.04,
) -> PlanProblem:
    """A small instance with Chapman-Richards volumes (common practice, no source)."""
    rng = np.random.default_rng(seed)
    area = rng.uniform(5.0, 15.0, n) if area is None else np.asarray(area, float)
    age = rng.integers(5, 90, n).astype(float) if age is None else np.asarray(age, float)
    t = (np.arange(1, periods + 1) - 0.5) * length
    age_mid = age[:, None] + t[None, :]
    asym = rng.uniform(300, 600, n)[:, None]
    vol = asym * (1 - np.exp(-0.03 * age_mid)) ** 2.5
    npv = vol * 50.0 * (1 + rate) ** -t[None, :]
    elig = age_mid >= min_age
    init_open = age_mid < green * length
    return PlanProblem(
        stand_ids=np.array([f"S{i}" for i in range(n)], dtype=object),
        area_ha=area,
        opening_area_ha=area,
        age_start_yr=age,
        eligible=elig,
        volume_m3_ha=vol,
        npv_per_ha=npv,
        green_up_periods=np.full(n, green),
        initially_open=init_open,
        edges=edges,
        periods=periods,
        period_length_yr=length,
        max_opening_ha=max_opening,
        unit_restriction=unit,
        flow=flow or FlowRules(flow_tolerance=0.5),
        eligible_no_min_age=np.ones_like(elig),
        min_age_yr=min_age,
    )


# ---- independent checker and brute force ---------------------------------------------------
def rule_breaks(pr: PlanProblem, period: np.ndarray) -> list[str]:
    """Every rule a plan breaks, each rule written out here from its definition.

    Area restriction: every connected group of stands open in a period is at most the
    maximum opening; unit restriction: no two adjacent stands open together (both as in
    Murray 1999, Forest Science 45:45-52, from memory). Even flow, volume and area bounds:
    common practice, no source.
    """
    n, P = pr.n_stands, pr.periods
    out = []
    for i in range(n):
        if period[i] and not pr.eligible[i, period[i] - 1]:
            out.append(f"ineligible {i}")
    V = np.zeros(P)
    A = np.zeros(P)
    for i in range(n):
        if period[i]:
            V[period[i] - 1] += pr.area_ha[i] * pr.volume_m3_ha[i, period[i] - 1]
            A[period[i] - 1] += pr.area_ha[i]
    f = pr.flow
    eps = 1e-9 * max(V.max(), 1.0)
    for p in range(P - 1):
        if f.flow_tolerance is not None and abs(V[p + 1] - V[p]) > f.flow_tolerance * V[p] + eps:
            out.append(f"flow {p}")
        if f.non_declining and V[p + 1] < V[p] - eps:
            out.append(f"declining {p}")
    for p in range(P):
        if f.volume_min_m3 is not None and V[p] < f.volume_min_m3 - eps:
            out.append(f"volume min {p}")
        if f.volume_max_m3 is not None and V[p] > f.volume_max_m3 + eps:
            out.append(f"volume max {p}")
    cuts = [[int(period[i])] if period[i] else [] for i in range(n)]
    return out + opening_breaches(pr, cuts)


def brute_force(pr: PlanProblem) -> tuple[float, np.ndarray]:
    """Best NPV over all (P + 1)^n schedules that break no rule."""
    n, P = pr.n_stands, pr.periods
    grid = np.array(list(itertools.product(range(P + 1), repeat=n)), dtype=np.int64)
    val = np.zeros(len(grid))
    ok = np.ones(len(grid), dtype=bool)
    for i in range(n):
        q = grid[:, i]
        h = q > 0
        col = np.clip(q - 1, 0, P - 1)
        ok &= ~h | pr.eligible[i, col]
        val += np.where(h, pr.area_ha[i] * pr.npv_per_ha[i, col], 0.0)
    # Flow and volume rules vectorised over all schedules first (same definitions as
    # rule_breaks, which re-checks the survivors together with the openings).
    V = np.zeros((len(grid), P))
    for i in range(n):
        for p in range(P):
            V[:, p] += np.where(grid[:, i] == p + 1, pr.area_ha[i] * pr.volume_m3_ha[i, p], 0.0)
    f = pr.flow
    eps = 1e-9 * max(V.max(), 1.0)
    for p in range(P - 1):
        if f.flow_tolerance is not None:
            ok &= np.abs(V[:, p + 1] - V[:, p]) <= f.flow_tolerance * V[:, p] + eps
    if f.volume_min_m3 is not None:
        ok &= (f.volume_min_m3 - eps <= V).all(axis=1)
    idx = np.nonzero(ok)[0]
    for k in idx[np.argsort(-val[idx], kind="stable")]:
        if not rule_breaks(pr, grid[k]):
            return float(val[k]), grid[k]
    raise AssertionError("no legal schedule (the empty one should be)")


def assert_matches_brute_force(pr: PlanProblem) -> None:
    best, _ = brute_force(pr)
    assert best > 0  # a non-trivial optimum
    res = solve(pr, EXACT)
    assert rule_breaks(pr, res.period) == []
    assert res.status == "optimal"
    # CP-SAT optimises integer-scaled values; equal up to the reported rounding bound.
    tol = res.stats["objective_rounding_error_bound"] + 1e-9 * abs(best)
    assert abs(res.npv - best) <= 2 * tol + 1e-6
    assert res.npv <= res.lp_bound + 1e-6


# ---- tests --------------------------------------------------------------------------------
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_grid_area_restriction_matches_brute_force(seed: int) -> None:
    # 3 x 3 grid, 3 periods: 4^9 = 262,144 schedules enumerated.
    pr = make_problem(
        9, grid_edges(3, 3), seed, max_opening=22.0, green=2, flow=FlowRules(flow_tolerance=0.6)
    )
    assert_matches_brute_force(pr)


def test_voronoi_stands_match_brute_force() -> None:
    gdf = voronoi_forest(8, seed=4, mean_area_ha=10.0)
    area = shapely.area(np.asarray(gdf.geometry.values)) / 10_000.0
    pr = make_problem(
        len(gdf),
        touch_edges(gdf),
        5,
        area=area,
        age=gdf["age"].to_numpy(float),
        max_opening=20.0,
        green=2,
        min_age=20.0,
    )
    assert len(pr.edges) > 0
    assert_matches_brute_force(pr)


def test_unit_restriction_matches_brute_force() -> None:
    pr = make_problem(
        8,
        grid_edges(2, 4),
        7,
        max_opening=None,
        unit=True,
        green=2,
        min_age=10.0,
        flow=FlowRules(flow_tolerance=None),
    )
    assert_matches_brute_force(pr)


def test_green_up_with_initially_open_stands() -> None:
    # Young stands (age 1-4) are open in period 1 (age at mid-period < G L = 20).
    age = np.array([2, 95, 80, 3, 70, 85, 60, 1], float)
    pr = make_problem(
        8,
        grid_edges(2, 4),
        8,
        age=age,
        max_opening=25.0,
        green=2,
        min_age=0.0,
        flow=FlowRules(flow_tolerance=0.8),
    )
    assert pr.initially_open[:, 0].sum() >= 3
    assert_matches_brute_force(pr)


def test_flow_and_volume_floor_match_brute_force() -> None:
    pr0 = make_problem(8, grid_edges(2, 4), 9, max_opening=30.0, green=1)
    lp = lp_bound(pr0)
    vmin = 0.3 * lp.period_volume_m3.min()
    pr = make_problem(
        8,
        grid_edges(2, 4),
        9,
        max_opening=30.0,
        green=1,
        flow=FlowRules(flow_tolerance=0.25, volume_min_m3=vmin),
    )
    assert_matches_brute_force(pr)


def test_lp_bound_matches_linprog() -> None:
    pr = make_problem(
        10,
        grid_edges(2, 5),
        11,
        periods=4,
        min_age=20.0,
        flow=FlowRules(flow_tolerance=0.15, volume_max_m3=9000.0, area_min_ha=5.0),
    )
    n, P = pr.n_stands, pr.periods
    cells = [(i, p) for i in range(n) for p in range(P) if pr.eligible[i, p]]
    c = np.array([-pr.area_ha[i] * pr.npv_per_ha[i, p] for i, p in cells])
    vol = {(i, p): pr.area_ha[i] * pr.volume_m3_ha[i, p] for i, p in cells}
    rows, rhs = [], []
    for i in range(n):  # at most one harvest per stand (Model I)
        rows.append([1.0 if k[0] == i else 0.0 for k in cells])
        rhs.append(1.0)
    t = pr.flow.flow_tolerance
    for p in range(P - 1):  # V[p+1] <= (1+t) V[p] and V[p+1] >= (1-t) V[p]
        rows.append(
            [vol[k] if k[1] == p + 1 else -(1 + t) * vol[k] if k[1] == p else 0.0 for k in cells]
        )
        rows.append(
            [(1 - t) * vol[k] if k[1] == p else -vol[k] if k[1] == p + 1 else 0.0 for k in cells]
        )
        rhs += [0.0, 0.0]
    for p in range(P):
        rows.append([vol[k] if k[1] == p else 0.0 for k in cells])
        rhs.append(9000.0)
        rows.append([-pr.area_ha[k[0]] if k[1] == p else 0.0 for k in cells])
        rhs.append(-5.0)
    ref = linprog(c, A_ub=np.array(rows), b_ub=np.array(rhs), bounds=(0, 1), method="highs")
    assert ref.status == 0
    got = lp_bound(pr)
    assert got.status == "optimal"
    assert got.value == pytest.approx(-ref.fun, rel=1e-7)
    assert got.x.shape == (n, P)


def test_infeasible_flow_is_diagnosed() -> None:
    # Stand 0 can only be cut in period 1 (100 m3), stand 1 only in period 2 (150 m3);
    # a 50 m3 floor forces both, so |150 - 100| <= t * 100 needs t >= 0.5.
    pr = make_problem(
        2,
        np.array([[0, 1]]),
        1,
        periods=2,
        area=np.array([1.0, 1.0]),
        max_opening=None,
        flow=FlowRules(flow_tolerance=0.10, volume_min_m3=50.0),
    )
    pr = PlanProblem(
        **{
            **pr.__dict__,
            "volume_m3_ha": np.array([[100.0, 0.0], [0.0, 150.0]]),
            "eligible": np.array([[True, False], [False, True]]),
            "eligible_no_min_age": None,
            "min_age_yr": None,
        }
    )
    with pytest.raises(InfeasibleError) as ei:
        solve(pr, SolverSettings(time_limit_s=10.0, workers=2))
    diag = ei.value.diagnosis
    line = next(d for d in diag if d.startswith("flow tolerance"))
    m = re.match(r"flow tolerance 0\.10 is infeasible, ([0-9.]+) is feasible", line)
    assert m, diag
    v = float(m.group(1))
    assert 0.5 <= v <= 0.52  # smallest feasible value, 1 % bisection resolution
    relaxed = PlanProblem(
        **{**pr.__dict__, "flow": FlowRules(flow_tolerance=v, volume_min_m3=50.0)}
    )
    assert rule_breaks(relaxed, np.array([1, 2])) == []
    assert diagnose(pr, SolverSettings(time_limit_s=10.0)) == diag


def test_tiny_time_limit_still_gives_a_legal_plan() -> None:
    # No volume or area floor here, so the empty plan keeps every rule (flow: |0 - 0| <= t 0)
    # and a legal plan exists at any time limit: NoSolutionError would be a bug. Every limit
    # must return a plan that passes the checker written here.
    gdf = voronoi_forest(80, seed=3)
    area = shapely.area(np.asarray(gdf.geometry.values)) / 10_000.0
    pr = make_problem(
        len(gdf),
        touch_edges(gdf),
        3,
        area=area,
        age=gdf["age"].to_numpy(float),
        periods=5,
        length=5.0,
        max_opening=40.0,
        green=2,
        flow=FlowRules(flow_tolerance=0.1),
    )
    assert rule_breaks(pr, np.zeros(pr.n_stands, dtype=np.int64)) == []
    checked = 0
    for limit in (0.001, 0.2, 2.0):
        res = solve(pr, SolverSettings(time_limit_s=limit, workers=2))
        assert rule_breaks(pr, res.period) == [], limit
        assert res.status in {"optimal", "feasible", "time_limit"}, (limit, res.status)
        # The reported NPV is the plan's own: sum of area x NPV per ha of each cut cell.
        cut = np.nonzero(res.period)[0]
        own = float((pr.area_ha[cut] * pr.npv_per_ha[cut, res.period[cut] - 1]).sum())
        assert res.npv == pytest.approx(own, rel=1e-9, abs=1e-6)
        assert res.npv <= res.lp_bound * (1 + 1e-9)
        checked += 1
    assert checked == 3


def test_only_empty_plan_is_flagged() -> None:
    # Every stand is larger than the maximum opening: only the empty plan is legal.
    pr = make_problem(4, grid_edges(2, 2), 2, area=np.full(4, 30.0), max_opening=25.0, min_age=0.0)
    res = solve(pr, EXACT)
    assert not res.period.any()
    assert res.stats["empty_plan"]
    assert res.status != "optimal" and res.lp_bound > 0
    assert res.stats["warnings"]


def test_ctrl_c_returns_best_plan_marked_interrupted() -> None:
    gdf = voronoi_forest(300, seed=5)
    area = shapely.area(np.asarray(gdf.geometry.values)) / 10_000.0
    pr = make_problem(
        len(gdf),
        touch_edges(gdf),
        5,
        area=area,
        age=gdf["age"].to_numpy(float),
        periods=6,
        length=5.0,
        max_opening=40.0,
        green=2,
        flow=FlowRules(flow_tolerance=0.1),
    )
    # SIGINT is sent once the solve reports its first plan (so the solve is under way and
    # holds a plan), not after a fixed sleep. stop_gap=0 and 60 s keep the solve from ending by
    # itself first, so the outcome must be exactly "interrupted" with a plan at least as
    # good as the one reported.
    seen: list[float] = []

    def interrupt_on_first_plan(p) -> None:
        seen.append(p.best_npv)
        if len(seen) == 1:
            os.kill(os.getpid(), signal.SIGINT)

    before = signal.getsignal(signal.SIGINT)
    res = solve(
        pr,
        SolverSettings(time_limit_s=60.0, workers=2, stop_gap=0.0),
        on_progress=interrupt_on_first_plan,
    )
    assert signal.getsignal(signal.SIGINT) is before  # handler restored
    assert seen, "the solve never reported a plan"
    assert res.status == "interrupted"
    assert res.npv >= seen[0] - 1e-6 * abs(seen[0])
    assert rule_breaks(pr, res.period) == []


# ---- local search (spatialplan.schedule.anneal) ------------------------------------------
def _local_cases() -> list[PlanProblem]:
    gdf = voronoi_forest(8, seed=4, mean_area_ha=10.0)
    area = shapely.area(np.asarray(gdf.geometry.values)) / 10_000.0
    return [
        make_problem(
            9, grid_edges(3, 3), 1, max_opening=22.0, green=2, flow=FlowRules(flow_tolerance=0.6)
        ),
        make_problem(
            len(gdf),
            touch_edges(gdf),
            5,
            area=area,
            age=gdf["age"].to_numpy(float),
            max_opening=20.0,
            green=2,
            min_age=20.0,
        ),
        make_problem(
            8,
            grid_edges(2, 4),
            7,
            max_opening=None,
            unit=True,
            green=2,
            min_age=10.0,
            flow=FlowRules(flow_tolerance=None),
        ),
        make_problem(
            8,
            grid_edges(2, 4),
            9,
            max_opening=30.0,
            green=1,
            flow=FlowRules(flow_tolerance=0.25, volume_min_m3=2000.0),
        ),
    ]


@pytest.mark.parametrize("soft", [False, True])
def test_local_search_plans_pass_independent_checker(soft: bool) -> None:
    from spatialplan.schedule.anneal import anneal
    from spatialplan.schedule.model import plan_npv, prepare

    for k, pr in enumerate(_local_cases()):
        prep = prepare(pr)
        best, _ = brute_force(pr)
        seen: list[np.ndarray] = []
        for seed in (1, 2):
            res = anneal(
                prep,
                prep.empty_plan(),  # every stand on its no-harvest prescription
                seed=seed,
                round_moves=8_000,
                patience=2,
                soft=soft,
                on_best=lambda per, v, out=seen: out.append(per.copy()),
            )
            assert rule_breaks(pr, res.period) == [], (k, seed)
            # The recorded NPV is the plan's NPV, and no legal plan beats the brute force.
            assert res.npv == pytest.approx(plan_npv(pr, res.prescription), rel=1e-9, abs=1e-6)
            assert res.npv <= best * (1 + 1e-9) + 1e-6
            assert res.npv >= 0.0  # started from the empty plan
            # (case 3: the empty plan breaks the volume floor; only legal plans are recorded)
        if not soft:  # the hard-opening search finds a positive plan on each of these
            assert seen
        for plan in seen:  # every intermediate best plan is legal too
            assert rule_breaks(pr, prep.first_period(plan)) == [], k


def _voronoi_problem(n: int, seed: int, periods: int = 5) -> PlanProblem:
    gdf = voronoi_forest(n, seed=seed)
    area = shapely.area(np.asarray(gdf.geometry.values)) / 10_000.0
    return make_problem(
        len(gdf),
        touch_edges(gdf),
        seed,
        area=area,
        age=gdf["age"].to_numpy(float),
        periods=periods,
        length=5.0,
        max_opening=40.0,
        green=2,
        flow=FlowRules(flow_tolerance=0.1),
    )


def test_local_search_is_deterministic_for_a_seed() -> None:
    from spatialplan.schedule.anneal import anneal
    from spatialplan.schedule.model import prepare

    pr = _voronoi_problem(80, 3)
    prep = prepare(pr)
    start = prep.empty_plan()
    a = anneal(prep, start, seed=11, round_moves=20_000, max_rounds=3)
    b = anneal(prep, start, seed=11, round_moves=20_000, max_rounds=3)
    c = anneal(prep, start, seed=12, round_moves=20_000, max_rounds=3)
    assert np.array_equal(a.period, b.period) and a.npv == b.npv
    assert a.npv > 0.0
    assert rule_breaks(pr, a.period) == [] and rule_breaks(pr, c.period) == []


def test_local_search_never_worsens_the_start() -> None:
    from spatialplan.schedule.anneal import anneal
    from spatialplan.schedule.bound import solve_lp
    from spatialplan.schedule.construct import greedy_plan
    from spatialplan.schedule.model import plan_npv, prepare

    pr = _voronoi_problem(120, 6)
    prep = prepare(pr)
    lp = solve_lp(pr, rows=prep.rows)
    start, info = greedy_plan(prep, lp.x, lp.price, float("inf"), order="balanced")
    assert info["legal"] and rule_breaks(pr, prep.first_period(start)) == []
    start_npv = plan_npv(pr, start)
    for seed in (1, 2, 3):
        # A cold search (tiny temperature, one short round) must still keep the start.
        for t0 in (1e-6, 0.5):
            res = anneal(
                prep, start, seed=seed, round_moves=5_000, max_rounds=1, t_start=t0, t_end=t0 / 10
            )
            assert res.npv >= start_npv - 1e-6 * abs(start_npv)
            assert rule_breaks(pr, res.period) == []
            assert res.npv <= lp.value * (1 + 1e-9)  # the aspatial LP bounds every plan


def test_solve_output_is_silent() -> None:
    # highspy 1.16 prints a banner to the C-level stdout on the first instance of a process
    # unless it is silenced; a fresh interpreter runs one small LP and must print nothing.
    code = (
        "import numpy as np\n"
        "from spatialplan.problem import FlowRules, PlanProblem\n"
        "from spatialplan.schedule import lp_bound\n"
        "n, P = 2, 2\n"
        "pr = PlanProblem(stand_ids=np.array(['a', 'b'], dtype=object),"
        " area_ha=np.ones(n), opening_area_ha=np.ones(n), age_start_yr=np.full(n, 50.0),"
        " eligible=np.ones((n, P), bool), volume_m3_ha=np.full((n, P), 100.0),"
        " npv_per_ha=np.full((n, P), 10.0), green_up_periods=np.ones(n, int),"
        " initially_open=np.zeros((n, P), bool), edges=np.array([[0, 1]]), periods=P,"
        " period_length_yr=5.0, flow=FlowRules(flow_tolerance=None))\n"
        "assert lp_bound(pr).status == 'optimal'\n"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120
    )
    assert out.stdout == ""
