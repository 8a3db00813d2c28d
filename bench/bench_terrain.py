"""Benchmark of spatialplan.terrain: slope statistics for many stands over a large DEM.

Default case: 50,000 Voronoi stands over a 10,000 x 10,000 cell DEM, plus the
stream-buffer net area for the same stands. Inputs are generated once into ``--workdir``
(a smooth synthetic DEM written as a tiled float32 GeoTIFF, the stand layer and a stream
layer as GeoPackages) and reused on later runs. Each measured step runs in a fresh Python
process so that its peak resident memory (``ru_maxrss``) is its own.

Usage::

    python bench/bench_terrain.py                      # 50,000 stands, 10,000^2 DEM
    python bench/bench_terrain.py --stands 5000 --cells 2000   # quick run
"""

from __future__ import annotations

import argparse
import json
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np


def _rss_mb() -> float:
    # Linux reports ru_maxrss in KiB.
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def make_inputs(work: Path, n_stands: int, cells: int, seed: int = 1) -> dict:
    """Generate (or reuse) the stand layer, DEM and stream layer."""
    import geopandas as gpd
    import rasterio
    import shapely
    from affine import Affine

    from spatialplan.synthetic import voronoi_forest

    work.mkdir(parents=True, exist_ok=True)
    tag = f"{n_stands}_{cells}_{seed}"
    stands_path = work / f"stands_{tag}.gpkg"
    dem_path = work / f"dem_{tag}.tif"
    streams_path = work / f"streams_{tag}.gpkg"
    meta_path = work / f"meta_{tag}.json"
    if meta_path.exists() and stands_path.exists() and dem_path.exists() and streams_path.exists():
        return json.loads(meta_path.read_text())

    t0 = time.perf_counter()
    st = voronoi_forest(n_stands, seed=seed)
    st["area_ha"] = st.area / 10_000.0
    st.to_file(stands_path, layer="stands")
    x0, y0, x1, y1 = st.total_bounds
    side = max(x1 - x0, y1 - y0)
    cell = side / cells
    t_stands = time.perf_counter() - t0

    # Smooth terrain: a few long waves plus Gaussian hills, slopes mostly 0-120 %.
    t0 = time.perf_counter()
    rng = np.random.default_rng(seed)
    n_waves, n_hills = 6, 60
    kx = rng.uniform(-1, 1, n_waves) * 2 * np.pi / rng.uniform(3_000, 12_000, n_waves)
    ky = rng.uniform(-1, 1, n_waves) * 2 * np.pi / rng.uniform(3_000, 12_000, n_waves)
    amp = rng.uniform(50, 250, n_waves)
    ph = rng.uniform(0, 2 * np.pi, n_waves)
    hx = rng.uniform(0, side, n_hills)
    hy = rng.uniform(0, side, n_hills)
    hs = rng.uniform(300, 2_000, n_hills)
    ha = rng.uniform(50, 500, n_hills)
    transform = Affine(cell, 0.0, x0, 0.0, -cell, y0 + side)
    profile = {
        "driver": "GTiff",
        "height": cells,
        "width": cells,
        "count": 1,
        "dtype": "float32",
        "crs": st.crs.to_wkt(),
        "transform": transform,
        "nodata": -9999.0,
        "tiled": True,
        "blockxsize": 256,
        "blockysize": 256,
        "BIGTIFF": "IF_SAFER",
    }
    xs = (np.arange(cells) + 0.5) * cell
    step = 256
    with rasterio.open(dem_path, "w", **profile) as dst:
        for r0 in range(0, cells, step):
            r1 = min(cells, r0 + step)
            ys = side - (np.arange(r0, r1) + 0.5) * cell
            gx, gy = np.meshgrid(xs, ys)
            z = np.full(gx.shape, 500.0)
            for j in range(n_waves):
                z += amp[j] * np.sin(kx[j] * gx + ky[j] * gy + ph[j])
            for j in range(n_hills):
                d2 = (gx - hx[j]) ** 2 + (gy - hy[j]) ** 2
                z += ha[j] * np.exp(-d2 / (2 * hs[j] ** 2))
            dst.write(z.astype(np.float32)[None], window=((r0, r1), (0, cells)))
    t_dem = time.perf_counter() - t0

    # Streams: meandering lines across the extent (about one per 2.5 km of extent width).
    n_lines = max(2, int(side / 2_500))
    lines = []
    for _ in range(n_lines):
        t = np.linspace(0, 1, 400)
        a, b = rng.uniform(0, side, 2)
        xs_l = x0 + t * side
        ys_l = y0 + a + (b - a) * t + 300 * np.sin(t * rng.uniform(5, 40) + rng.uniform(0, 6))
        lines.append(shapely.LineString(np.column_stack([xs_l, ys_l])))
    cls = rng.choice(["small", "large"], size=n_lines, p=[0.7, 0.3]).tolist()
    gpd.GeoDataFrame({"stream_class": cls}, geometry=lines, crs=st.crs).to_file(streams_path)

    meta = {
        "stands_path": str(stands_path),
        "dem_path": str(dem_path),
        "streams_path": str(streams_path),
        "n_stands": len(st),
        "cells": cells,
        "cell_m": cell,
        "n_lines": n_lines,
        "make_stands_s": t_stands,
        "make_dem_s": t_dem,
        "dem_mb": dem_path.stat().st_size / 2**20,
    }
    meta_path.write_text(json.dumps(meta))
    return meta


def measure(step: str, meta: dict, block_rows: int) -> dict:
    """One measured step (run in its own process)."""
    import geopandas as gpd

    from spatialplan.settings import TerrainSettings
    from spatialplan.terrain import net_area, read_dem_slope, stand_terrain

    st = gpd.read_file(meta["stands_path"], layer="stands")
    base = _rss_mb()
    t0 = time.perf_counter()
    c0 = time.process_time()
    out: dict = {"step": step}
    if step == "stand_terrain":
        res = stand_terrain(st, TerrainSettings(), meta["dem_path"], block_rows=block_rows)
        df = res.stands
        out.update(
            block_rows=block_rows,
            mean_slope=float(df["slope_pct_mean"].mean()),
            systems=df["harvest_system"].value_counts().to_dict(),
            outside=int(df["outside_dem"].sum()),
            sampled=int(((df["n_cells"] == 0) & ~df["outside_dem"]).sum()),
            median_cells=float(df["n_cells"].median()),
        )
    elif step == "read_dem_slope":
        slope, *_ = read_dem_slope(meta["dem_path"], block_rows=block_rows)
        out.update(block_rows=block_rows, nan_share=float(np.isnan(slope).mean()))
    elif step == "net_area":
        ts = TerrainSettings(
            stream_buffer_field="stream_class",
            stream_buffer_by_class={"small": 10.0, "large": 30.0},
        )
        res = net_area(st, meta["streams_path"], ts)
        df = res.stands
        out.update(
            buffer_ha=float(df["buffer_area_ha"].sum()),
            touched=int((df["buffer_area_ha"] > 0).sum()),
            no_net=int(df["no_net_area"].sum()),
        )
    out["time_s"] = time.perf_counter() - t0
    out["cpu_s"] = time.process_time() - c0
    out["rss_before_mb"] = base
    out["peak_rss_mb"] = _rss_mb()
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--stands", type=int, default=50_000)
    ap.add_argument("--cells", type=int, default=10_000)
    ap.add_argument("--workdir", type=Path, default=Path("/tmp/spatialplan_bench_terrain"))
    ap.add_argument("--block-rows", type=int, nargs="+", default=[256, 1024])
    ap.add_argument("--skip-full", action="store_true", help="skip reading the whole slope grid")
    ap.add_argument("--_measure", help=argparse.SUPPRESS)
    ap.add_argument("--_meta", help=argparse.SUPPRESS)
    args = ap.parse_args()

    if args._measure:
        step, br = args._measure.split(":")
        print(json.dumps(measure(step, json.loads(args._meta), int(br))))
        return

    t0 = time.perf_counter()
    meta = make_inputs(args.workdir, args.stands, args.cells)
    print(f"inputs ready in {time.perf_counter() - t0:.1f} s: {json.dumps(meta)}", flush=True)
    steps = [f"stand_terrain:{b}" for b in args.block_rows]
    if not args.skip_full:
        steps.append(f"read_dem_slope:{args.block_rows[0]}")
    steps.append("net_area:0")
    results = []
    for s in steps:
        proc = subprocess.run(
            [sys.executable, __file__, "--_measure", s, "--_meta", json.dumps(meta)],
            check=True,
            capture_output=True,
            text=True,
        )
        r = json.loads(proc.stdout.strip().splitlines()[-1])
        results.append(r)
        print(json.dumps(r), flush=True)
    print()
    print(
        f"machine: {platform.processor() or platform.machine()}, python {platform.python_version()}"
    )
    print(
        f"{meta['n_stands']} stands, DEM {meta['cells']} x {meta['cells']} cells of "
        f"{meta['cell_m']:.2f} m ({meta['cells'] ** 2 / 1e6:.0f} M cells)"
    )
    print("| step | block rows | wall (s) | CPU (s) | peak RSS (MB) | RSS before (MB) |")
    print("|---|---|---|---|---|---|")
    for r in results:
        br = r.get("block_rows", "-")
        print(
            f"| {r['step']} | {br} | {r['time_s']:.1f} | {r['cpu_s']:.1f} | {r['peak_rss_mb']:.0f} | "
            f"{r['rss_before_mb']:.0f} |"
        )


if __name__ == "__main__":
    main()
