"""How far the plans are from the optimum, on landscapes small enough to prove it.

Usage::

    python bench/bench_optimum.py --sizes 100 200 --seeds 1 2 3 --reference-limit 600 \\
        --time-limit 20

The landscapes, yields and rules are those of ``bench_schedule.py`` (clumped ages, 10
five-year periods, 40 ha openings, 2-period green-up, +-10 % even flow, minimum age 40),
only smaller. For each one:

- *reference*: :func:`spatialplan.schedule.solve` with the ``"full"`` strategy (annealing,
  then CP-SAT on the whole model with every opening clause) for ``--reference-limit``
  seconds: its plan and CP-SAT's proven bound bracket the optimum (equal when proven);
- *default*: the same solve with the automatic strategy and ``--time-limit`` seconds, as a
  planner runs it.

Each result prints as one JSON line: the aspatial LP bound, the cover LP bound, CP-SAT's
bound, the reference plan, the default plan, and the ratios between them. The ratio
"reference / aspatial LP" (with its CP-SAT bound above it) is what the opening rule costs
any plan on such a landscape; "default / reference" is what the search leaves.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_schedule import make_problem

from spatialplan.schedule import solve
from spatialplan.schedule.model import check_plan, prepare
from spatialplan.settings import SolverSettings


def run_one(n: int, seed: int, ref_limit: float, time_limit: float, workers: int) -> dict:
    """Reference and default solve of one landscape; the bounds and ratios."""
    prob = make_problem(n, seed)
    prep = prepare(prob)
    t0 = time.perf_counter()
    ref = solve(
        prob,
        SolverSettings(time_limit_s=ref_limit, workers=workers, seed=seed, stop_gap=0.0),
        _strategy="full",
    )
    ref_s = time.perf_counter() - t0
    dflt = solve(prob, SolverSettings(time_limit_s=time_limit, workers=workers, seed=seed))
    lp = ref.lp_bound
    bounds = [b for b in (lp, ref.cover_bound, ref.cpsat_bound, dflt.cover_bound) if b]
    best_bound = min(bounds)
    return {
        "stands": prob.n_stands,
        "seed": seed,
        "prescriptions": int(prep.n_vars),
        "lp_bound": lp,
        "cover_bound": ref.cover_bound,
        "cpsat_bound": ref.cpsat_bound,
        "reference_npv": ref.npv,
        "reference_status": ref.status,
        "reference_s": round(ref_s, 1),
        "default_npv": dflt.npv,
        "default_s": round(dflt.solve_time_s, 1),
        "violations": len(check_plan(prep, ref.prescription))
        + len(check_plan(prep, dflt.prescription)),
        "reference_vs_lp": ref.npv / lp,
        "best_bound_vs_lp": best_bound / lp,
        "default_vs_lp": dflt.npv / lp,
        "default_vs_reference": dflt.npv / ref.npv,
        "default_gap_to_best_bound": (best_bound - dflt.npv) / best_bound,
    }


def main(argv: list[str] | None = None) -> None:
    """Command-line entry of the benchmark."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[100, 200])
    ap.add_argument("--seeds", type=int, nargs="+", default=[1, 2, 3])
    ap.add_argument("--reference-limit", type=float, default=600.0)
    ap.add_argument("--time-limit", type=float, default=20.0)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--json", type=Path, default=None)
    a = ap.parse_args(argv)
    out = []
    for n in a.sizes:
        for seed in a.seeds:
            r = run_one(n, seed, a.reference_limit, a.time_limit, a.workers)
            out.append(r)
            print(json.dumps(r, default=float), flush=True)
    if a.json is not None:
        a.json.write_text(json.dumps(out, indent=2, default=float))


if __name__ == "__main__":
    main()
