"""Assessment of a plan: the rules in force beside what it achieved, and its sustainability.

Both are computed from the plan's tables alone (``schedule``, ``harvests``, ``periods``,
``openings`` and the ``run`` table), so a plan read back from its GeoPackage is assessed
the same way as one just solved. The HTML report (:mod:`spatialplan.report`) shows them.

Timing follows ``docs/architecture.md``: a harvest at mid-period ``(p - 0.5) L``; after
a harvest the new crop is age 0 ``regeneration.delay_yr`` years later.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from spatialplan import _review as _rv
from spatialplan.inventory import is_reserve_flag

__all__ = ["rules_achieved", "sustainability"]

# Relative slack when a measured value is judged against a limit: solvers work on scaled
# integers and the tables hold rounded floats.
_SLACK = 1e-6


def _events_with_ages(
    schedule: pd.DataFrame, harvests: pd.DataFrame | None, settings: Any, id_col: str
) -> pd.DataFrame:
    """Harvest events with the age at each harvest (recorded, else from the timing rule)."""
    ev = _rv.harvest_events(schedule, harvests, id_col)
    L = float(_rv.setting(settings, "horizon.period_length_yr", 5.0))
    delay = float(_rv.setting(settings, "regeneration.delay_yr", 0.0))
    age_col = str(_rv.setting(settings, "fields.age_field", "age"))
    age_col = age_col if age_col in schedule.columns else "age"
    age0 = (
        pd.to_numeric(schedule[age_col], errors="coerce").to_numpy(float)
        if age_col in schedule.columns
        else np.full(len(schedule), np.nan)
    )
    q = ev["period"].to_numpy(float)
    prev = ev.groupby("pos")["period"].shift(1).to_numpy(float)
    # first harvest: start age + (q - 0.5) L; later: (q - q_prev) L - delay (architecture.md)
    timing = np.where(
        np.isnan(prev), age0[ev["pos"].to_numpy()] + (q - 0.5) * L, (q - prev) * L - delay
    )
    if "age_at_harvest_yr" in ev.columns:
        rec = pd.to_numeric(ev["age_at_harvest_yr"], errors="coerce").to_numpy(float)
        ev["age_at_harvest_yr"] = np.where(np.isfinite(rec), rec, timing)
    else:
        ev["age_at_harvest_yr"] = timing
    return ev


# ---------------------------------------------------------------------------------------
# rules in force and what the plan achieved
# ---------------------------------------------------------------------------------------
def _rule_texts(settings: Any, schedule: pd.DataFrame) -> list[tuple[str, str]]:
    from spatialplan.rules import rules_in_force
    from spatialplan.settings import Settings

    texts = rules_in_force(settings) if isinstance(settings, Settings) else []
    keys = {k for k, _ in texts}
    has_terrain = "harvest_system" in schedule.columns or bool(_rv.inoperable_mask(schedule).any())
    if has_terrain and "operability" not in keys:
        at = next((i for i, (k, _) in enumerate(texts) if k == "reserves"), len(texts) - 1) + 1
        texts.insert(at, ("operability", "inoperable stands are never harvested"))
    return texts


def rules_achieved(
    settings: Any,
    schedule: pd.DataFrame,
    periods_df: pd.DataFrame,
    run_info: Mapping[str, Any] | None = None,
    *,
    harvests: pd.DataFrame | None = None,
    openings: pd.DataFrame | None = None,
    id_col: str | None = None,
) -> pd.DataFrame:
    """Each rule in force beside what the plan achieved.

    The wording of the rules comes from :func:`spatialplan.rules.rules_in_force`. The
    achieved values are measured here from the plan's tables; green-up and the unit
    restriction need the stand adjacency, which the tables do not hold, so their check is
    the recorded verdict of the independent check.

    Parameters
    ----------
    settings
        :class:`spatialplan.settings.Settings` of the plan.
    schedule
        The ``schedule`` layer.
    periods_df
        The ``periods`` table.
    run_info
        The ``run`` table as a dict.
    harvests
        The ``harvests`` table (``None``: one harvest per stand, from the schedule).
    openings
        The ``openings`` layer (used when the periods table has no ``largest_opening_ha``).
    id_col
        Stand id column (default ``fields.id_field``).

    Returns
    -------
    pandas.DataFrame
        One row per rule: ``key``, ``rule`` (sentence), ``achieved`` (words), ``value``
        (the measured number, NaN when none), ``limit`` (NaN when none) and ``check``:
        ``passed``, ``failed``, ``not checked`` or ``""`` (nothing to judge).
        ``attrs["notes"]`` holds ``note:`` lines about what the measures found.
    """
    info = _rv.current_run_info(run_info or {})
    ident = id_col or str(_rv.setting(settings, "fields.id_field", "stand_id"))
    sched = _rv.current_names(schedule, "schedule")
    pdf = _rv.current_names(periods_df, "periods").sort_values("period").reset_index(drop=True)
    hz = _rv.Horizon(settings, pdf)
    ev = _events_with_ages(sched, harvests, settings, ident)
    r = _rv.setting(settings, "rules")
    verdict, verdict_rest = _rv.verdict_parts(info.get("verify_verdict"))
    failed_rules = verdict_rest if verdict == "failed" else ""
    ids = sched[ident].astype(str).to_numpy() if ident in sched.columns else np.arange(len(sched))
    net = np.nan_to_num(_rv.column(sched, "net_area_ha")) if "net_area_ha" in sched else None
    gross = np.nan_to_num(_rv.column(sched, "area_ha"))
    if net is None:
        net = gross

    def by_verify(rule_id: str) -> str:
        if not verdict:
            return "not checked"
        return "failed" if rule_id in failed_rules else "passed"

    def judged(ok: bool) -> str:
        return "passed" if ok else "failed"

    rows: list[dict[str, Any]] = []
    notes: list[str] = []

    def add(key: str, text: str, achieved: str, check: str, value: float = np.nan,
            limit: float = np.nan) -> None:  # fmt: skip
        rows.append({"key": key, "rule": text, "achieved": achieved, "value": value,
                     "limit": limit, "check": check})  # fmt: skip

    vol = _rv.column(pdf, "harvest_volume_m3")
    area = _rv.column(pdf, "harvest_net_area_ha")
    periods = pdf["period"].to_numpy(dtype=int)
    for key, text in _rule_texts(settings, sched):
        if key == "horizon":
            n_cut = int(ev["pos"].nunique())
            add(key, text, f"{len(ev)} harvests on {n_cut} of {len(sched)} stands", "")
        elif key == "max_opening":
            largest = _rv.column(pdf, "largest_opening_ha")
            if not np.isfinite(largest).any() and openings is not None and len(openings):
                op = _rv.current_names(openings, "openings")
                new = _rv.column(op, "new_harvest_gross_ha")
                keep = ~(new <= 0)  # NaN (no column) counts as holding a harvest
                op_p = pd.to_numeric(op["period"]).to_numpy(int)
                largest = np.array(
                    [
                        np.max(_rv.column(op, "gross_area_ha")[keep & (op_p == p)], initial=0.0)
                        for p in periods
                    ]
                )
            limit = getattr(r, "max_opening_ha", None)
            lim = np.nan if limit is None else float(limit)
            if len(largest) and np.isfinite(largest).any():
                j = int(np.nanargmax(largest))
                x = float(largest[j])
                by_period = ", ".join(_rv.fmt_number(v, 1) for v in largest)
                achieved = (
                    f"largest opening holding a harvest {x:,.1f} ha (gross), in "
                    f"{hz.period(int(periods[j]))}; by period: {by_period} ha"
                )
                other = _rv.column(pdf, "largest_other_opening_ha")
                if np.isfinite(lim) and np.isfinite(other).any() and np.nanmax(other) > lim:
                    k = int(np.nanargmax(other))
                    notes.append(
                        f"note: young stands from before the plan or from earlier cuts form "
                        f"an opening of {other[k]:,.1f} ha in {hz.period(int(periods[k]))} "
                        "with no harvest of that period in it; the opening rule judges "
                        "openings that hold a harvest of the period"
                    )
                check = "" if limit is None else judged(x <= lim * (1 + _SLACK) + 1e-6)
                add(key, text, achieved, check, x, lim)
            else:
                add(key, text, "no opening measured", "not checked", limit=lim)
        elif key == "green_up":
            add(key, text, "judged with the openings above (open stands of earlier cuts "
                "count)", by_verify("green_up"))  # fmt: skip
        elif key == "unit_restriction":
            add(key, text, "needs the stand adjacency: see the independent check",
                by_verify("unit_restriction"))  # fmt: skip
        elif key == "min_age":
            lim = float(getattr(r, "min_age_yr", 0.0) or 0.0)
            ages = ev["age_at_harvest_yr"].to_numpy(float)
            if len(ages) and np.isfinite(ages).any():
                j = int(np.nanargmin(ages))
                x = float(ages[j])
                achieved = (
                    f"youngest age at harvest {x:,.1f} years: stand {ids[ev['pos'].iloc[j]]} "
                    f"in {hz.period(int(ev['period'].iloc[j]))}"
                )
                add(key, text, achieved, judged(x >= lim - 1e-9), x, lim)
            else:
                add(key, text, "no harvest", "", limit=lim)
        elif key == "reserves":
            col = "reserve" if "reserve" in sched.columns else None
            res = (is_reserve_flag(sched[col]) if col else np.zeros(len(sched), dtype=bool)).astype(
                bool
            )
            k = int(res[ev["pos"].to_numpy()].sum())
            achieved = (
                f"{k} harvests in reserves ({int(res.sum())} reserve stands, "
                f"{gross[res].sum():,.1f} ha gross)"
            )
            add(key, text, achieved, judged(k == 0), float(k), 0.0)
        elif key == "operability":
            bad = _rv.inoperable_mask(sched)
            k = int(bad[ev["pos"].to_numpy()].sum())
            achieved = (
                f"{k} harvests on inoperable stands ({int(bad.sum())} inoperable stands, "
                f"{gross[bad].sum():,.1f} ha gross)"
            )
            add(key, text, achieved, judged(k == 0), float(k), 0.0)
        elif key == "max_harvests":
            counts = np.bincount(ev["pos"].to_numpy(), minlength=len(sched))
            most = int(counts.max(initial=0))
            lim_v = getattr(r, "max_harvests", None)
            spread = ", ".join(
                f"{int((counts == c).sum())} stands {c}×" for c in range(1, most + 1)
            )
            achieved = f"most harvests of one stand: {most}" + (f" ({spread})" if most else "")
            check = "" if lim_v is None else judged(most <= int(lim_v))
            add(key, text, achieved, check, float(most), np.nan if lim_v is None else lim_v)
        elif key == "old_forest":
            need = float(r.old_forest_min_share)
            unit_col = _rv.setting(settings, "fields.unit_field")
            where = ""
            if unit_col and unit_col in sched.columns:
                # The rule holds in each management unit: the smallest share of any unit.
                units = sched[unit_col].astype(str).to_numpy()
                by_unit = {
                    u: _old_forest_shares(sched, ev, settings, hz, units == u)
                    for u in np.unique(units)
                }
                u_min = min(by_unit, key=lambda u: np.nanmin(by_unit[u], initial=np.inf))
                share, where = by_unit[u_min], f"unit {u_min}, "
            else:
                share = _rv.column(pdf, "old_forest_share")
                if not np.isfinite(share).any():
                    share = _old_forest_shares(sched, ev, settings, hz)
            j = int(np.nanargmin(share)) if np.isfinite(share).any() else -1
            if j >= 0:
                x = float(share[j])
                achieved = f"smallest share {_rv.fmt_percent(x)} in {where}{hz.period(j + 1)}, required {_rv.fmt_percent(need)}"
                add(key, text, achieved, judged(x >= need - 1e-9), x, need)
            else:
                add(key, text, "not measured", "not checked", limit=need)
        elif key == "flow_tolerance":
            tol = float(r.flow_tolerance)
            change = _rv.volume_changes(vol)
            achieved, ok = _flow_words(change, periods, tol=tol)
            worst = float(np.nanmax(np.abs(change))) if np.isfinite(change).any() else np.nan
            add(key, text, achieved, judged(ok), worst, tol)
        elif key == "non_declining":
            change = _rv.volume_changes(vol)
            falls = np.where(np.isfinite(change), change, 0.0)
            j = int(np.argmin(falls)) if len(falls) else 0
            if len(falls) and falls[j] < 0:
                achieved = (
                    f"largest fall {_rv.fmt_percent(falls[j], sign=True)} ({hz.period(int(periods[j]))} "
                    "against the period before)"
                )
            else:
                achieved = "no fall from one period to the next"
            ok = bool(np.all(vol[1:] >= vol[:-1] * (1 - _SLACK) - 1e-6)) if len(vol) else True
            add(key, text, achieved, judged(ok), float(falls.min(initial=0.0)), 0.0)
        elif key in ("period_volume_min_m3", "period_volume_max_m3"):
            lim = float(getattr(r, key))
            achieved, value, ok = _target_words(vol, periods, lim, key.endswith("min_m3"), "m³")
            add(key, text, achieved, judged(ok), value, lim)
        elif key in ("period_area_min_ha", "period_area_max_ha"):
            lim = float(getattr(r, key))
            achieved, value, ok = _target_words(area, periods, lim, key.endswith("min_ha"), "ha")
            add(key, text, achieved, judged(ok), value, lim)
        elif key == "ending_value":
            ending = _rv.numeric(info.get("ending_value_npv"))
            if not np.isfinite(ending) and "ending_value_npv" in sched.columns:
                ending = float(np.nansum(_rv.column(sched, "ending_value_npv")))
            achieved = (
                f"ending value {ending:,.0f} (discounted), part of the NPV"
                if np.isfinite(ending)
                else "not recorded in this plan"
            )
            add(key, text, achieved, "", ending)
        elif key == "ending_volume":
            need = float(r.ending_volume_fraction)
            start = _rv.numeric(info.get("standing_volume_start_m3"))
            end = _rv.numeric(info.get("standing_volume_end_m3"))
            if np.isfinite(start) and np.isfinite(end) and start > 0:
                x = end / start
                achieved = f"standing volume at the end {_rv.fmt_percent(x)} of the start"
                add(key, text, achieved, judged(x >= need - 1e-9), x, need)
            else:
                add(key, text, "see the independent check (the plan records no standing "
                    "volumes at the start and the end)", by_verify("ending_volume"),
                    limit=need)  # fmt: skip
        elif key == "ending_mean_age":
            need = float(r.ending_mean_age_yr)
            x = _ending_mean_age(sched, ev, settings, net)
            achieved = f"mean age at the end {x:,.1f} years (weighted by net area)"
            add(key, text, achieved, judged(x >= need - 1e-9), x, need)
        else:  # adjacency and any rule without a measure here
            add(key, text, "–", "")
    out = pd.DataFrame(rows, columns=["key", "rule", "achieved", "value", "limit", "check"])
    out.attrs["notes"] = notes
    return out


def _flow_words(change: np.ndarray, periods: np.ndarray, tol: float) -> tuple[str, bool]:
    fin = np.isfinite(change)
    ok = bool(np.all(np.abs(change[1:]) <= tol + _SLACK)) if len(change) > 1 else True
    if not fin.any():
        return ("one period only" if len(change) <= 1 else "no volume to compare"), ok
    parts = []
    up = np.where(fin, change, -np.inf)
    down = np.where(fin, change, np.inf)
    if up.max() > 0:
        j = int(np.argmax(up))
        parts.append(f"largest rise {_rv.fmt_percent(up[j], sign=True)} (period {periods[j]})")
    if down.min() < 0:
        j = int(np.argmin(down))
        parts.append(f"largest fall {_rv.fmt_percent(down[j], sign=True)} (period {periods[j]})")
    if np.isinf(change).any():
        j = int(np.flatnonzero(np.isinf(change))[0])
        parts.append(f"harvest starts from nothing in period {periods[j]}")
    return ("changes between periods: " + "; ".join(parts or ["none"])), ok


def _target_words(
    x: np.ndarray, periods: np.ndarray, limit: float, is_min: bool, unit: str
) -> tuple[str, float, bool]:
    if not len(x):
        return "no period", np.nan, True
    j = int(np.argmin(x) if is_min else np.argmax(x))
    word = "smallest" if is_min else "largest"
    ok = bool(
        np.all(x >= limit * (1 - _SLACK) - 1e-6)
        if is_min
        else np.all(x <= limit * (1 + _SLACK) + 1e-6)
    )
    return f"{word} {x[j]:,.1f} {unit} (period {periods[j]})", float(x[j]), ok


def _start_ages(schedule: pd.DataFrame, settings: Any) -> np.ndarray:
    col = str(_rv.setting(settings, "fields.age_field", "age"))
    col = col if col in schedule.columns else "age"
    if col not in schedule.columns:
        return np.zeros(len(schedule))
    return np.nan_to_num(pd.to_numeric(schedule[col], errors="coerce").to_numpy(float))


def _old_forest_shares(
    schedule: pd.DataFrame,
    ev: pd.DataFrame,
    settings: Any,
    hz: _rv.Horizon,
    among: np.ndarray | None = None,
) -> np.ndarray:
    """Gross-area share at least ``rules.old_forest_age_yr`` old at each mid-period, of all
    stands or of those in ``among`` (a mask)."""
    old = float(_rv.setting(settings, "rules.old_forest_age_yr"))
    delay = float(_rv.setting(settings, "regeneration.delay_yr", 0.0))
    age0 = _start_ages(schedule, settings)
    gross = np.nan_to_num(_rv.column(schedule, "area_ha"))
    if among is not None:
        gross = np.where(among, gross, 0.0)
    total = gross.sum()
    out = np.full(hz.P, np.nan)
    if total <= 0:
        return out
    for p in range(1, hz.P + 1):
        ages = _rv.ages_at(age0, ev, (p - 0.5) * hz.L, hz.L, delay)
        out[p - 1] = gross[ages >= old - 1e-9].sum() / total
    return out


def _ending_mean_age(
    schedule: pd.DataFrame, ev: pd.DataFrame, settings: Any, weights: np.ndarray
) -> float:
    P = int(_rv.setting(settings, "horizon.periods", 10))
    L = float(_rv.setting(settings, "horizon.period_length_yr", 5.0))
    delay = float(_rv.setting(settings, "regeneration.delay_yr", 0.0))
    ages = _rv.ages_at(_start_ages(schedule, settings), ev, P * L, L, delay)
    w = np.asarray(weights, float)
    return float(np.sum(ages * w) / w.sum()) if w.sum() > 0 else float("nan")


# ---------------------------------------------------------------------------------------
# sustainability
# ---------------------------------------------------------------------------------------
def sustainability(
    settings: Any,
    schedule: pd.DataFrame,
    periods_df: pd.DataFrame,
    run_info: Mapping[str, Any] | None = None,
    *,
    harvests: pd.DataFrame | None = None,
    id_col: str | None = None,
) -> dict[str, Any]:
    """The facts of the sustainability statement, computed from the plan's tables.

    Parameters
    ----------
    settings, schedule, periods_df, run_info, harvests, id_col
        As for :func:`rules_achieved`.

    Returns
    -------
    dict
        ``last_period`` (int), ``last_harvest_m3`` (m3 in the last period),
        ``ltsy_rotation_m3`` and ``ltsy_mai_m3`` (LTSY per period = per year x L; NaN when
        the plan records none), ``share_of_ltsy_rotation`` and ``share_of_ltsy_mai``
        (last-period harvest / LTSY per period), ``standing_start_m3``,
        ``standing_end_m3`` and ``standing_basis`` (``"start and end"`` from the run table,
        ``"mid-period"`` from the periods table, or ``""``), ``age_classes`` (the frame of
        :func:`spatialplan.charts.age_class_table`) and ``sentences`` (the statement in
        words).
    """
    from spatialplan.charts import age_class_table

    info = _rv.current_run_info(run_info or {})
    pdf = _rv.current_names(periods_df, "periods").sort_values("period").reset_index(drop=True)
    hz = _rv.Horizon(settings, pdf)
    ident = id_col or str(_rv.setting(settings, "fields.id_field", "stand_id"))
    sched = _rv.current_names(schedule, "schedule")
    last = int(pdf["period"].iloc[-1]) if len(pdf) else 0
    last_m3 = float(_rv.column(pdf, "harvest_volume_m3")[-1]) if len(pdf) else np.nan
    ltsy_rot = _rv.numeric(info.get("ltsy_rotation_m3_yr")) * hz.L
    ltsy_mai = _rv.numeric(info.get("ltsy_mai_m3_yr")) * hz.L
    with np.errstate(divide="ignore", invalid="ignore"):
        share_rot = last_m3 / ltsy_rot if ltsy_rot > 0 else np.nan
        share_mai = last_m3 / ltsy_mai if ltsy_mai > 0 else np.nan
    start = _rv.numeric(info.get("standing_volume_start_m3"))
    end = _rv.numeric(info.get("standing_volume_end_m3"))
    basis = "start and end"
    standing = _rv.column(pdf, "standing_volume_m3")
    if not (np.isfinite(start) and np.isfinite(end)):
        if len(standing) and np.isfinite(standing[[0, -1]]).all():
            start, end, basis = float(standing[0]), float(standing[-1]), "mid-period"
        else:
            start, end, basis = np.nan, np.nan, ""
    ages = age_class_table(sched, settings, harvests, id_col=ident)

    says: list[str] = []
    if basis == "start and end":
        says.append(
            f"Standing volume: {start:,.0f} m³ at the start ({hz.at(0)}) and {end:,.0f} m³ at "
            f"the end ({hz.at(hz.P * hz.L)}), {_rv.fmt_percent(end / start if start else np.nan)} of "
            "the start."
        )
    elif basis == "mid-period":
        says.append(
            f"Standing volume: {start:,.0f} m³ in the middle of period 1 "
            f"({hz.at(0.5 * hz.L)}) and {end:,.0f} m³ in the middle of period {last} "
            f"({hz.at((last - 0.5) * hz.L)}), {_rv.fmt_percent(end / start if start else np.nan)} of "
            "the first."
        )
    gross = np.nan_to_num(_rv.column(sched, "area_ha"))
    total = float(gross.sum())
    if total > 0:
        delay = float(_rv.setting(settings, "regeneration.delay_yr", 0.0))
        ev = _rv.harvest_events(sched, harvests, ident)
        end_age = _rv.ages_at(_start_ages(sched, settings), ev, hz.P * hz.L, hz.L, delay)
        peak = ages.loc[ages["area_end_ha"].idxmax()]
        text = (
            f"Age classes at the end ({hz.at(hz.P * hz.L)}): the largest class is "
            f"{peak['age_class']} years with {peak['area_end_ha']:,.1f} ha "
            f"({_rv.fmt_percent(peak['area_end_ha'] / total)} of the gross area)"
        )
        min_age = float(_rv.setting(settings, "rules.min_age_yr", 0.0) or 0.0)
        if min_age > 0:
            young = gross[end_age < min_age - 1e-9].sum() / total
            text += f"; {_rv.fmt_percent(young)} is younger than the minimum harvest age ({min_age:g} years)"
        old_age = _rv.setting(settings, "rules.old_forest_age_yr")
        if old_age is not None:
            old = gross[end_age >= float(old_age) - 1e-9].sum() / total
            text += f"; {_rv.fmt_percent(old)} is at least {float(old_age):g} years old"
        says.append(text + ".")
    if np.isfinite(share_rot):
        verdict = (
            "at or below it, so the late harvest can be kept up in the long run"
            if share_rot <= 1.0 + _SLACK
            else "above it, so the late harvest draws down the growing stock and cannot be "
            "kept up for ever at this level"
        )
        says.append(
            f"The harvest in the last period ({hz.text(last)}) is {_rv.fmt_percent(share_rot, 0)} of the "
            f"LTSY at the economic rotation ({last_m3:,.0f} m³ against {ltsy_rot:,.0f} m³ per "
            f"period): {verdict}."
        )
    if np.isfinite(share_mai):
        says.append(
            f"It is {_rv.fmt_percent(share_mai, 0)} of the LTSY at MAI culmination ({ltsy_mai:,.0f} m³ "
            "per period), the most a regulated forest of these strata can yield."
        )
    return {
        "last_period": last,
        "last_harvest_m3": last_m3,
        "ltsy_rotation_m3": ltsy_rot,
        "ltsy_mai_m3": ltsy_mai,
        "share_of_ltsy_rotation": share_rot,
        "share_of_ltsy_mai": share_mai,
        "standing_start_m3": start,
        "standing_end_m3": end,
        "standing_basis": basis,
        "age_classes": ages,
        "sentences": says,
    }
