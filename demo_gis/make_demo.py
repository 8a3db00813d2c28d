"""Generate the bundled demo forest: Brennick Hollow Forest.

Brennick Hollow is an invented forest in the invented Calder Uplands; nothing here describes
a real place. The script is deterministic (fixed seed) and writes, beside itself:

* ``brennick_stands.gpkg``   stand layer (layer ``stands``), UTM zone 10N (EPSG:32610)
* ``brennick_yields.csv``    yield tables by species group and site class
* ``brennick_dem.tif``       synthetic 10 m elevation model over the same extent
* ``brennick_streams.gpkg``  stream lines (layer ``streams``) with a ``stream_class`` field

Run ``python demo_gis/make_demo.py`` to regenerate them.
"""

from __future__ import annotations

import sys
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import rasterio
import shapely
from rasterio.transform import from_origin

from spatialplan.synthetic import smooth_field, voronoi_forest

HERE = Path(__file__).resolve().parent
SEED = 20261201
CRS = "EPSG:32610"
N_STANDS = 660
ORIGIN = (612_000.0, 5_431_000.0)

# Invented growth curves: Chapman-Richards volume A(1-exp(-k t))^c (m3/ha) and
# mean diameter D(1-exp(-kd t))^cd (cm) by species group and site class.
CURVES = {
    ("FIR", "I"): (820.0, 0.032, 3.0, 62.0, 0.022),
    ("FIR", "II"): (680.0, 0.028, 3.0, 55.0, 0.020),
    ("FIR", "III"): (520.0, 0.024, 2.9, 48.0, 0.018),
    ("PINE", "II"): (520.0, 0.030, 2.6, 46.0, 0.021),
    ("PINE", "III"): (400.0, 0.026, 2.5, 40.0, 0.019),
    ("HWD", "I"): (560.0, 0.040, 2.4, 44.0, 0.026),
    ("HWD", "II"): (450.0, 0.036, 2.3, 38.0, 0.024),
}


def stream_y(x: np.ndarray, side: float) -> np.ndarray:
    """The main stream's valley line (same band the reserve strip follows)."""
    x0, y0 = ORIGIN
    return y0 + side * (0.5 + 0.15 * np.sin((x - x0) / side * 2 * np.pi))


def main() -> None:
    rng = np.random.default_rng(SEED)
    stands = voronoi_forest(
        N_STANDS,
        seed=SEED,
        mean_area_ha=12.0,
        crs=CRS,
        origin=ORIGIN,
        n_strata=7,
        max_age=140,
        reserve_share=0.035,
    )
    side = float(np.sqrt(N_STANDS * 12.0 * 10_000.0))
    xy = shapely.get_coordinates(stands.geometry.centroid)
    # Species follow a broad pattern; site class follows a finer, independent one.
    sp_f = smooth_field(xy, rng, scale_m=side / 4)
    site_f = smooth_field(xy, rng, scale_m=side / 6)
    species = np.where(sp_f < 0.42, "FIR", np.where(sp_f < 0.70, "PINE", "HWD"))
    site = np.where(site_f < 0.35, "I", np.where(site_f < 0.7, "II", "III"))
    site = np.where((species == "PINE") & (site == "I"), "II", site)
    site = np.where((species == "HWD") & (site == "III"), "II", site)
    names = ["Alder Bench", "Corrie Flat", "Wren Slope", "Otter Run", "Mossgate", "Highfold"]
    blocks = np.array(names)[
        np.floor(shapely.get_coordinates(stands.geometry.centroid)[:, 0] - ORIGIN[0]).astype(int)
        * len(names)
        // int(side)
        % len(names)
    ]
    out = gpd.GeoDataFrame(
        {
            "stand_no": [f"BH-{i + 1:04d}" for i in range(len(stands))],
            "age_yr": stands["age"].to_numpy(),
            "species": species,
            "site": site,
            "riparian": stands["reserve"].to_numpy(),
            "block": blocks,
        },
        geometry=stands.geometry.values,
        crs=CRS,
    )
    out.to_file(HERE / "brennick_stands.gpkg", layer="stands", driver="GPKG")

    rows = []
    for (sp, st), (a, k, c, dmax, kd) in CURVES.items():
        for age in range(10, 181, 10):
            vol = a * (1 - np.exp(-k * age)) ** c
            dia = dmax * (1 - np.exp(-kd * age)) ** 1.2
            rows.append(
                {
                    "species": sp,
                    "site": st,
                    "age": age,
                    "volume": round(vol, 1),
                    "diameter": round(dia, 1),
                }
            )
    pd.DataFrame(rows).to_csv(HERE / "brennick_yields.csv", index=False)

    # DEM: a valley along the stream, rising hillsides, a steep escarpment and bumps.
    cell = 10.0
    ncol = nrow = int(np.ceil(side / cell)) + 2
    x = ORIGIN[0] - cell + (np.arange(ncol) + 0.5) * cell
    y = ORIGIN[1] + side + cell - (np.arange(nrow) + 0.5) * cell
    X, Y = np.meshgrid(x, y)
    d = np.abs(Y - stream_y(X, side))
    z = 300.0 + 0.15 * d + 0.00002 * d**2
    # Escarpment in the north-east: a band with slopes of ~90 %.
    ex = (X - ORIGIN[0]) / side
    ey = (Y - ORIGIN[1]) / side
    z += 140.0 * (1 + np.tanh((ex + ey - 1.45) / 0.022))
    g = np.random.default_rng(SEED + 1)
    for _ in range(25):
        cx, cy = g.uniform(ORIGIN[0], ORIGIN[0] + side), g.uniform(ORIGIN[1], ORIGIN[1] + side)
        h, r = g.uniform(15, 60), g.uniform(300, 800)
        z += h * np.exp(-((X - cx) ** 2 + (Y - cy) ** 2) / (2 * r**2))
    profile = {
        "driver": "GTiff",
        "height": nrow,
        "width": ncol,
        "count": 1,
        "dtype": "float32",
        "crs": CRS,
        "transform": from_origin(ORIGIN[0] - cell, ORIGIN[1] + side + cell, cell, cell),
        "nodata": -9999.0,
        "compress": "deflate",
        "tiled": True,
        "blockxsize": 256,
        "blockysize": 256,
    }
    with rasterio.open(HERE / "brennick_dem.tif", "w", **profile) as dst:
        dst.write(z.astype("float32"), 1)

    # Streams: the main stream and two tributaries running down the hillsides.
    xs = np.linspace(ORIGIN[0] - 50, ORIGIN[0] + side + 50, 200)
    main_line = shapely.LineString(np.c_[xs, stream_y(xs, side)])
    tribs = []
    for fx, up in ((0.3, 1), (0.7, -1)):
        x_t = ORIGIN[0] + fx * side
        y_s = float(stream_y(np.array([x_t]), side)[0])
        ys = np.linspace(y_s, y_s + up * 0.3 * side, 40)
        xw = x_t + 60 * np.sin(np.linspace(0, 3 * np.pi, 40))
        tribs.append(shapely.LineString(np.c_[xw, ys]))
    streams = gpd.GeoDataFrame(
        {
            "stream_name": ["Brennick Water", "Tarn Gill", "Fernside Burn"],
            "stream_class": ["main", "minor", "minor"],
        },
        geometry=[main_line, *tribs],
        crs=CRS,
    )
    streams.to_file(HERE / "brennick_streams.gpkg", layer="streams", driver="GPKG")
    print(
        f"wrote {len(out)} stands, {len(rows)} yield rows, DEM {nrow}x{ncol}, {len(streams)} streams",
        file=sys.stderr,
    )


if __name__ == "__main__":
    main()
