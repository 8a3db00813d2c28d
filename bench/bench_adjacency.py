"""Benchmark: time to build the stand adjacency graph of generated layers.

Target (the project's own goal): the graph of a 50,000-stand layer in under 30 s on 2 cores.

Usage::

    python bench/bench_adjacency.py [--sizes 2000,10000,50000] [--seed 1] [--gappy]

``--gappy`` also times each layer with every stand shrunk by 0.2 m (0.4 m gaps), the case
where every pair needs the gap-tolerant measure. Prints one Markdown table row per run.
"""

from __future__ import annotations

import argparse
import platform
import resource
import time

import numpy as np

from spatialplan.adjacency import build_adjacency
from spatialplan.synthetic import voronoi_forest


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="2000,10000,50000")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--gappy", action="store_true")
    args = ap.parse_args()
    print(f"# {platform.processor() or platform.machine()}, Python {platform.python_version()}")
    print("| stands | layer | warnings | edges | mean degree | build s | peak RSS MB |")
    print("|---:|---|---:|---:|---:|---:|---:|")
    for n in (int(x) for x in args.sizes.split(",")):
        gdf = voronoi_forest(n, seed=args.seed)
        layers = [("clean", gdf.geometry)]
        if args.gappy:
            layers.append(("shrunk 0.2 m", gdf.geometry.buffer(-0.2)))
        for name, geom in layers:
            t0 = time.perf_counter()
            res = build_adjacency(geom, ids=gdf["stand_id"].tolist())
            dt = time.perf_counter() - t0
            deg = 2 * len(res.edges) / max(len(gdf), 1)
            print(
                f"| {len(gdf):,} | {name} | {len(res.warnings)} | {len(res.edges):,} "
                f"| {deg:.2f} | {dt:.1f} | {_peak_mb():,.0f} |"
            )
            assert np.all(res.edges[:, 0] < res.edges[:, 1])


if __name__ == "__main__":
    main()
