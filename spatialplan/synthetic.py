"""Generated landscapes for tests, benchmarks and the demo forest.

Stands are Voronoi cells of random points (areas roughly gamma-distributed around the
requested mean, as in many real stand maps), with attributes drawn from smooth random
fields so that neighbouring stands tend to be alike (ages clumped as after past harvests
and fires). Nothing here is real data.
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

__all__ = ["smooth_field", "synthetic_yield_table", "voronoi_forest"]


def smooth_field(
    xy: np.ndarray, rng: np.random.Generator, scale_m: float, n_bumps: int = 40
) -> np.ndarray:
    """A smooth random field at points ``xy`` (sum of Gaussian bumps), rescaled to [0, 1].

    Parameters
    ----------
    xy
        (n, 2) coordinates in metres.
    rng
        Random generator.
    scale_m
        Correlation length of the field.
    n_bumps
        Number of random bumps summed.

    Returns
    -------
    numpy.ndarray
        (n,) values in [0, 1].
    """
    lo = xy.min(axis=0)
    hi = xy.max(axis=0)
    centres = rng.uniform(lo - scale_m, hi + scale_m, size=(n_bumps, 2))
    weights = rng.normal(size=n_bumps)
    d2 = ((xy[:, None, :] - centres[None, :, :]) ** 2).sum(axis=2)
    f = (weights[None, :] * np.exp(-d2 / (2 * scale_m**2))).sum(axis=1)
    f = f + 0.15 * rng.normal(size=len(f)) * f.std()
    span = f.max() - f.min()
    return (f - f.min()) / span if span > 0 else np.zeros(len(f))


def voronoi_forest(
    n_stands: int,
    seed: int = 0,
    mean_area_ha: float = 12.0,
    crs: str = "EPSG:32610",
    origin: tuple[float, float] = (500_000.0, 5_200_000.0),
    n_strata: int = 5,
    max_age: int = 120,
    reserve_share: float = 0.0,
) -> gpd.GeoDataFrame:
    """A clumped random stand layer.

    Parameters
    ----------
    n_stands
        Approximate number of stands (exact unless clipping drops a cell).
    seed
        Seed of the random generator; the same seed gives the same layer.
    mean_area_ha
        Mean stand area.
    crs
        Projected CRS of the coordinates.
    origin
        Lower-left corner of the square extent.
    n_strata
        Number of strata (``stratum`` values ``S1`` .. ``Sn``).
    max_age
        Ages are 1 .. ``max_age`` years, clumped in space.
    reserve_share
        Share of stands flagged ``reserve`` (chosen along a random band, like a riparian strip).

    Returns
    -------
    geopandas.GeoDataFrame
        Columns ``stand_id`` (str), ``age`` (int), ``stratum`` (str), ``reserve`` (int 0/1),
        geometry.
    """
    rng = np.random.default_rng(seed)
    side = float(np.sqrt(n_stands * mean_area_ha * 10_000.0))
    x0, y0 = origin
    pts = rng.uniform(0, side, size=(n_stands, 2)) + np.array([x0, y0])
    # One Lloyd-style step evens out the smallest cells without making a grid.
    box = shapely.box(x0, y0, x0 + side, y0 + side)
    cells = _voronoi_cells(pts, box)
    cent = shapely.get_coordinates(shapely.centroid(cells))
    pts2 = pts + 0.5 * (cent - pts)
    cells = _voronoi_cells(pts2, box)
    cells = cells[(~shapely.is_empty(cells)) & (shapely.area(cells) > 1.0)]
    xy = shapely.get_coordinates(shapely.centroid(cells))
    n = len(cells)
    age_f = smooth_field(xy, rng, scale_m=side / 8)
    # Rank transform gives a near-uniform age distribution that is still clumped.
    ranks = np.argsort(np.argsort(age_f)) / max(n - 1, 1)
    age = np.clip(np.round(1 + ranks * (max_age - 1) + rng.normal(0, 4, n)), 1, max_age).astype(int)
    strat_f = smooth_field(xy, rng, scale_m=side / 5)
    sr = np.argsort(np.argsort(strat_f)) / max(n, 1)
    stratum = np.array([f"S{int(v * n_strata) + 1}" for v in sr])
    reserve = np.zeros(n, dtype=int)
    if reserve_share > 0:
        # A wavy band across the extent, like a stream corridor.
        yb = y0 + side * (0.5 + 0.15 * np.sin((xy[:, 0] - x0) / side * 2 * np.pi))
        dist = np.abs(xy[:, 1] - yb)
        k = max(1, round(reserve_share * n))
        reserve[np.argsort(dist)[:k]] = 1
    width = len(str(n))
    gdf = gpd.GeoDataFrame(
        {
            "stand_id": [f"T{i + 1:0{width}d}" for i in range(n)],
            "age": age,
            "stratum": stratum,
            "reserve": reserve,
        },
        geometry=cells,
        crs=crs,
    )
    return gdf


def _voronoi_cells(pts: np.ndarray, box: shapely.Polygon) -> np.ndarray:
    vor = shapely.voronoi_polygons(shapely.multipoints(pts), extend_to=box, ordered=True)
    cells = np.asarray(shapely.get_parts(vor))
    cells = shapely.intersection(cells, box)
    # Keep polygonal parts only; snap to a 1 cm grid so shared edges match exactly.
    cells = shapely.set_precision(cells, 0.01)
    return cells


def synthetic_yield_table(
    strata: list[str] | None = None, max_age: int = 150, step: int = 10
) -> pd.DataFrame:
    """A long-format yield table (stratum, age, volume, diameter) from Chapman-Richards curves.

    The curves are invented for testing: asymptotes 300-700 m3/ha, with a mean diameter
    that rises with age.
    """
    strata = strata or [f"S{i}" for i in range(1, 6)]
    rows = []
    for j, s in enumerate(strata):
        a = 300.0 + 100.0 * j
        k = 0.03 + 0.004 * j
        c = 2.5 + 0.2 * j
        for age in range(step, max_age + 1, step):
            vol = a * (1 - np.exp(-k * age)) ** c
            dia = 60.0 * (1 - np.exp(-0.02 * age)) ** 1.1
            rows.append(
                {"stratum": s, "age": age, "volume": round(vol, 1), "diameter": round(dia, 1)}
            )
    return pd.DataFrame(rows)
