"""The cover LP bound: Model I with the opening rule as cover inequalities.

Checked against brute force (every combination of prescriptions, plain code in
tests/test_schedule_rx.py) and against the aspatial LP: the cover bound lies between the
spatial optimum and the aspatial LP bound, and falls strictly below the aspatial LP where
the opening rule binds.
"""

from __future__ import annotations

import dataclasses

import networkx as nx
import numpy as np
import pytest
import shapely

from spatialplan.problem import FlowRules
from spatialplan.schedule import best_bound, best_bound_method, lp_bound, proven_bounds, solve
from spatialplan.schedule.bound import cover_lp_bound, separate_covers
from spatialplan.schedule.model import prepare
from spatialplan.settings import SolverSettings
from spatialplan.synthetic import voronoi_forest
from tests.graphs import grid_edges, touch_edges
from tests.test_schedule_rx import AGES6, brute_force, rx_problem

REL = 1e-7  # LP optimality tolerance, relative (HiGHS default 1e-7 on the objective)


def _cases():
    yield "grid seed 1", rx_problem(grid_edges(2, 3), AGES6, 1, flow=FlowRules(flow_tolerance=0.7))
    yield "grid seed 2", rx_problem(grid_edges(2, 3), AGES6, 2, flow=FlowRules(flow_tolerance=0.7))
    gdf = voronoi_forest(7, seed=4, mean_area_ha=10.0)
    area = shapely.area(np.asarray(gdf.geometry.values)) / 10_000.0
    age = np.array([70.0, 22.0, 90.0, 35.0, 12.0, 55.0, 28.0])[: len(gdf)]
    yield "voronoi", rx_problem(touch_edges(gdf), age, 5, area=area, max_opening=20.0)
    yield "unit", rx_problem(grid_edges(2, 3), AGES6, 7, max_opening=None, unit=True, green=1)
    yield "initially open", rx_problem(grid_edges(2, 3), AGES6, 3, green=3, max_opening=25.0)


def _old_grid():
    """A 3 x 3 grid of old 15 ha stands under a 40 ha maximum opening: any three
    connected harvested stands (45 ha) make an over-size opening, so the rule binds."""
    return rx_problem(
        grid_edges(3, 3),
        np.full(9, 80.0),
        1,
        area=np.full(9, 15.0),
        max_opening=40.0,
        periods=3,
        max_harvests=1,
    )


@pytest.mark.parametrize(("name", "pr"), list(_cases()), ids=[c[0] for c in _cases()])
def test_cover_bound_lies_between_optimum_and_aspatial_lp(name: str, pr) -> None:
    best, plan, _ = brute_force(pr)  # brute force over every combination (plain code)
    assert plan is not None
    lp = lp_bound(pr).value
    res = cover_lp_bound(prepare(pr), time_limit_s=30.0)
    assert res.status == "optimal"
    assert res.value >= best - REL * abs(best)  # a relaxation: never below the optimum
    assert res.value <= lp + REL * abs(lp)  # rows were only added
    if pr.max_opening_ha is None or (pr.opening_area_ha <= pr.max_opening_ha).all():
        # no stand too big to cut: the first LP is the aspatial LP
        assert res.lp_value == pytest.approx(lp, rel=1e-6)


def test_cover_bound_is_strictly_tighter_where_openings_bind() -> None:
    pr = _old_grid()
    best, plan, _ = brute_force(pr)
    assert plan is not None
    lp = lp_bound(pr).value
    res = cover_lp_bound(prepare(pr), time_limit_s=30.0)
    assert res.covers > 0 and res.rounds > 1
    assert best - REL * best <= res.value < 0.95 * lp
    # Without a maximum opening the same landscape has nothing to separate.
    free = dataclasses.replace(pr, max_opening_ha=None)
    res0 = cover_lp_bound(prepare(free), time_limit_s=30.0)
    assert res0.covers == 0
    assert res0.value == pytest.approx(lp_bound(free).value, rel=1e-6)


def test_separated_covers_are_minimal_connected_oversize_sets() -> None:
    pr = _old_grid()
    prep = prepare(pr)
    # Every stand half open in period 1: any three connected stands have closedness
    # 1.5 > 1, so nothing is broken; 0.9 open: three stands have closedness 0.3 < 1.
    g = nx.Graph(list(map(tuple, grid_edges(3, 3))))
    for level, expect in ((0.5, False), (0.9, True)):
        o = np.zeros((9, pr.periods))
        o[:, 0] = level
        found = separate_covers(prep, o, 0)
        assert bool(found) == expect
        for s in found:
            area = pr.opening_area_ha[s].sum()
            assert area > 40.0 and nx.is_connected(g.subgraph(s))  # networkx
            # minimal: dropping any stand leaves it not over-size or not connected
            for i in s:
                rest = [j for j in s if j != i]
                assert pr.opening_area_ha[rest].sum() <= 40.0 or not nx.is_connected(
                    g.subgraph(rest)
                )
            assert o[s, 0].sum() > len(s) - 1


def test_solve_reports_the_cover_bound_and_uses_it() -> None:
    pr = _old_grid()
    best, _, _ = brute_force(pr)
    # No CP-SAT bound needed for the point: a short heuristic run.
    res = solve(pr, SolverSettings(time_limit_s=20.0, workers=1, seed=1), _strategy="heuristic")
    assert res.cover_bound is not None
    assert best - REL * best <= res.cover_bound < res.lp_bound
    assert proven_bounds(res)["LP with opening covers (HiGHS)"] == res.cover_bound
    assert best_bound(res) == pytest.approx(max(res.npv, res.cover_bound))
    assert best_bound_method(res) == "LP with opening covers (HiGHS)"
    assert res.gap == pytest.approx((res.cover_bound - res.npv) / res.cover_bound)
    assert res.stats["cover_lp"]["covers"] > 0
