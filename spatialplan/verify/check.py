"""``verify_schedule``: check a harvest plan against every rule, trusting nothing the planner says.

From the schedule layer (stand geometry, ids, start ages, yield keys, reserve flags and the
harvest periods, or a ``harvests`` table), the settings and the yield table, verify

* measures which stands share a boundary with its own geometry (:mod:`.geometry`),
* reads the yield table and evaluates growth with its own code (:mod:`.yields`),
* works out the crop each harvest cuts and which stands are open when (:mod:`.events`),
* finds the openings of every period as plain connected components (networkx) and
  recomputes volumes and values (:mod:`.values`),

then checks the rules (:mod:`.rules`) and compares the harvest ages, volumes and values
recorded in the plan with its own. It shares only the settings and the file format with the
planner, and the reserve-flag words with the inventory reader.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd

from spatialplan.errors import InputError, SettingsError
from spatialplan.inventory import is_reserve_flag
from spatialplan.settings import Settings
from spatialplan.verify import events, rules
from spatialplan.verify.geometry import area_ha, metre_geometry, neighbours, polygons
from spatialplan.verify.report import VerifyReport, Violation
from spatialplan.verify.values import (
    discount,
    ending_value_per_ha,
    harvest_cost,
    harvest_value_per_ha,
)
from spatialplan.verify.yields import (
    Curves,
    YieldRows,
    build_curves,
    key_text,
    read_yield_rows,
    stratum_of,
)

__all__ = ["verify_schedule", "yield_rows"]

#: the value written in ``harvest_system`` for stands too steep to harvest
INOPERABLE = "inoperable"


def yield_rows(yields: Any, settings: Settings) -> YieldRows | None:
    """Verify's reading of a yield table given in any of the accepted forms.

    ``yields`` may be ``None``, a :class:`~spatialplan.verify.yields.YieldRows`, a CSV
    file path, a long-format DataFrame, or an object with ``to_csv_text()`` (a yield
    table as the plan file records it; only that text is read) or with a ``table``
    attribute holding one.
    """
    keys, cols = settings.fields.yield_keys, settings.yields
    if yields is None or isinstance(yields, YieldRows):
        return yields
    if isinstance(yields, pd.DataFrame):
        return read_yield_rows(yields, keys, cols, "<yields frame>")
    if isinstance(yields, str | Path):
        return read_yield_rows(yields, keys, cols)
    if hasattr(yields, "to_csv_text"):
        name = str(getattr(yields, "source", "<yield table>"))
        return read_yield_rows(yields.to_csv_text(), keys, cols, name, is_text=True)
    if hasattr(yields, "table"):
        return yield_rows(yields.table, settings)
    msg = f"verify cannot read a yield table from a {type(yields).__name__}"
    raise TypeError(msg)


def _column(frame: pd.DataFrame, name: str) -> str | None:
    """The column holding the user's attribute ``name``.

    The planner renames an input attribute to ``<name>_input`` when one of its own output
    columns has that name (``stratum``, ``reserve`` ...); the user's values are wanted.
    """
    if f"{name}_input" in frame.columns:
        return f"{name}_input"
    return name if name in frame.columns else None


def _fmt_ids(ids: list[str]) -> str:
    return ", ".join(ids[:20]) + (f" and {len(ids) - 20} more" if len(ids) > 20 else "")


def _stand_fields(
    frame: pd.DataFrame, settings: Settings, period_field: str | None
) -> tuple[dict[str, str], list[str]]:
    """Columns verify reads, by role (id, age, reserve, cost), and the yield-key columns.

    Every missing column is named at once.
    """
    fm = settings.fields
    wanted = {"id": fm.id_field, "age": fm.age_field}
    wanted.update({f"key{k}": key for k, key in enumerate(fm.yield_keys)})
    if fm.reserve_field:
        wanted["reserve"] = fm.reserve_field
    if fm.cost_class_field:
        wanted["cost"] = fm.cost_class_field
    found = {role: _column(frame, name) for role, name in wanted.items()}
    missing = [wanted[role] for role, c in found.items() if c is None]
    if period_field is not None and period_field not in frame.columns:
        missing.append(period_field)
    if missing:
        msg = (
            f"schedule layer lacks field(s) {', '.join(missing)}; "
            f"it has: {', '.join(map(str, frame.columns))}"
        )
        raise InputError(msg)
    columns = {role: c for role, c in found.items() if c is not None}
    return columns, [columns[f"key{k}"] for k in range(len(fm.yield_keys))]


@dataclass(frozen=True, eq=False)
class _Stands:
    """What verify reads about every stand of the schedule layer, by position."""

    ids: np.ndarray
    geometry: gpd.GeoSeries
    age_start: np.ndarray
    strata: np.ndarray
    gross_ha: np.ndarray
    net_ha: np.ndarray
    reserve: np.ndarray | None
    steep: np.ndarray | None
    cost_column: str | None


def _read_stands(
    schedule: gpd.GeoDataFrame, settings: Settings, period_field: str | None, notes: list[str]
) -> _Stands:
    """Ids, start ages, strata, areas and flags of the stands; bad values raise InputError."""
    fm = settings.fields
    col, key_columns = _stand_fields(schedule, settings, period_field)
    ids = schedule[col["id"]].map(key_text).to_numpy(dtype=object)
    dup = sorted(set(pd.Series(ids)[pd.Series(ids).duplicated()]))
    if dup:
        msg = f"schedule field {fm.id_field} has duplicate stand ids: {_fmt_ids(dup)}"
        raise InputError(msg)
    age = pd.to_numeric(schedule[col["age"]], errors="coerce").to_numpy(dtype=float)
    if np.isnan(age).any():
        bad = list(ids[np.isnan(age)])
        msg = f"schedule field {fm.age_field} has no numeric age for stands {_fmt_ids(bad)}"
        raise InputError(msg)
    geometry = polygons(schedule.geometry, notes)
    gross = area_ha(geometry)
    net = gross
    if "net_area_ha" in schedule.columns:
        given = pd.to_numeric(schedule["net_area_ha"], errors="coerce").to_numpy(dtype=float)
        if np.isnan(given).any():
            notes.append(
                f"net_area_ha empty for {int(np.isnan(given).sum())} stands; polygon area used"
            )
        net = np.where(np.isnan(given), gross, given)
    # Operability comes from the DEM (terrain stage); the plan records it per stand as
    # harvest_system (with terrain) and operable (always). Without a DEM every stand is
    # operable, so there is nothing to check and nothing to note.
    steep = None
    if "harvest_system" in schedule.columns:
        steep = schedule["harvest_system"].astype(str).to_numpy() == INOPERABLE
    elif "operable" in schedule.columns:
        flag = pd.to_numeric(schedule["operable"], errors="coerce").fillna(1).to_numpy()
        steep = flag == 0
    elif settings.terrain.dem:
        notes.append(
            "operability is not checked (the schedule has no harvest_system or operable column)"
        )
    return _Stands(
        ids=ids,
        geometry=geometry,
        age_start=age,
        strata=stratum_of(schedule, key_columns),
        gross_ha=gross,
        net_ha=net,
        reserve=is_reserve_flag(schedule[col["reserve"]]) if "reserve" in col else None,
        steep=steep,
        cost_column=col.get("cost"),
    )


def _recorded_checks(
    schedule: gpd.GeoDataFrame,
    stands: _Stands,
    h: events.Harvests,
    crop: events.Crops,
    cut_m3: np.ndarray | None,
    curves: Curves,
    settings: Settings,
    notes: list[str],
) -> tuple[list[Violation], list[str]]:
    """What the plan file records for each harvest and stand, against verify's own figures.

    Per harvest: the age and volume of the crop cut and its discounted net value; per
    stand: the discounted ending value (``ending_value_npv``) and the stand's NPV (its
    harvests plus its ending value). Returns the violations and the checks made.
    """
    ids, rec = stands.ids[h.stand], h.recorded
    recorded = {k: rec[k].to_numpy() for k in rec.columns}
    out = rules.record_checks(
        "recorded_age", ids, h.period, recorded["age_yr"], crop.age_at_harvest
    )
    checked = ["recorded_age"]
    if cut_m3 is None:
        return out, checked
    out += rules.record_checks("recorded_volume", ids, h.period, recorded["volume_m3"], cut_m3)
    checked.append("recorded_volume")
    cost = harvest_cost(schedule, settings, stands.cost_column)
    value_ha = harvest_value_per_ha(
        crop.stratum_cut, crop.age_at_harvest, h.period, cost[h.stand], curves, settings
    )
    if value_ha is None:
        notes.append("harvest and ending values are not checked (the settings give no price)")
        return out, checked
    value = value_ha * stands.net_ha[h.stand]
    if np.isfinite(recorded["npv"]).any():
        out += rules.record_checks("recorded_value", ids, h.period, recorded["npv"], value)
        checked.append("recorded_value")
    if "ending_value_npv" not in schedule.columns:
        notes.append("ending values are not checked (the plan records no ending_value_npv)")
        return out, checked
    econ, hz = settings.economics, settings.horizon
    _, mapping = events.regeneration(settings)
    after = np.array([mapping.get(str(x), x) for x in crop.end_stratum], dtype=object)
    try:
        ending_ha = ending_value_per_ha(
            crop.end_stratum, crop.end_age, after, cost, curves, settings
        )
    except SettingsError as exc:
        notes.append(f"ending values are not checked: {exc}")
        return out, checked
    n = len(stands.ids)
    ending = ending_ha * discount(hz.periods * hz.period_length_yr, econ.discount_rate)
    ending = ending * stands.net_ha
    whole = np.zeros(n, dtype=np.int64)  # per-stand figures belong to no single period
    rec_end = pd.to_numeric(schedule["ending_value_npv"], errors="coerce").to_numpy(float)
    out += rules.record_checks("recorded_ending_value", stands.ids, whole, rec_end, ending)
    checked.append("recorded_ending_value")
    if "npv" in schedule.columns:
        own = np.bincount(h.stand, weights=value, minlength=n) + ending
        rec_npv = pd.to_numeric(schedule["npv"], errors="coerce").to_numpy(float)
        out += rules.record_checks("recorded_npv", stands.ids, whole, rec_npv, own)
        checked.append("recorded_npv")
    return out, checked


def _old_forest_checks(
    schedule: gpd.GeoDataFrame,
    stands: _Stands,
    h: events.Harvests,
    settings: Settings,
) -> tuple[list[Violation], np.ndarray]:
    """Old-forest retention by period (of each management unit when ``fields.unit_field``).

    Returns the violations and the forest-wide old share of the gross area by period (NaN
    when the rule is off).
    """
    r, P = settings.rules, settings.horizon.periods
    if r.old_forest_age_yr is None or r.old_forest_min_share is None:
        return [], np.full(P, np.nan)
    age = events.ages_by_period(h, stands.age_start, settings)
    old = age >= r.old_forest_age_yr - rules.AGE_EPS_YR
    gross = stands.gross_ha
    unit_col = _column(schedule, settings.fields.unit_field) if settings.fields.unit_field else None
    if unit_col is None:
        unit = np.zeros(len(gross), dtype=object)
    else:
        unit = schedule[unit_col].fillna("").map(key_text).to_numpy(dtype=object)
    found = rules.old_forest_checks(
        unit, gross, old, r.old_forest_age_yr, r.old_forest_min_share, unit_col
    )
    total = gross.sum()
    share = (gross[:, None] * old).sum(axis=0) / total if total > 0 else np.full(P, np.nan)
    return found, share


def verify_schedule(
    schedule: gpd.GeoDataFrame,
    settings: Settings,
    yields: Any = None,
    period_field: str = "period",
    *,
    harvests: pd.DataFrame | None = None,
) -> VerifyReport:
    """Check a harvest schedule against every rule, independently of the planner.

    Parameters
    ----------
    schedule
        One row per stand: geometry, the fields named in ``settings.fields`` (id, age at
        the start, yield keys, optional reserve flag and cost class), optional
        ``net_area_ha`` and ``harvest_system`` columns, the harvest period (integer
        ``1 .. P``; empty or 0 when not harvested) and, as a plan file records them,
        ``age_at_harvest_yr``, ``volume_m3``, ``npv`` and ``ending_value_npv`` (plans
        written before the estate model: ``age_at_harvest`` and ``value``).
    settings
        Rules, horizon, adjacency, economics and ``[growth]`` curves.
    yields
        The yield table (see :func:`yield_rows` for the accepted forms), or ``None`` when
        every stratum has a Chapman-Richards curve in ``[growth]`` or no volume is needed.
    period_field
        Column holding the harvest period (not read when ``harvests`` is given).
    harvests
        A ``harvests`` table (stand id named like ``fields.id_field``, ``harvest``,
        ``period``, ``age_at_harvest_yr``, ``volume_m3``, ``npv``), one row per harvest;
        a plan that harvests a stand more than once needs it.

    Returns
    -------
    VerifyReport

    Raises
    ------
    InputError
        Missing fields, duplicate stand ids, missing ages, strata without a yield curve
        (all named at once).
    """
    r, P = settings.rules, int(settings.horizon.periods)
    notes: list[str] = []
    stands = _read_stands(schedule, settings, None if harvests is not None else period_field, notes)
    ids = stands.ids
    if harvests is not None:
        h, violations = events.harvests_from_table(harvests, ids, settings.fields.id_field, P)
    else:
        h, violations = events.harvests_from_period(schedule, ids, period_field, P)
    preexisting: list[Violation] = []
    crop = events.crops(h, stands.age_start, stands.strata, settings)
    curves = build_curves(yield_rows(yields, settings), settings.growth)
    barred = {}
    if stands.reserve is not None:
        barred["reserve"] = (
            stands.reserve[h.stand],
            f"reserve stand (field {settings.fields.reserve_field}) is harvested",
        )
    if stands.steep is not None:
        barred["inoperable"] = (
            stands.steep[h.stand],
            "stand too steep to harvest (harvest_system inoperable) is harvested",
        )
    violations += rules.harvest_checks(
        ids[h.stand], h.period, crop.age_at_harvest, crop.previous, barred, r
    )
    checked = ["period_range", "min_age", "reharvest", *barred, "max_opening/green_up"]

    # ---- openings and the unit restriction ------------------------------------------
    delay, _ = events.regeneration(settings)
    green_start = events.green_up_periods(stands.strata, settings, curves, 0.0, notes)
    green_after = events.green_up_periods(crop.stratum_after, settings, curves, delay, [])
    is_open, opened_by = events.openness(h, green_after, stands.age_start, green_start, settings)
    adj = settings.adjacency
    geoms = metre_geometry(stands.geometry, notes)
    nb = neighbours(geoms, adj.min_shared_edge_m, adj.digitising_tolerance_m, adj.corner_adjacency)
    found, pre, openings = rules.opening_checks(
        ids, nb.edges, stands.gross_ha, is_open, opened_by, r.max_opening_ha
    )
    violations += found
    preexisting += pre
    if r.unit_restriction:
        checked.append("unit_restriction")
        found, pre = rules.unit_restriction_checks(ids, nb.edges, is_open, opened_by)
        violations += found
        preexisting += pre

    # ---- volumes, flow, ending inventory ------------------------------------------------
    volume_rules = (r.period_volume_min_m3, r.period_volume_max_m3, r.ending_volume_fraction)
    needs_volume = (
        r.flow_tolerance is not None or r.non_declining or any(v is not None for v in volume_rules)
    )
    if needs_volume and not curves.strata:
        msg = "verify needs a yield table (none recorded in the plan; pass --yields)"
        raise InputError(msg)
    cut_m3 = None
    volume, area_cut, n_cut = np.zeros(P), np.zeros(P), np.zeros(P, dtype=np.int64)
    np.add.at(area_cut, h.period - 1, stands.net_ha[h.stand])
    np.add.at(n_cut, h.period - 1, 1)
    if curves.strata:
        cut_m3 = curves.volume(crop.stratum_cut, crop.age_at_harvest) * stands.net_ha[h.stand]
        np.add.at(volume, h.period - 1, cut_m3)
    else:
        notes.append("volumes are not recomputed (no yield table)")
    found, flow_checked = rules.flow_checks(volume, area_cut, r)
    end_age = np.maximum(crop.end_age, 0.0)  # land not yet regenerated counts as age 0
    net = stands.net_ha
    mean_age = float((end_age * net).sum() / net.sum()) if net.sum() > 0 else 0.0
    start_m3, end_m3 = 0.0, None
    if curves.strata and r.ending_volume_fraction is not None:
        start_m3 = float((curves.volume(stands.strata, stands.age_start) * net).sum())
        end_m3 = float((curves.volume(crop.end_stratum, end_age) * net).sum())
    found_end, end_checked = rules.ending_checks(start_m3, end_m3, mean_age, r)
    violations += found + found_end
    found_old, old_share = _old_forest_checks(schedule, stands, h, settings)
    violations += found_old
    found, recorded_checked = _recorded_checks(
        schedule, stands, h, crop, cut_m3, curves, settings, notes
    )
    violations += found
    checked += flow_checked + end_checked + recorded_checked
    checked += ["old_forest"] if r.old_forest_age_yr is not None else []

    largest = openings.groupby("period")["gross_area_ha"].max() if len(openings) else pd.Series()
    periods = pd.DataFrame(
        {
            "period": np.arange(1, P + 1),
            "harvest_volume_m3": volume,
            "harvest_net_area_ha": area_cut,
            "stands_harvested": n_cut,
            "largest_opening_ha": largest.reindex(range(1, P + 1), fill_value=0.0).to_numpy(float),
            "old_forest_share": old_share,
        }
    )
    return VerifyReport(
        violations=violations,
        preexisting=preexisting,
        notes=notes,
        openings=openings,
        periods=periods,
        n_stands=len(ids),
        n_periods=P,
        rules_checked=tuple(checked),
    )
