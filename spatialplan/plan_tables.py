"""Summary tables of a plan: the harvest events, openings, and figures by period and stratum.

Plain data in, frames out: the schedule frame (one row per stand), the ``harvests`` table
(one row per harvest) or, for a plan that harvests each stand at most once, the schedule's
integer ``period`` column, arrays from the planning problem and the settings.

Openness follows ``docs/architecture.md``: a stand harvested in period ``q`` is open in
periods ``q .. q + G - 1``, after every one of its harvests; a stand young at the start is
open where ``initially_open`` says so. An *opening* is a connected group (over the adjacency
edges) of stands open in the same period.
"""

from __future__ import annotations

from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from spatialplan._review import harvest_events as _review_harvest_events
from spatialplan._review import period_array, setting

__all__ = ["harvest_events", "open_matrix", "opening_table", "period_table", "strata_table"]


# ---------------------------------------------------------------------------------------
# openings
# ---------------------------------------------------------------------------------------
def harvest_events(
    schedule: pd.DataFrame, harvests: pd.DataFrame | None = None, id_col: str = "stand_id"
) -> tuple[np.ndarray, np.ndarray]:
    """Every harvest of a plan as ``(stand position, period)`` arrays.

    From the ``harvests`` table when given (its ``id_col`` matched to the schedule's),
    else from the schedule's ``harvest_periods`` or ``period`` column; the same reading the
    review files use.

    Raises
    ------
    OutputError
        The harvests table names a stand the schedule lacks.

    Examples
    --------
    >>> sched = pd.DataFrame({"stand_id": ["a", "b", "c"], "period": [2, None, 1]})
    >>> [x.tolist() for x in harvest_events(sched)]
    [[0, 2], [2, 1]]
    >>> h = pd.DataFrame({"stand_id": ["a", "a", "c"], "period": [2, 7, 1]})
    >>> [x.tolist() for x in harvest_events(sched, h)]
    [[0, 0, 2], [2, 7, 1]]
    """
    ev = _review_harvest_events(schedule, harvests, id_col)
    return ev["pos"].to_numpy(dtype=np.int64), ev["period"].to_numpy(dtype=np.int64)


def open_matrix(
    period: np.ndarray,
    periods: int,
    green_up_periods: np.ndarray,
    initially_open: np.ndarray | None,
    stand: np.ndarray | None = None,
) -> np.ndarray:
    """(n, P) bool: stand open in period ``p`` (column ``p - 1``).

    Harvested in ``q`` -> open in ``q .. q + G - 1`` (after every harvest); or open
    because young at the start. ``period`` is the (n,) harvest period per stand (0 =
    none), or with ``stand`` the periods of harvest events of those stand positions
    (``n`` is then the length of ``green_up_periods`` or ``initially_open``).

    >>> open_matrix(np.array([1, 4]), 5, 2, None, stand=np.array([0, 0])).astype(int).tolist()
    [[1, 1, 0, 1, 1]]
    """
    per = np.asarray(period, dtype=np.int64)
    if stand is None:
        n = len(per)
        stand = np.arange(n)
    elif initially_open is not None:
        n = np.shape(initially_open)[0]
    else:
        n = max(int(np.size(green_up_periods)), int(np.max(stand, initial=-1)) + 1)
    st = np.asarray(stand, dtype=np.int64)
    g = np.broadcast_to(np.asarray(green_up_periods, dtype=np.int64), (n,))
    out = np.zeros((n, periods), dtype=bool)
    p = np.arange(1, periods + 1)[None, :]
    cut = per > 0
    q, i = per[cut][:, None], st[cut]
    span = (p >= q) & (p <= q + g[i][:, None] - 1)
    rows, cols = np.nonzero(span)
    out[i[rows], cols] = True
    if initially_open is not None:
        out |= np.asarray(initially_open, dtype=bool).reshape(n, periods)
    return out


def opening_table(
    schedule: gpd.GeoDataFrame,
    edges: np.ndarray,
    periods: int,
    green_up_periods: np.ndarray,
    initially_open: np.ndarray,
    max_opening_ha: float | None,
    opening_area_ha: np.ndarray,
    id_col: str = "stand_id",
    harvests: pd.DataFrame | None = None,
) -> tuple[gpd.GeoDataFrame, np.ndarray]:
    """Openings of every period, dissolved, and the opening of each stand's first harvest.

    Parameters
    ----------
    schedule
        Stands by position ``0 .. n-1`` with ``id_col``, geometry and, without
        ``harvests``, an integer ``period`` column (0 or null = not harvested).
    edges
        (m, 2) adjacent stand positions.
    periods
        Number of planning periods ``P``.
    green_up_periods
        (n,) or scalar green-up delay in periods.
    initially_open
        (n, P) bool: open because young at the start.
    max_opening_ha
        The area limit recorded beside each opening (``None`` = no limit, stored as NaN).
    opening_area_ha
        (n,) area each stand counts toward opening size (gross).
    id_col
        Stand id column.
    harvests
        The ``harvests`` table (``id_col``, ``period``): every harvest opens its stand
        for ``G`` periods. Default: the schedule's ``period`` column.

    Returns
    -------
    openings : geopandas.GeoDataFrame
        One row per opening per period: ``opening_id`` (``"P03-0007"``), ``period``,
        ``gross_area_ha``, ``stand_count``, ``new_harvest_gross_ha`` (area harvested in
        that very period), ``max_opening_ha`` (the limit), ``stand_ids``
        (comma-separated), geometry (in the schedule's CRS).
    stand_opening : numpy.ndarray
        (n,) text: the opening a stand belongs to in its first harvest's period, ``""``
        when not harvested.
    """
    n = len(schedule)
    stand, per = harvest_events(schedule, harvests, id_col)
    area = np.asarray(opening_area_ha, dtype=float).reshape(n)
    init = (
        np.zeros((n, periods), dtype=bool)
        if initially_open is None
        else np.asarray(initially_open, dtype=bool).reshape(n, periods)
    )
    is_open = open_matrix(per, periods, green_up_periods, init, stand=stand)
    cut_in = np.zeros((n, periods + 2), dtype=bool)  # stand harvested in that period
    cut_in[stand, np.clip(per, 0, periods + 1)] = True
    first = np.zeros(n, dtype=np.int64)
    order = np.lexsort((per, stand))
    s_sorted, p_sorted = stand[order], per[order]
    head = np.ones(len(order), dtype=bool)
    head[1:] = s_sorted[1:] != s_sorted[:-1]
    first[s_sorted[head]] = p_sorted[head]
    e = np.asarray(edges, dtype=np.int64).reshape(-1, 2)
    ids = schedule[id_col].astype(str).to_numpy()
    geoms = np.asarray(schedule.geometry.values)
    width = max(2, len(str(periods)))
    limit = np.nan if max_opening_ha is None else float(max_opening_ha)

    rows: list[dict[str, Any]] = []
    out_geoms: list[Any] = []
    stand_opening = np.full(n, "", dtype=object)
    for p in range(1, periods + 1):
        op = is_open[:, p - 1]
        if not op.any():
            continue
        keep = op[e[:, 0]] & op[e[:, 1]] if len(e) else np.zeros(0, dtype=bool)
        sub = e[keep]
        graph = coo_matrix((np.ones(len(sub)), (sub[:, 0], sub[:, 1])), shape=(n, n))
        _, lab = connected_components(graph, directed=False)
        members = np.flatnonzero(op)
        labs = lab[members]
        # Number openings by their first stand position so ids are stable across runs.
        uniq, first_at = np.unique(labs, return_index=True)
        rank = np.argsort(members[first_at])
        seq = np.empty(len(uniq), dtype=np.int64)
        seq[rank] = np.arange(1, len(uniq) + 1)
        seq_of = seq[np.searchsorted(uniq, labs)]
        swidth = max(4, len(str(len(uniq))))
        for k in range(1, len(uniq) + 1):
            idx = members[seq_of == k]
            oid = f"P{p:0{width}d}-{k:0{swidth}d}"
            newly = idx[cut_in[idx, p]]
            stand_opening[newly[first[newly] == p]] = oid
            rows.append(
                {
                    "opening_id": oid,
                    "period": p,
                    "gross_area_ha": float(area[idx].sum()),
                    "stand_count": len(idx),
                    "new_harvest_gross_ha": float(area[newly].sum()),
                    "max_opening_ha": limit,
                    "stand_ids": ",".join(ids[idx]),
                }
            )
            out_geoms.append(shapely.union_all(geoms[idx]))
    cols = ["opening_id", "period", "gross_area_ha", "stand_count", "new_harvest_gross_ha",
            "max_opening_ha", "stand_ids"]  # fmt: skip
    frame = pd.DataFrame(rows, columns=cols)
    frame["period"] = frame["period"].astype(np.int64)
    frame["stand_count"] = frame["stand_count"].astype(np.int64)
    g = np.asarray(out_geoms, dtype=object)
    # One geometry type per layer: polygons become multipolygons where any group is split.
    if len(g) and (shapely.get_type_id(g) == 6).any():
        single = shapely.get_type_id(g) == 3
        g[single] = shapely.multipolygons([[x] for x in g[single]]) if single.any() else g[single]
    openings = gpd.GeoDataFrame(frame, geometry=gpd.GeoSeries(g, crs=schedule.crs),
                                crs=schedule.crs)  # fmt: skip
    return openings, stand_opening.astype(str)


# ---------------------------------------------------------------------------------------
# tables
# ---------------------------------------------------------------------------------------
def _area_column(frame: pd.DataFrame, area_col: str | None) -> str:
    if area_col is not None:
        return area_col
    return "net_area_ha" if "net_area_ha" in frame.columns else "area_ha"


def _col(frame: pd.DataFrame, *names: str) -> np.ndarray:
    """The first of ``names`` that ``frame`` has, as floats (NaN when it has none)."""
    for name in names:
        if name in frame.columns:
            return pd.to_numeric(frame[name], errors="coerce").to_numpy(dtype=float)
    return np.full(len(frame), np.nan)


def _harvest_npv(schedule: pd.DataFrame) -> np.ndarray:
    """Discounted value of the (single) harvest of each stand from the schedule alone.

    ``npv`` less ``ending_value_npv`` (the stand's share of the plan NPV holds its ending
    value too); ``value`` in plans written before the estate model.
    """
    if "npv" in schedule.columns:
        return np.nan_to_num(_col(schedule, "npv")) - np.nan_to_num(
            _col(schedule, "ending_value_npv")
        )
    return np.nan_to_num(_col(schedule, "value"))


def _event_figures(
    schedule: pd.DataFrame, harvests: pd.DataFrame | None, id_col: str, area_col: str | None
) -> dict[str, np.ndarray]:
    """Stand, period, net area, volume, values and age of every harvest."""
    stand, per = harvest_events(schedule, harvests, id_col)
    area = np.nan_to_num(_col(schedule, _area_column(schedule, area_col)))[stand]
    if harvests is None:
        figures = {
            "volume": np.nan_to_num(_col(schedule, "volume_m3")),
            "npv": _harvest_npv(schedule),
            "gross": _col(schedule, "gross_value"),
            "age": _col(schedule, "age_at_harvest_yr", "age_at_harvest"),
        }
        figures = {k: v[stand] for k, v in figures.items()}
    else:
        keep = period_array(harvests["period"]) > 0
        h = harvests[keep]
        figures = {
            "volume": np.nan_to_num(_col(h, "volume_m3")),
            "npv": np.nan_to_num(_col(h, "npv")),
            "gross": _col(h, "gross_value"),
            "age": _col(h, "age_at_harvest_yr", "age_at_harvest"),
        }
    return {"stand": stand, "period": per, "area": area, **figures}


def period_table(
    schedule: pd.DataFrame,
    settings: Any,
    openings: pd.DataFrame | None = None,
    *,
    area_col: str | None = None,
    harvests: pd.DataFrame | None = None,
    id_col: str = "stand_id",
    standing_volume_m3: np.ndarray | None = None,
    old_forest_share: np.ndarray | None = None,
) -> pd.DataFrame:
    """Per-period summary of a plan; every harvest counts in its period.

    Parameters
    ----------
    schedule
        Stand frame with ``net_area_ha`` (or ``area_ha``) and ``id_col``; without
        ``harvests`` also ``period`` (0/null = not harvested), ``volume_m3``, ``npv`` and
        ``ending_value_npv`` (or ``value``), optionally ``gross_value`` and
        ``age_at_harvest_yr`` of the one harvest of each stand.
    settings
        :class:`spatialplan.settings.Settings` (or the same tree as nested dicts): reads
        ``horizon`` (periods, length, start year), the flow rules and
        ``rules.max_opening_ha``.
    openings
        Frame from :func:`opening_table` (for the largest opening per period).
    area_col
        Harvested-area column (default ``net_area_ha`` when present, else ``area_ha``).
    harvests
        The ``harvests`` table (``id_col``, ``period``, ``volume_m3``, ``gross_value``,
        ``npv``, ``age_at_harvest_yr``), one row per harvest.
    id_col
        Stand id column of ``schedule`` and ``harvests``.
    standing_volume_m3, old_forest_share
        (P,) standing volume and old-forest share of the gross area at mid-period (the
        pipeline computes them from the growth model); NaN when not given.

    Returns
    -------
    pandas.DataFrame
        One row per period ``1 .. P``: ``period``, ``start_year``, ``end_year``,
        ``mid_year`` (calendar years: ``start_year = horizon.start_year + (p - 1) L``),
        ``harvest_net_area_ha``, ``harvest_volume_m3``, ``gross_value`` (undiscounted,
        before costs), ``npv`` (discounted net value of the period's harvests),
        ``mean_age_at_harvest_yr`` (area weighted), ``stands_harvested`` (harvests in the
        period), ``opening_count``, ``largest_opening_ha`` (gross, largest opening holding
        a harvest of the period), ``largest_other_opening_ha`` (largest opening with no
        harvest of the period: young stands from before the plan or earlier cuts),
        ``max_opening_ha`` (the limit), ``flow_lower_m3``, ``flow_upper_m3`` (volume
        bounds that applied to this period given the previous period's harvest, the
        tolerance, non-declining flow and the per-period targets; NaN = unbounded),
        ``flow_ok``, ``area_lower_ha``, ``area_upper_ha``, ``old_forest_share``,
        ``standing_volume_m3``.
    """
    P = int(setting(settings, "horizon.periods", 10))
    L = float(setting(settings, "horizon.period_length_yr", 5.0))
    year0 = float(setting(settings, "horizon.start_year", 0))
    tol = setting(settings, "rules.flow_tolerance")
    non_declining = bool(setting(settings, "rules.non_declining", False))
    vmin = setting(settings, "rules.period_volume_min_m3")
    vmax = setting(settings, "rules.period_volume_max_m3")
    amin = setting(settings, "rules.period_area_min_ha")
    amax = setting(settings, "rules.period_area_max_ha")
    limit = setting(settings, "rules.max_opening_ha")

    ev = _event_figures(schedule, harvests, id_col, area_col)
    idx = np.clip(ev["period"], 0, P)  # bincount slot 0 collects periods out of range

    def by_period(x: np.ndarray) -> np.ndarray:
        return np.bincount(idx, weights=x, minlength=P + 1)[1:]

    area, age, gross = ev["area"], ev["age"], ev["gross"]
    h_area = by_period(area)
    h_vol = by_period(ev["volume"])
    disc = by_period(ev["npv"])
    gross_p = by_period(np.nan_to_num(gross)) if np.isfinite(gross).any() else np.full(P, np.nan)
    ok_age = np.isfinite(age)
    age_w = np.bincount(idx[ok_age], weights=(age * area)[ok_age], minlength=P + 1)[1:]
    age_a = np.bincount(idx[ok_age], weights=area[ok_age], minlength=P + 1)[1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_age = np.where(age_a > 0, age_w / age_a, np.nan)
    count = np.bincount(idx, minlength=P + 1)[1:]

    # The rule judges openings that hold a harvest of the period; openings of stands that
    # were young before the plan (or cut earlier) are reported apart so a pre-existing
    # large young patch does not read as a breach of the plan.
    largest = np.zeros(P)
    largest_other = np.zeros(P)
    n_open = np.zeros(P, dtype=np.int64)
    if openings is not None and len(openings):
        op = openings["period"].to_numpy(dtype=np.int64)
        oa = _col(openings, "gross_area_ha", "area_ha")
        new_ha = _col(openings, "new_harvest_gross_ha", "new_harvest_ha")
        new = np.where(np.isnan(new_ha), 1.0, new_ha) > 0
        ok = (op >= 1) & (op <= P)
        np.maximum.at(largest, op[ok & new] - 1, oa[ok & new])
        np.maximum.at(largest_other, op[ok & ~new] - 1, oa[ok & ~new])
        n_open = np.bincount(op[ok] - 1, minlength=P)[:P]

    lower = np.full(P, np.nan)
    upper = np.full(P, np.nan)
    for j in range(P):
        lo, hi = -np.inf, np.inf
        if j > 0:
            prev = h_vol[j - 1]
            if tol is not None:
                lo, hi = (1.0 - tol) * prev, (1.0 + tol) * prev
            if non_declining:
                lo = max(lo, prev)
        if vmin is not None:
            lo = max(lo, float(vmin))
        if vmax is not None:
            hi = min(hi, float(vmax))
        lower[j] = lo if np.isfinite(lo) else np.nan
        upper[j] = hi if np.isfinite(hi) else np.nan
    # Solvers work on scaled integers: allow a relative slack of 1e-6 when judging.
    slack = 1e-6 * np.maximum(1.0, h_vol)
    flow_ok = (np.isnan(lower) | (h_vol >= lower - slack)) & (
        np.isnan(upper) | (h_vol <= upper + slack)
    )

    def per_period(x: np.ndarray | None) -> np.ndarray:
        return np.full(P, np.nan) if x is None else np.asarray(x, dtype=float).reshape(P)

    start = year0 + np.arange(P) * L
    return pd.DataFrame(
        {
            "period": np.arange(1, P + 1, dtype=np.int64),
            "start_year": start,
            "end_year": start + L,
            "mid_year": start + 0.5 * L,
            "harvest_net_area_ha": h_area,
            "harvest_volume_m3": h_vol,
            "gross_value": gross_p,
            "npv": disc,
            "mean_age_at_harvest_yr": mean_age,
            "stands_harvested": count.astype(np.int64),
            "opening_count": n_open.astype(np.int64),
            "largest_opening_ha": largest,
            "largest_other_opening_ha": largest_other,
            "max_opening_ha": np.full(P, np.nan if limit is None else float(limit)),
            "flow_lower_m3": lower,
            "flow_upper_m3": upper,
            "flow_ok": flow_ok,
            "area_lower_ha": np.full(P, np.nan if amin is None else float(amin)),
            "area_upper_ha": np.full(P, np.nan if amax is None else float(amax)),
            "old_forest_share": per_period(old_forest_share),
            "standing_volume_m3": per_period(standing_volume_m3),
        }
    )


def strata_table(
    schedule: pd.DataFrame,
    settings: Any,
    *,
    area_col: str | None = None,
    stratum_col: str = "stratum",
    harvests: pd.DataFrame | None = None,
    id_col: str = "stand_id",
) -> pd.DataFrame:
    """Harvest by stratum of the crop cut and period (every combination, zeros included).

    Parameters
    ----------
    schedule
        Stand frame with ``stratum_col`` (the stratum at the start), an area column and,
        without ``harvests``, ``period`` and ``volume_m3``.
    settings
        Settings tree (reads ``horizon.periods``).
    area_col
        Area column (default ``net_area_ha`` when present, else ``area_ha``).
    stratum_col
        Stratum label column.
    harvests
        The ``harvests`` table (``id_col``, ``period``, ``stratum`` of the crop cut,
        ``volume_m3``); a regenerated crop counts in its own stratum.
    id_col
        Stand id column of ``schedule`` and ``harvests``.

    Returns
    -------
    pandas.DataFrame
        Columns ``stratum``, ``period``, ``harvest_net_area_ha``, ``harvest_volume_m3``,
        ``stratum_net_area_ha`` (net area of the stands of the stratum at the start),
        sorted by stratum then period.
    """
    P = int(setting(settings, "horizon.periods", 10))
    ev = _event_figures(schedule, harvests, id_col, area_col)
    start = schedule[stratum_col].astype(str).to_numpy()
    if harvests is not None and "stratum" in harvests.columns:
        keep = period_array(harvests["period"]) > 0
        cut = harvests.loc[keep, "stratum"].astype(str).to_numpy()
    else:
        cut = start[ev["stand"]]
    labels, code = np.unique(np.concatenate([start, cut]), return_inverse=True)
    code_start, code_cut = code[: len(start)], code[len(start) :]
    S = len(labels)
    per = ev["period"]
    ok = (per >= 1) & (per <= P)
    slot = code_cut[ok] * P + (per[ok] - 1)
    h_area = np.bincount(slot, weights=ev["area"][ok], minlength=S * P)
    h_vol = np.bincount(slot, weights=ev["volume"][ok], minlength=S * P)
    area = np.nan_to_num(_col(schedule, _area_column(schedule, area_col)))
    total = np.bincount(code_start, weights=area, minlength=S)
    return pd.DataFrame(
        {
            "stratum": np.repeat(labels, P),
            "period": np.tile(np.arange(1, P + 1, dtype=np.int64), S),
            "harvest_net_area_ha": h_area,
            "harvest_volume_m3": h_vol,
            "stratum_net_area_ha": np.repeat(total, P),
        }
    )
