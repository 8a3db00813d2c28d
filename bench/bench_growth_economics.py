"""Timing of the growth/economics stage on many stands (run by hand, not by pytest).

/work/venv/bin/python bench/bench_growth_economics.py [n_stands] [periods]
"""

from __future__ import annotations

import sys
import time

import numpy as np

from spatialplan.economics import harvest_values, rotation_table
from spatialplan.growth import build_growth_model, yield_table_from_frame
from spatialplan.settings import Economics, GrowthSettings, Horizon, PriceClass, Settings
from spatialplan.synthetic import synthetic_yield_table


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 100_000
    periods = int(sys.argv[2]) if len(sys.argv) > 2 else 20
    strata = [f"S{i}" for i in range(1, 21)]
    tab = yield_table_from_frame(synthetic_yield_table(strata), ["stratum"])
    g = build_growth_model(tab, GrowthSettings(), ["stratum"])
    rng = np.random.default_rng(0)
    lab = np.array(strata, dtype=object)[rng.integers(0, len(strata), n)]
    age = rng.uniform(1, 150, n)
    sched = (PriceClass("pulp", 0, 20), PriceClass("saw", 25, 60), PriceClass("big", 40, 90))
    s = Settings(
        horizon=Horizon(periods=periods, period_length_yr=5),
        economics=Economics(
            price_schedule=sched, harvest_cost_per_m3=9, regeneration_cost_per_ha=1200
        ),
    )
    t0 = time.perf_counter()
    hv = harvest_values(lab, age, g, s, harvest_cost_per_m3=rng.choice([9.0, 15.0], n))
    dt = time.perf_counter() - t0
    print(f"harvest_values n={n} P={periods}: {dt:.2f} s (npv shape {hv.npv_per_ha.shape})")
    t0 = time.perf_counter()
    rotation_table(g, strata, s)
    print(f"rotation_table 20 strata, ages 1..300: {time.perf_counter() - t0:.2f} s")


if __name__ == "__main__":
    main()
