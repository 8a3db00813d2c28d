"""The scheduler on the bundled demo forest with its own settings, strategy against strategy.

Usage::

    python bench/bench_demo_solve.py --strategies local windows --seeds 1 2 3 --time-limit 45

Reads ``demo_gis/brennick_plan.toml`` and its inputs once, builds the problem (terrain,
reserves, streams, price by diameter, 20 five-year periods with re-harvest, non-declining
flow under the sustained-yield cap, old forest, Faustmann ending value) and solves it with
each strategy and seed in turn in this one process. Prints one JSON line per run: NPV,
the best proven bound and its gap, NPV against that bound at 10/20/30/45 s (from the
progress reports), what the annealing and each kind of CP-SAT window gained, and the
float64 re-check (violations must be 0).
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def main(argv: list[str] | None = None) -> None:
    """Command-line entry of the benchmark."""
    from spatialplan.pipeline import build_problem, load_inputs
    from spatialplan.schedule import solve
    from spatialplan.schedule.model import check_plan, prepare
    from spatialplan.settings import SolverSettings, load_settings

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--strategies", nargs="+", default=["local", "windows"])
    ap.add_argument("--seeds", type=int, nargs="+", default=[1])
    ap.add_argument("--time-limit", type=float, default=45.0)
    ap.add_argument("--workers", type=int, default=8)
    ap.add_argument("--chart", type=Path, default=None, help="PNG of NPV and bound over time")
    a = ap.parse_args(argv)
    runs: list[tuple[str, int, list[tuple[float, float, float]]]] = []
    demo = ROOT / "demo_gis"
    s = load_settings(demo / "brennick_plan.toml")
    inputs = load_inputs(demo / "brennick_stands.gpkg", demo / "brennick_yields.csv", s)
    prob = build_problem(inputs).problem
    prep = prepare(prob)
    for strategy in a.strategies:
        for seed in a.seeds:
            hist: list[tuple[float, float, float]] = []

            def on(pr, hist=hist) -> None:
                hist.append((pr.elapsed_s, pr.best_npv, pr.bound))

            st = SolverSettings(time_limit_s=a.time_limit, workers=a.workers, seed=seed)
            res = solve(prob, st, on, _strategy=strategy)
            runs.append((strategy, seed, hist))
            bound = min(res.lp_bound, res.cover_bound or float("inf"))

            def at(t: float, hist=hist, bound=bound) -> float:
                v = [h[1] for h in hist if h[0] <= t]
                return round(max(v) / bound, 4) if v else float("nan")

            print(
                json.dumps(
                    {
                        "strategy": strategy,
                        "seed": seed,
                        "npv": round(res.npv),
                        "best_bound": round(bound),
                        "gap": round(res.gap, 4),
                        "ratio_at": {t: at(t) for t in (10, 20, 30, 45, 60, 120, 300)},
                        "solve_s": round(res.solve_time_s, 2),
                        "local_search": res.stats.get("local_search"),
                        "lns_kinds": res.stats.get("lns_kinds"),
                        "search_blocks": res.stats.get("search_blocks"),
                        "violations": len(check_plan(prep, res.prescription)),
                    },
                    default=str,
                ),
                flush=True,
            )
    if a.chart is not None:
        _chart(runs, a.chart, a.time_limit)


def _chart(runs: list, path: Path, limit: float) -> None:
    """NPV of each run and the best proven bound against seconds (step lines)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(8, 4.5))
    bound = min(min(h[2] for h in hist) for _, _, hist in runs if hist)
    for strategy, seed, hist in runs:
        if not hist:
            continue
        t = [h[0] for h in hist] + [limit]
        v = [h[1] / 1e6 for h in hist] + [hist[-1][1] / 1e6]
        ax.step(t, v, where="post", label=f"plan NPV, {strategy}, seed {seed}")
    ax.axhline(bound / 1e6, color="black", linestyle="--", label="best proven bound")
    ax.set_xlabel("seconds")
    ax.set_ylabel("million (currency units)")
    ax.set_xlim(0, limit)
    ax.set_title("Demo forest: plan NPV and best proven bound against solve time")
    ax.legend(fontsize=8, loc="center right")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


if __name__ == "__main__":
    main()
