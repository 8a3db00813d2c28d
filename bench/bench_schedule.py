"""Benchmark of the harvest scheduler on generated landscapes.

Usage::

    python bench/bench_schedule.py --sizes 500 2000 --seeds 1 2 --time-limit 120

Each landscape comes from :func:`spatialplan.synthetic.voronoi_forest` (Voronoi-like stands
averaging ~12 ha, clumped ages 1-120, 5 strata) with yields from
:func:`spatialplan.synthetic.synthetic_yield_table`; 10 five-year periods, 40 ha maximum
opening, 2-period green-up, +-10 % even flow, minimum age 40, r = 0.04, price 50 per m3.
The problem is built here directly (volume interpolated at mid-period age, value = volume x
price x (1 + r)^-((p - 0.5) L), edges where stands share more than 1 m of boundary).
Each result prints as one JSON line (ratio of NPV to the LP bound at 5, 15, 30, 60, 120 s
from the progress reports, model size, peak memory, what the local search did, the cover
LP bound against the aspatial one with its time, rounds and covers) and, with
``--json``, all results are written to a file.
"""

from __future__ import annotations

import argparse
import json
import resource
import sys
import time
from pathlib import Path

import numpy as np
import shapely

from spatialplan.problem import FlowRules, PlanProblem
from spatialplan.settings import SolverSettings
from spatialplan.synthetic import synthetic_yield_table, voronoi_forest

PERIODS = 10
LENGTH = 5.0
MAX_OPENING = 40.0
GREEN = 2
TOL = 0.10
MIN_AGE = 40.0
RATE = 0.04
PRICE = 50.0


def touching_edges(geoms: np.ndarray, min_shared_m: float = 1.0) -> np.ndarray:
    """Pairs ``i < j`` of polygons sharing more than ``min_shared_m`` of boundary."""
    tree = shapely.STRtree(geoms)
    a, b = tree.query(geoms, predicate="intersects")
    keep = a < b
    a, b = a[keep], b[keep]
    shared = shapely.length(
        shapely.intersection(shapely.boundary(geoms[a]), shapely.boundary(geoms[b]))
    )
    ok = shared > min_shared_m
    return np.column_stack([a[ok], b[ok]]).astype(np.int64)


def gapped_edges(geoms: np.ndarray, gap_m: float) -> tuple[np.ndarray, np.ndarray]:
    """Polygons shrunk by ``gap_m / 2`` (digitising gaps of ``gap_m`` between neighbours)
    and their edges from :func:`spatialplan.adjacency.build_adjacency` (0.5 m tolerance)."""
    from spatialplan.adjacency import build_adjacency

    shrunk = shapely.buffer(geoms, -gap_m / 2.0, join_style="mitre")
    adj = build_adjacency(shrunk, min_shared_edge_m=1.0, digitising_tolerance_m=0.5)
    return shrunk, np.asarray(adj.edges, dtype=np.int64)


def make_problem(n_stands: int, seed: int, gap_m: float = 0.0) -> PlanProblem:
    """The benchmark instance of about ``n_stands`` stands for ``seed``.

    ``gap_m > 0`` leaves digitising gaps of that width between neighbours (every polygon
    shrunk by half of it) and takes the edges from the tool's adjacency with its default
    0.5 m tolerance, so a planner's adjacency, not exact contact, decides the openings.
    """
    gdf = voronoi_forest(n_stands, seed=seed)
    yt = synthetic_yield_table()
    geoms = np.asarray(gdf.geometry.values)
    if gap_m > 0:
        geoms, edges = gapped_edges(geoms, gap_m)
    else:
        edges = touching_edges(geoms)
    area = shapely.area(geoms) / 10_000.0
    n = len(gdf)
    age0 = gdf["age"].to_numpy(float)
    strata = gdf["stratum"].to_numpy()
    t_mid = (np.arange(1, PERIODS + 1) - 0.5) * LENGTH
    age_mid = age0[:, None] + t_mid[None, :]
    vol = np.zeros((n, PERIODS))
    for s in np.unique(strata):
        tab = yt[yt["stratum"] == s]
        ages = np.concatenate([[0.0], tab["age"].to_numpy(float)])
        vols = np.concatenate([[0.0], tab["volume"].to_numpy(float)])
        m = strata == s
        vol[m] = np.interp(age_mid[m], ages, vols)
    disc = (1 + RATE) ** -t_mid
    npv = vol * PRICE * disc[None, :]
    eligible = age_mid >= MIN_AGE
    eligible_any = np.ones_like(eligible)
    green = np.full(n, GREEN)
    init_open = age_mid < GREEN * LENGTH
    t_end = PERIODS * LENGTH
    end_age = np.empty((n, PERIODS + 1))
    end_age[:, 0] = age0 + t_end
    end_age[:, 1:] = t_end - t_mid[None, :]
    end_vol = np.empty((n, PERIODS + 1))
    for s in np.unique(strata):
        tab = yt[yt["stratum"] == s]
        ages = np.concatenate([[0.0], tab["age"].to_numpy(float)])
        vols = np.concatenate([[0.0], tab["volume"].to_numpy(float)])
        m = strata == s
        end_vol[m] = np.interp(end_age[m], ages, vols)
    return PlanProblem(
        stand_ids=gdf["stand_id"].to_numpy(dtype=object),
        area_ha=area,
        opening_area_ha=area,
        age_start_yr=age0,
        eligible=eligible,
        volume_m3_ha=vol,
        npv_per_ha=npv,
        green_up_periods=green,
        initially_open=init_open,
        edges=edges,
        periods=PERIODS,
        period_length_yr=LENGTH,
        max_opening_ha=MAX_OPENING,
        flow=FlowRules(flow_tolerance=TOL),
        ending_volume_m3_ha=end_vol,
        ending_age_yr=end_age,
        eligible_no_min_age=eligible_any,
        min_age_yr=MIN_AGE,
    )


def peak_rss_mb() -> float:
    """Peak resident memory of this process (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def run_one(
    n: int,
    seed: int,
    time_limit: float,
    workers: int,
    strategy: str,
    trace: bool,
    gap_m: float = 0.0,
) -> dict:
    """Build and solve one instance; return the measurements."""
    from spatialplan.schedule import solve
    from spatialplan.schedule.model import check_plan, prepare

    t0 = time.perf_counter()
    prob = make_problem(n, seed, gap_m)
    t_build = time.perf_counter() - t0
    history: list[tuple[float, float, float]] = []

    def on_progress(pr) -> None:
        history.append((pr.elapsed_s, pr.best_npv, pr.bound))
        if trace:
            print(
                f"  {pr.elapsed_s:7.1f}s npv={pr.best_npv:,.0f} bound={pr.bound:,.0f} "
                f"gap={pr.gap:.4f}",
                file=sys.stderr,
            )

    settings = SolverSettings(time_limit_s=time_limit, workers=workers, seed=seed)
    res = solve(prob, settings, on_progress, _strategy=strategy)
    # The plan is a prescription per stand since the prescription model (period before).
    plan = getattr(res, "prescription", None)
    viol = check_plan(prepare(prob), res.period if plan is None else plan)
    ratio = res.npv / res.lp_bound if res.lp_bound else float("nan")

    def ratio_at(ts: float) -> float:
        best = 0.0
        for el, v, _ in history:
            if el <= ts:
                best = max(best, v)
        return best / res.lp_bound if res.lp_bound else float("nan")

    return {
        "stands": prob.n_stands,
        "seed": seed,
        "digitising_gap_m": gap_m,
        "edges": len(prob.edges),
        "time_limit_s": time_limit,
        "workers": workers,
        "strategy": strategy,
        "build_s": round(t_build, 1),
        "status": res.status,
        "npv": res.npv,
        "lp_bound": res.lp_bound,
        "cpsat_bound": res.cpsat_bound,
        "cover_bound": getattr(res, "cover_bound", None),
        # the cover LP against the aspatial LP, its time, rounds and covers
        "cover_vs_lp": (res.cover_bound / res.lp_bound)
        if getattr(res, "cover_bound", None) and res.lp_bound
        else None,
        "cover_lp": res.stats.get("cover_lp"),
        "ratio_lp": ratio,
        "gap": res.gap,
        "solve_s": res.solve_time_s,
        "violations": len(viol),
        "peak_rss_mb": round(peak_rss_mb()),
        "ratio_at": {t: ratio_at(t) for t in (5, 15, 30, 60, 120, 300, 600) if t <= time_limit},
        "local_search": res.stats.get("local_search"),
        # windows by kind: how many, NPV gained, seconds, final window size in variables
        "lns_kinds": res.stats.get("lns_kinds"),
        **{k: v for k, v in res.stats.items() if not isinstance(v, list | dict)},
        # every improvement: seconds, plan NPV, best proven bound (bench/chart_gap.py)
        "trace": [[round(t, 3), v, b] for t, v, b in history],
    }


def main(argv: list[str] | None = None) -> None:
    """Command-line entry of the benchmark."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[500, 2000])
    ap.add_argument("--seeds", type=int, nargs="+", default=[1])
    ap.add_argument("--time-limit", type=float, default=120.0)
    ap.add_argument("--workers", type=int, default=None)
    ap.add_argument("--strategy", default="auto")
    ap.add_argument("--trace", action="store_true")
    ap.add_argument("--json", type=Path, default=None)
    ap.add_argument(
        "--digitising-gap", type=float, default=0.0, help="gap between neighbours, metres"
    )
    a = ap.parse_args(argv)
    out = []
    workers = a.workers if a.workers is not None else SolverSettings().workers
    for n in a.sizes:
        for seed in a.seeds:
            r = run_one(n, seed, a.time_limit, workers, a.strategy, a.trace, a.digitising_gap)
            out.append(r)
            print(json.dumps(r, default=float), flush=True)
    if a.json:
        a.json.write_text(json.dumps(out, indent=1, default=float))


if __name__ == "__main__":
    main()
