"""Benchmark of the scheduler on the long-horizon estate model (Model I with re-harvest).

Usage::

    python bench/bench_estate.py --stands 2000 --seeds 1 --time-limit 300 --workers 2
    python bench/bench_estate.py --periods 10 --max-harvests 1   # the single-harvest case

Landscapes as in ``bench_schedule.py`` (:func:`spatialplan.synthetic.voronoi_forest`,
yields from :func:`spatialplan.synthetic.synthetic_yield_table`, edges where stands share
more than 1 m of boundary). Defaults: 20 periods of 5 years, every sequence of clear-cuts
whose harvests all meet the minimum age of 40 (the regenerated crop is ``(p - q) L`` old at
mid-period ``p`` after a cut in ``q``), 40 ha maximum opening, 2-period green-up, +-10 %
even flow, r = 0.04, price 50 per m3, no ending value. Prescriptions come from
:func:`spatialplan.synthetic.synthetic_prescriptions`.

Each result prints as one JSON line: prescriptions, LP bound and its time, the ratio of the
best NPV to the LP bound at 30, 60, 120, 300 s from the progress reports, status, peak
memory, what the local search did; ``--json`` writes them all to a file.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np
import shapely

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_schedule import peak_rss_mb, touching_edges

from spatialplan.problem import FlowRules, PlanProblem
from spatialplan.settings import SolverSettings
from spatialplan.synthetic import (
    synthetic_prescriptions,
    synthetic_yield_table,
    voronoi_forest,
)

LENGTH = 5.0
MAX_OPENING = 40.0
GREEN = 2
TOL = 0.10
MIN_AGE = 40.0
RATE = 0.04
PRICE = 50.0


def make_estate_problem(n_stands: int, seed: int, periods: int, max_harvests: int) -> PlanProblem:
    """The benchmark instance: about ``n_stands`` stands, prescriptions over ``periods``."""
    gdf = voronoi_forest(n_stands, seed=seed)
    yt = synthetic_yield_table()
    geoms = np.asarray(gdf.geometry.values)
    area = shapely.area(geoms) / 10_000.0
    n = len(gdf)
    age0 = gdf["age"].to_numpy(float)
    strata = gdf["stratum"].to_numpy()
    tables = {}
    for s in np.unique(strata):
        tab = yt[yt["stratum"] == s]
        tables[s] = (
            np.concatenate([[0.0], tab["age"].to_numpy(float)]),
            np.concatenate([[0.0], tab["volume"].to_numpy(float)]),
        )

    def volume(i: np.ndarray, age: np.ndarray) -> np.ndarray:
        out = np.zeros(len(i))
        st = strata[i]
        for s, (ages, vols) in tables.items():
            m = st == s
            out[m] = np.interp(age[m], ages, vols)
        return out

    rx = synthetic_prescriptions(age0, volume, periods, LENGTH, MIN_AGE, max_harvests, RATE, PRICE)
    t_mid = (np.arange(1, periods + 1) - 0.5) * LENGTH
    age_mid = age0[:, None] + t_mid[None, :]
    vol = volume(np.repeat(np.arange(n), periods), age_mid.ravel()).reshape(n, periods)
    return PlanProblem(
        stand_ids=gdf["stand_id"].to_numpy(dtype=object),
        area_ha=area,
        opening_area_ha=area,
        age_start_yr=age0,
        eligible=age_mid >= MIN_AGE,  # first harvests (the scheduler reads rx)
        volume_m3_ha=vol,
        npv_per_ha=vol * PRICE * (1 + RATE) ** -t_mid[None, :],
        green_up_periods=np.full(n, GREEN),
        initially_open=age_mid < GREEN * LENGTH,
        edges=touching_edges(geoms),
        periods=periods,
        period_length_yr=LENGTH,
        max_opening_ha=MAX_OPENING,
        flow=FlowRules(flow_tolerance=TOL),
        prescriptions=rx,
    )


def run_one(
    n: int,
    seed: int,
    periods: int,
    max_harvests: int,
    time_limit: float,
    workers: int,
    strategy: str = "auto",
) -> dict:
    """Build and solve one instance; return the measurements."""
    from spatialplan.schedule import solve
    from spatialplan.schedule.model import check_plan, prepare

    t0 = time.perf_counter()
    prob = make_estate_problem(n, seed, periods, max_harvests)
    t_build = time.perf_counter() - t0
    rx = prob.prescriptions
    assert rx is not None
    rss_model = peak_rss_mb()
    history: list[tuple[float, float, float]] = []

    def on_progress(pr) -> None:
        history.append((pr.elapsed_s, pr.best_npv, pr.bound))

    settings = SolverSettings(time_limit_s=time_limit, workers=workers, seed=seed)
    res = solve(prob, settings, on_progress, _strategy=strategy)
    viol = check_plan(prepare(prob), res.prescription)
    stand, _, _ = res.harvests(prob)
    cuts = np.bincount(stand, minlength=prob.n_stands)

    def ratio_at(ts: float) -> float:
        best = max((v for el, v, _ in history if el <= ts), default=0.0)
        return best / res.lp_bound if res.lp_bound else float("nan")

    return {
        "stands": prob.n_stands,
        "seed": seed,
        "periods": periods,
        "max_harvests": max_harvests,
        "prescriptions": rx.n_prescriptions,
        "harvests": len(rx.harvest_period),
        "time_limit_s": time_limit,
        "workers": workers,
        "strategy": res.stats.get("strategy"),
        "build_s": round(t_build, 1),
        "status": res.status,
        "npv": res.npv,
        "lp_bound": res.lp_bound,
        "ratio_lp": res.npv / res.lp_bound if res.lp_bound else float("nan"),
        "solve_s": res.solve_time_s,
        "violations": len(viol),
        "stands_cut_twice_or_more": int((cuts >= 2).sum()),
        "harvests_in_plan": len(stand),
        "peak_rss_mb_after_build": round(rss_model),
        "peak_rss_mb": round(peak_rss_mb()),
        "ratio_at": {t: ratio_at(t) for t in (5, 30, 60, 120, 300, 600) if t <= time_limit},
        "local_search": res.stats.get("local_search"),
        # every improvement: seconds, plan NPV, best proven bound (bench/chart_gap.py)
        "trace": [[round(t, 3), v, b] for t, v, b in history],
        **{k: v for k, v in res.stats.items() if not isinstance(v, list | dict)},
    }


def main(argv: list[str] | None = None) -> None:
    """Command-line entry of the benchmark."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--stands", type=int, nargs="+", default=[2000])
    ap.add_argument("--seeds", type=int, nargs="+", default=[1])
    ap.add_argument("--periods", type=int, default=20)
    ap.add_argument("--max-harvests", type=int, default=20)
    ap.add_argument("--time-limit", type=float, default=300.0)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--strategy", default="auto")
    ap.add_argument("--json", type=Path, default=None)
    a = ap.parse_args(argv)
    out = []
    for n in a.stands:
        for seed in a.seeds:
            r = run_one(n, seed, a.periods, a.max_harvests, a.time_limit, a.workers, a.strategy)
            out.append(r)
            print(json.dumps(r, default=float), flush=True)
    if a.json:
        a.json.write_text(json.dumps(out, indent=1, default=float))


if __name__ == "__main__":
    main()
