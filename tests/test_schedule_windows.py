"""CP-SAT windows (stands outside fixed) against brute force over the window's stands.

The reference enumerates every combination of prescriptions of the free stands, the other
stands kept at the base plan, and checks each with the rule checker of
``tests/test_schedule_rx.py`` (written from the definitions, networkx components for the
openings). A window solved to optimality must find the best legal combination; every plan
the window search returns must pass the same checker.
"""

from __future__ import annotations

import dataclasses
import itertools
import time

import networkx as nx
import numpy as np
import pytest

from spatialplan.problem import FlowRules, PlanProblem
from spatialplan.schedule import solve
from spatialplan.schedule.cpsat import CoverPool, SubModel, make_scaling
from spatialplan.schedule.model import covers_from_roots, plan_npv, prepare, window_covers
from spatialplan.schedule.windows import (
    SearchCtx,
    WindowSearch,
    lazy_rounds,
    lns,
    seed_pair_covers,
)
from tests.graphs import grid_edges
from tests.test_schedule_rx import EXACT, harvest_periods, rule_breaks, rx_problem

AGES9 = np.array([62.0, 25.0, 85.0, 15.0, 71.0, 48.0, 90.0, 55.0, 33.0])


def _problem(seed: int, flow: FlowRules | None = None) -> PlanProblem:
    # 3 x 3 grid of stands, 6 periods of 10 years, re-harvest allowed, 22 ha openings.
    return rx_problem(grid_edges(3, 3), AGES9, seed, periods=6, flow=flow)


def _ctx(pr: PlanProblem, base: np.ndarray) -> SearchCtx:
    prep = prepare(pr)
    pool = CoverPool()
    seed_pair_covers(prep, pool)
    t0 = time.perf_counter()
    ctx = SearchCtx(
        prep=prep,
        scaling=make_scaling(prep),
        pool=pool,
        workers=2,
        seed=1,
        deadline=t0 + 60.0,
        t0=t0,
        lp_value=float("inf"),
    )
    ctx.best = np.asarray(base, dtype=np.int64).copy()
    ctx.best_npv = plan_npv(pr, ctx.best, prep.rx)
    return ctx


def _window_brute_force(
    pr: PlanProblem, base: np.ndarray, free: list[int], allowed: np.ndarray | None = None
) -> tuple[float, np.ndarray]:
    """Best legal plan changing only ``free`` stands (prescriptions in ``allowed``)."""
    rx = pr.prescriptions
    assert rx is not None
    choices = []
    for i in free:
        ks = range(int(rx.stand_start[i]), int(rx.stand_start[i + 1]))
        choices.append([k for k in ks if allowed is None or allowed[k]])
    best, best_plan = -np.inf, base
    for combo in itertools.product(*choices):
        plan = base.copy()
        plan[free] = combo
        v = float(sum(pr.area_ha[i] * rx.npv_per_ha[plan[i]] for i in range(pr.n_stands)))
        if v > best and not rule_breaks(pr, plan):
            best, best_plan = v, plan
    return best, best_plan


def _legal_base(pr: PlanProblem) -> np.ndarray:
    """A legal start: the no-harvest plan (no flow floor in these cases)."""
    rx = pr.prescriptions
    assert rx is not None
    base = np.array([rx.stand_start[i + 1] - 1 for i in range(pr.n_stands)], dtype=np.int64)
    # The no-harvest prescription is the one that cuts nothing.
    for i in range(pr.n_stands):
        for k in range(int(rx.stand_start[i]), int(rx.stand_start[i + 1])):
            if not harvest_periods(rx, k):
                base[i] = k
    assert rule_breaks(pr, base) == []
    return base


def _window_case(seed: int, free: list[int]) -> tuple[PlanProblem, np.ndarray, float]:
    """Problem, base plan and the brute-force best of a window freeing ``free``.

    Outside the window: the best whole-forest plan's neighbours are not what the window
    sees, so the others are fixed at a plan that cuts the old corner stands (constants
    that open ground next to the window).
    """
    pr = _problem(seed)
    base = _legal_base(pr)
    outside = [i for i in range(pr.n_stands) if i not in free]
    _, base = _window_brute_force(pr, base, outside[:3])
    want, _ = _window_brute_force(pr, base, free)
    return pr, base, want


@pytest.mark.parametrize(("seed", "free"), [(1, [0, 1, 3, 4]), (2, [2, 4, 5, 8]), (3, [1, 4, 7])])
def test_window_matches_brute_force_with_stands_fixed_outside(seed: int, free: list[int]) -> None:
    pr, base, want = _window_case(seed, free)
    ctx = _ctx(pr, base)
    assert want > ctx.best_npv  # the window has something to find
    sub = SubModel(ctx.prep, np.array(free), base, ctx.scaling)
    res = lazy_rounds(ctx, sub, 30.0, "test", first_slice_s=5.0, keep_all=8)
    assert res in ("optimal", "legal")
    assert ctx.best is not None
    assert rule_breaks(pr, ctx.best) == []
    assert np.array_equal(np.delete(ctx.best, free), np.delete(base, free))
    tol = ctx.scaling.total_error_bound + 1e-9 * abs(want)
    assert abs(ctx.best_npv - want) <= 2 * tol + 1e-6


def test_period_window_keeps_harvests_outside_its_periods() -> None:
    pr = _problem(4)
    base = _legal_base(pr)
    _, base = _window_brute_force(pr, base, [0, 2, 6])
    prep = prepare(pr)
    rx = prep.rx
    # Free periods 2-3 (0-based 1, 2): a stand keeps every harvest outside them.
    inside = np.uint64(0b110)
    hm = prep.harvest_mask
    allow = (hm & ~inside) == (hm[base[prep.stand_of]] & ~inside)
    free = [0, 1, 2, 3, 4, 5, 6]
    want, _ = _window_brute_force(pr, base, free, allow)
    ctx = _ctx(pr, base)
    assert want > ctx.best_npv
    sub = SubModel(prep, np.array(free), base, ctx.scaling, allow=allow)
    lazy_rounds(ctx, sub, 30.0, "test", first_slice_s=5.0, keep_all=8)
    assert ctx.best is not None and rule_breaks(pr, ctx.best) == []
    for i in free:  # harvests outside periods 2-3 unchanged (definition of the window)
        before = [q for q in harvest_periods(rx, int(base[i])) if q not in (2, 3)]
        after = [q for q in harvest_periods(rx, int(ctx.best[i])) if q not in (2, 3)]
        assert before == after
    tol = ctx.scaling.total_error_bound + 1e-9 * abs(want)
    assert abs(ctx.best_npv - want) <= 2 * tol + 1e-6


def test_window_search_keeps_flow_rows_and_never_loses_value() -> None:
    # +-20 % even flow couples the periods: a window may only move volume within the
    # rows' slack left by the fixed stands (checked from the definitions).
    pr = _problem(5, FlowRules(flow_tolerance=0.2))
    res = solve(pr, dataclasses.replace(EXACT, time_limit_s=10.0), _strategy="heuristic")
    assert res.prescription is not None
    ctx = _ctx(pr, res.prescription)
    start = ctx.best_npv
    ctx.deadline = time.perf_counter() + 8.0
    lns(ctx, target_vars=12.0, window_time_s=2.0)
    assert ctx.best is not None and rule_breaks(pr, ctx.best) == []
    assert ctx.best_npv >= start - 1e-6
    assert ctx.stats["lns_windows"] >= 2
    kinds = ctx.stats["lns_kinds"]
    assert {"ball", "opening", "two_balls", "scatter", "periods", "forest"} <= set(kinds)


@pytest.mark.parametrize(("seed", "free"), [(1, [0, 1, 3, 4]), (2, [2, 4, 5, 8]), (7, [3, 4, 5])])
def test_window_with_kept_cover_list_is_legal_at_once_and_matches_brute_force(
    seed: int, free: list[int]
) -> None:
    # The window search's own cover list (listed once over all stands, filtered to the
    # stands that can be open, turned into clauses with numpy) must make CP-SAT's first
    # answer legal (no lazy round) and equal to the best legal combination by brute force.
    pr, base, want = _window_case(seed, free)
    ctx = _ctx(pr, base)
    ctx.pool = CoverPool()  # no pair covers either: the list alone must do
    ws = WindowSearch(ctx)
    sub = SubModel(ctx.prep, np.array(free), base, ctx.scaling)
    ws._eager_covers(sub)
    assert ws.cache.cover_done[free].all()
    res = lazy_rounds(ctx, sub, 30.0, "test", first_slice_s=10.0)
    assert res == "optimal"
    assert ctx.stats.get("rounds", 0) == 0
    assert ctx.best is not None and rule_breaks(pr, ctx.best) == []
    tol = ctx.scaling.total_error_bound + 1e-9 * abs(want)
    assert abs(ctx.best_npv - want) <= 2 * tol + 1e-6


def test_cover_lists_split_over_calls_equal_one_listing() -> None:
    # Listing the stands in two calls (the second skipping the stands the first finished)
    # must give the same sets, each once, as one listing of all stands (checked against
    # the networkx reference in the test above).
    rng = np.random.default_rng(4)
    age = rng.uniform(10.0, 100.0, 12)
    pr = rx_problem(grid_edges(3, 4), age, 4, periods=4, max_opening=30.0)
    prep = prepare(pr)
    take = np.ones(12, dtype=bool)
    whole, done_all = covers_from_roots(prep, np.arange(12), take)
    assert done_all.size == 12 and whole
    done = np.zeros(12, dtype=bool)
    first, fin = covers_from_roots(prep, np.array([0, 5, 7, 11]), take, done=done)
    done[fin] = True
    second, _ = covers_from_roots(prep, np.arange(12), take, done=done)
    assert len(first) + len(second) == len(set(first) | set(second))
    assert set(first) | set(second) == set(whole)


def test_windows_strategy_returns_a_legal_plan_under_the_bounds() -> None:
    pr = _problem(6, FlowRules(flow_tolerance=0.3))
    res = solve(pr, dataclasses.replace(EXACT, time_limit_s=8.0), _strategy="windows")
    assert res.prescription is not None
    assert rule_breaks(pr, res.prescription) == []
    assert res.npv <= res.lp_bound + 1e-6 * abs(res.lp_bound)
    assert res.stats["strategy"] == "windows"
    # The annealing's first run, then blocks of annealing or windows (the method's order).
    blocks = res.stats["search_blocks"]
    assert blocks[0][0] == "local"
    assert {m for m, _, _ in blocks} <= {"local", "windows"}


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_window_covers_are_every_minimal_oversize_connected_set(seed: int) -> None:
    # Reference: every subset of the 3 x 4 grid's stands, connectivity by networkx, kept
    # when it is over-size, holds a free stand, uses only free or sometime-open stands,
    # and no proper connected subset is over-size (definition of a minimal cover).
    rng = np.random.default_rng(seed)
    age = rng.uniform(10.0, 100.0, 12)
    pr = rx_problem(grid_edges(3, 4), age, seed, periods=4, max_opening=30.0)
    prep = prepare(pr)
    free = np.sort(rng.choice(12, 5, replace=False))
    open_any = rng.random(12) < 0.5
    got, complete = window_covers(prep, free, open_any)
    assert complete
    g = nx.Graph([tuple(e) for e in np.asarray(pr.edges).tolist()])
    take = open_any.copy()
    take[free] = True
    area = pr.opening_area_ha
    mx = float(pr.max_opening_ha or 0.0)

    def over(s: tuple[int, ...]) -> bool:
        return bool(area[list(s)].sum() > mx) and nx.is_connected(g.subgraph(s))

    want = set()
    for r in range(1, 13):
        for s in itertools.combinations(range(12), r):
            if not all(take[i] for i in s) or not set(s) & set(free.tolist()) or not over(s):
                continue
            if any(over(t) for q in range(1, r) for t in itertools.combinations(s, q)):
                continue
            want.add(frozenset(s))
    assert want  # the case has covers to find
    assert set(got) == want
    assert len(got) == len(set(got))  # each listed once
