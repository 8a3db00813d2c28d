"""Generated landscapes for tests, benchmarks and the demo forest.

Stands are Voronoi cells of random points (areas roughly gamma-distributed around the
requested mean, as in many real stand maps), with attributes drawn from smooth random
fields so that neighbouring stands tend to be alike (ages clumped as after past harvests
and fires). Nothing here is real data.
"""

from __future__ import annotations

from collections.abc import Callable

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from spatialplan.problem import Prescriptions

__all__ = ["smooth_field", "synthetic_prescriptions", "synthetic_yield_table", "voronoi_forest"]


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


def _sequences(periods: int, gap: int, max_harvests: int) -> list[tuple[int, ...]]:
    """Harvest-period sequences ``q1 < q2 < ...`` with ``q_{j+1} - q_j >= gap``, sorted."""
    out: list[tuple[int, ...]] = []

    def grow(seq: tuple[int, ...]) -> None:
        out.append(seq)
        if len(seq) < max_harvests:
            for q in range(seq[-1] + gap, periods + 1):
                grow((*seq, q))

    if max_harvests > 0:
        for q in range(1, periods + 1):
            grow((q,))
    return sorted(out)


def synthetic_prescriptions(
    age_start: np.ndarray,
    volume_fn: Callable[[np.ndarray, np.ndarray], np.ndarray],
    periods: int,
    period_length_yr: float,
    min_age_yr: float,
    max_harvests: int,
    rate: float,
    price: float,
    old_forest_age_yr: float | None = None,
    harvestable: np.ndarray | None = None,
) -> Prescriptions:
    """Every clear-cut sequence over the horizon whose harvests all meet a minimum age.

    Harvests happen at mid-period ``t = (p - 0.5) L``. The first harvest of stand ``i`` in
    ``p`` needs ``age_start[i] + t >= min_age_yr``; the crop regenerates at once, so a
    harvest in ``p`` after one in ``q`` finds age ``(p - q) L``, which must meet the minimum
    too. Value of a harvest: ``volume x price x (1 + rate)^-t``; no costs, no ending value.
    For tests, benchmarks and the demo only (the pipeline builds prescriptions from yield
    tables and economics).

    Parameters
    ----------
    age_start
        (n,) ages at the start.
    volume_fn
        ``volume_fn(stand, age)`` -> volume per ha, vectorised over equal-length arrays
        of stand positions and ages.
    periods, period_length_yr
        Horizon.
    min_age_yr
        Minimum age at every harvest.
    max_harvests
        Most harvests per prescription (1 gives the single-harvest model).
    rate, price
        Discount rate and price per m3.
    old_forest_age_yr
        Age from which a stand counts as old forest (fills ``old_mask``).
    harvestable
        (n,) bool; stands marked False get only the no-harvest prescription.

    Examples
    --------
    >>> rx = synthetic_prescriptions(np.array([30.0]), lambda i, a: 2.0 * a, 4, 10.0,
    ...                              min_age_yr=20.0, max_harvests=2, rate=0.0, price=1.0)
    >>> [rx.periods_of(k).tolist() for k in range(rx.n_prescriptions)]
    [[], [1], [1, 3], [1, 4], [2], [2, 4], [3], [4]]
    >>> rx.harvest_volume_m3_ha[rx.harvest_start[2]:rx.harvest_start[3]].tolist()
    [70.0, 40.0]
    """
    age0 = np.asarray(age_start, dtype=np.float64)
    n, P, L = len(age0), int(periods), float(period_length_yr)
    gap = max(1, int(np.ceil(min_age_yr / L - 1e-9)))
    seqs = _sequences(P, gap, max_harvests)
    first = np.array([q[0] for q in seqs], dtype=np.int64)
    lens = np.array([len(q) for q in seqs], dtype=np.int64)
    flat = np.array([p for q in seqs for p in q], dtype=np.int64)
    s_off = np.concatenate([[0], np.cumsum(lens)])
    # First eligible period of each stand: sequences are sorted by their first period.
    mid = (np.arange(1, P + 1) - 0.5) * L
    ok = age0[:, None] + mid[None, :] >= min_age_yr - 1e-9
    q_min = np.where(ok.any(axis=1), ok.argmax(axis=1) + 1, P + 1)
    if harvestable is not None:
        q_min = np.where(np.asarray(harvestable, dtype=bool), q_min, P + 1)
    s_from = np.searchsorted(first, q_min)
    count = 1 + len(seqs) - s_from
    stand_start = np.concatenate([[0], np.cumsum(count)]).astype(np.int64)
    K = int(stand_start[-1])
    stand = np.repeat(np.arange(n), count)
    seq = np.full(K, -1, dtype=np.int64)
    slot = np.ones(K, dtype=bool)
    slot[stand_start[:-1]] = False
    seq[slot] = np.concatenate([np.arange(a, len(seqs)) for a in s_from])
    nh = np.where(seq >= 0, lens[np.maximum(seq, 0)], 0)
    harvest_start = np.concatenate([[0], np.cumsum(nh)]).astype(np.int64)
    owner = np.repeat(np.arange(K), nh)
    within = np.arange(len(owner)) - harvest_start[owner]
    hp = flat[s_off[seq[owner]] + within]
    prev = np.where(within > 0, np.roll(hp, 1), 0)
    h_stand = stand[owner]
    age = np.where(within > 0, (hp - prev) * L, age0[h_stand] + (hp - 0.5) * L)
    vol = np.asarray(volume_fn(h_stand, age), dtype=np.float64)
    h_npv = vol * price * (1.0 + rate) ** -((hp - 0.5) * L)
    last = np.zeros(K, dtype=np.int64)
    last[owner] = hp  # harvests are in period order: the last write is the last harvest
    end_age = np.where(last > 0, (P - last + 0.5) * L, age0[stand] + P * L)
    one = np.uint64(1)
    bits = np.left_shift(one, (hp - 1).astype(np.uint64))
    mask = np.zeros(K, dtype=np.uint64)
    np.bitwise_or.at(mask, owner, bits)
    old = np.zeros(K, dtype=np.uint64)
    if old_forest_age_yr is not None:
        mark = np.zeros((K, P), dtype=np.int16)
        mark[owner, hp - 1] = hp
        lastq = np.maximum.accumulate(mark, axis=1)  # last harvest at or before p
        cols = np.arange(1, P + 1)[None, :]
        age_p = np.where(lastq > 0, (cols - lastq) * L, age0[stand][:, None] + mid[None, :])
        weights = np.left_shift(one, np.arange(P, dtype=np.uint64))
        is_old = age_p >= old_forest_age_yr - 1e-9
        old = (is_old.astype(np.uint64) * weights[None, :]).sum(axis=1, dtype=np.uint64)
    return Prescriptions(
        stand_start=stand_start,
        harvest_start=harvest_start,
        harvest_period=hp.astype(np.int16),
        harvest_volume_m3_ha=vol,
        harvest_npv_per_ha=h_npv,
        npv_per_ha=np.bincount(owner, weights=h_npv, minlength=K),
        ending_value_per_ha=np.zeros(K),
        harvest_mask=mask,
        old_mask=old,
        ending_volume_m3_ha=np.asarray(volume_fn(stand, end_age), dtype=np.float64),
        ending_age_yr=end_age,
    )
