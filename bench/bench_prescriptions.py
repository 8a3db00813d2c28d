"""Build time and memory of the prescriptions (run by hand, not by pytest).

/work/venv/bin/python bench/bench_prescriptions.py [n_stands] [periods] [min_age_yr]

Defaults: 2,000 stands, 20 periods of 5 years, minimum age 40 (a re-harvest every 8
periods at most: about 100 prescriptions per stand), 20 tabulated strata with a diameter
price schedule, per-stand harvest costs, the Faustmann ending value and the old-forest mask.
"""

from __future__ import annotations

import sys
import time
import tracemalloc

import numpy as np

from spatialplan.growth import build_growth_model, yield_table_from_frame
from spatialplan.prescriptions import build_prescriptions
from spatialplan.rules import eligible_matrix
from spatialplan.settings import Economics, GrowthSettings, Horizon, PriceClass, Rules, Settings
from spatialplan.synthetic import synthetic_yield_table


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 2_000
    periods = int(sys.argv[2]) if len(sys.argv) > 2 else 20
    min_age = float(sys.argv[3]) if len(sys.argv) > 3 else 40.0
    L = 5.0
    strata = [f"S{i}" for i in range(1, 21)]
    tab = yield_table_from_frame(synthetic_yield_table(strata), ["stratum"])
    g = build_growth_model(tab, GrowthSettings(), ["stratum"])
    rng = np.random.default_rng(0)
    lab = np.array(strata, dtype=object)[rng.integers(0, len(strata), n)]
    age = rng.integers(0, 150, n).astype(float)
    reserve = rng.random(n) < 0.05
    hc = rng.choice([9.0, 15.0], n)
    sched = (PriceClass("pulp", 0, 20), PriceClass("saw", 25, 60), PriceClass("big", 40, 90))
    s = Settings(
        horizon=Horizon(periods=periods, period_length_yr=L),
        rules=Rules(min_age_yr=min_age, old_forest_age_yr=80.0, old_forest_min_share=0.2),
        economics=Economics(
            price_schedule=sched, harvest_cost_per_m3=9, regeneration_cost_per_ha=1200
        ),
    )
    el = eligible_matrix(age, reserve, min_age, periods, L)
    op = eligible_matrix(age, reserve, 0.0, periods, L)
    build_prescriptions(lab[:10], age[:10], el[:10], g, s, hc[:10], op[:10])  # warm up
    t0 = time.perf_counter()
    rx = build_prescriptions(lab, age, el, g, s, hc, op)
    dt = time.perf_counter() - t0
    tracemalloc.start()
    rx = build_prescriptions(lab, age, el, g, s, hc, op)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    K, H = rx.n_prescriptions, len(rx.harvest_period)
    held = sum(np.asarray(getattr(rx, f)).nbytes for f in rx.__dataclass_fields__)
    print(
        f"build_prescriptions n={n} P={periods} L={L:g} min_age={min_age:g}: {dt:.2f} s; "
        f"K={K:,} ({K / n:.1f} per stand), H={H:,}; result {held / K:.0f} B per prescription, "
        f"peak traced {peak / K:.0f} B per prescription"
    )


if __name__ == "__main__":
    main()
