"""One-page HTML report of a plan, and the bundle of review files (map, charts, report).

The report is self-contained: charts are embedded as base64 PNG, so the page can be
handed over as one file; the map is linked by a relative path. Every value is escaped.

It reads the plan in the names of the current format (``docs/architecture.md``, "Output
GeoPackage"); plans written before the estate model are read through
:func:`spatialplan._review.current_names`, so they still render.
"""

from __future__ import annotations

import base64
import html
import json
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from spatialplan import _review as _rv
from spatialplan._io import write_text_atomic
from spatialplan.inventory import is_reserve_flag

__all__ = [
    "CAUTIONS",
    "review_paths",
    "rules_achieved",
    "sustainability",
    "write_report",
    "write_review_files",
]

CAUTIONS: tuple[str, ...] = (
    "This plan is a planning aid. It does not replace field checks, the forest practice "
    "law and permits that apply where the forest is, or the judgement of a licensed "
    "or registered forester.",
    "Yields, prices, costs and growth are the inputs' estimates; the plan is only as good "
    "as they are.",
    "Slope, operability and net-area outputs are estimates from the elevation model and "
    "stream data given; check them on the ground before laying out a harvest.",
    "Openings are judged from the stand polygons and the adjacency rule chosen; local "
    "rules may measure openings or green-up differently.",
)

# Relative slack when a measured value is judged against a limit: solvers work on scaled
# integers and the tables hold rounded floats.
_SLACK = 1e-6

# Run-summary rows shown first, in this order, when present: (key, label). Keys are the
# current ones (old plans are read through _review.current_run_info).
_SUMMARY = (
    ("npv", "Net present value (NPV) of the plan"),
    ("ending_value_npv", "of which: ending value of the forest left (discounted)"),
    ("best_bound", "Best proven upper bound"),
    ("gap", "Gap to the best proven bound"),
    ("bound_aspatial_lp", "Upper bound recorded: aspatial LP (HiGHS), no spatial rules"),
    ("bound_cpsat", "Upper bound recorded: CP-SAT"),
    ("solver_status", "Solver status"),
    ("verify_verdict", "Independent check (verify)"),
    ("solve_time_s", "Solve time (s)"),
    ("ltsy_rotation_m3_yr", "LTSY at the economic rotation (m³ per year)"),
    ("ltsy_mai_m3_yr", "LTSY at MAI culmination (m³ per year)"),
    ("software", "Software"),
    ("stands_path", "Stand layer"),
    ("stands_sha256", "Stand layer SHA-256"),
    ("yields_path", "Yield table"),
    ("yields_sha256", "Yield table SHA-256"),
)
_MONEY = {"npv", "ending_value_npv", "best_bound", "bound_aspatial_lp", "bound_cpsat"}
_VOLUME = {"ltsy_rotation_m3_yr", "ltsy_mai_m3_yr"}

# long texts kept in the GeoPackage, not the page; best_bound_method is shown with the bound
_HIDDEN = {"settings_json", "yields_csv", "best_bound_method", "title"}

# The periods table on the page: (column, label, decimals); "_" columns are made here.
_PERIOD_COLS = (
    ("period", "Period", 0),
    ("_years", "Years", 0),
    ("harvest_net_area_ha", "Harvest area (net, ha)", 1),
    ("harvest_volume_m3", "Harvest volume (m³)", 0),
    ("_change_pct", "Change from the previous period (%)", 1),
    ("_flow_band", "Volume the flow rules allowed (m³)", 0),
    ("gross_value", "Gross value, undiscounted (before costs)", 0),
    ("npv", "NPV of the period's harvests (discounted)", 0),
    ("mean_age_at_harvest_yr", "Mean age at harvest (yr)", 1),
    ("stands_harvested", "Stands harvested", 0),
    ("opening_count", "Openings", 0),
    ("largest_opening_ha", "Largest opening (gross, ha)", 1),
    ("_old_forest_pct", "Old forest (% of gross area)", 1),
    ("standing_volume_m3", "Standing volume at mid-period (m³)", 0),
)


# ---------------------------------------------------------------------------------------
# small formatting helpers
# ---------------------------------------------------------------------------------------
def _num(v: Any, digits: int) -> str:
    if isinstance(v, bool | np.bool_):
        return "yes" if v else "no"
    if isinstance(v, str):
        return v
    try:
        x = float(v)
    except (TypeError, ValueError):
        return "" if v is None else str(v)
    if not np.isfinite(x):
        return "–"
    return f"{x:,.{digits}f}"


def _pct(x: float, digits: int = 1, sign: bool = False) -> str:
    if not np.isfinite(x):
        return "–"
    return _signed(100.0 * x, digits) + " %" if sign else f"{100.0 * x:.{digits}f} %"


def _signed(x: float, digits: int) -> str:
    """``+4.1`` / ``−9.8`` (a true minus sign), ``–`` when not finite."""
    if not np.isfinite(x):
        return "–"
    return f"{x:+,.{digits}f}".replace("-", "−")


def _esc(text: Any) -> str:
    return html.escape(str(text))


class _Horizon:
    """Periods and their years, as the report states them."""

    def __init__(self, settings: Any, periods_df: pd.DataFrame | None) -> None:
        self.P = int(_rv.setting(settings, "horizon.periods", 0) or 0)
        if not self.P and periods_df is not None and len(periods_df):
            self.P = int(pd.to_numeric(periods_df["period"]).max())
        self.L = float(_rv.setting(settings, "horizon.period_length_yr", 5.0))
        self.start_year = float(_rv.setting(settings, "horizon.start_year", 0) or 0)
        self.calendar = self.start_year != 0
        self.years = _rv.period_years(self.P, self.L, self.start_year)
        if periods_df is not None and {"start_year", "end_year"} <= set(periods_df.columns):
            got = periods_df.sort_values("period")[["start_year", "end_year"]].to_numpy(float)
            if got.shape == self.years.shape:
                self.years = got

    def text(self, p: int) -> str:
        """``2025–2030`` for period ``p`` (1-based)."""
        if not 1 <= p <= self.P:
            return "–"
        a, b = self.years[p - 1]
        return _rv.years_text(a, b, self.calendar)

    def span(self) -> str:
        """The whole horizon, ``2025–2075``."""
        if not self.P:
            return "–"
        return _rv.years_text(self.years[0, 0], self.years[-1, 1], self.calendar)

    def at(self, t_yr: float) -> str:
        """A time in years from the start as a calendar year (or ``year t``)."""
        return f"{self.start_year + t_yr:g}" if self.calendar else f"year {t_yr:g}"

    def period(self, p: int) -> str:
        """``period 3 (2035–2040)``."""
        return f"period {p} ({self.text(p)})"


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


def _column(frame: pd.DataFrame | None, name: str) -> np.ndarray:
    if frame is None or name not in frame.columns:
        return np.full(0 if frame is None else len(frame), np.nan)
    return pd.to_numeric(frame[name], errors="coerce").to_numpy(float)


def _verdict_parts(verdict: Any) -> tuple[str, str]:
    """(``passed``/``failed``/"", the rest of the recorded verdict)."""
    text = str(verdict or "").strip()
    word = _rv.verdict_word(text)
    if word:
        rest = text.split(":", 1)[1].strip() if ":" in text else ""
        return word, rest
    return "", text


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
    hz = _Horizon(settings, pdf)
    ev = _events_with_ages(sched, harvests, settings, ident)
    r = _rv.setting(settings, "rules")
    verdict, verdict_rest = _verdict_parts(info.get("verify_verdict"))
    failed_rules = verdict_rest if verdict == "failed" else ""
    ids = sched[ident].astype(str).to_numpy() if ident in sched.columns else np.arange(len(sched))
    net = np.nan_to_num(_column(sched, "net_area_ha")) if "net_area_ha" in sched else None
    gross = np.nan_to_num(_column(sched, "area_ha"))
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

    vol = _column(pdf, "harvest_volume_m3")
    area = _column(pdf, "harvest_net_area_ha")
    periods = pdf["period"].to_numpy(dtype=int)
    for key, text in _rule_texts(settings, sched):
        if key == "horizon":
            n_cut = int(ev["pos"].nunique())
            add(key, text, f"{len(ev)} harvests on {n_cut} of {len(sched)} stands", "")
        elif key == "max_opening":
            largest = _column(pdf, "largest_opening_ha")
            if not np.isfinite(largest).any() and openings is not None and len(openings):
                op = _rv.current_names(openings, "openings")
                new = _column(op, "new_harvest_gross_ha")
                keep = ~(new <= 0)  # NaN (no column) counts as holding a harvest
                op_p = pd.to_numeric(op["period"]).to_numpy(int)
                largest = np.array(
                    [
                        np.max(_column(op, "gross_area_ha")[keep & (op_p == p)], initial=0.0)
                        for p in periods
                    ]
                )
            limit = getattr(r, "max_opening_ha", None)
            lim = np.nan if limit is None else float(limit)
            if len(largest) and np.isfinite(largest).any():
                j = int(np.nanargmax(largest))
                x = float(largest[j])
                by_period = ", ".join(_num(v, 1) for v in largest)
                achieved = (
                    f"largest opening holding a harvest {x:,.1f} ha (gross), in "
                    f"{hz.period(int(periods[j]))}; by period: {by_period} ha"
                )
                other = _column(pdf, "largest_other_opening_ha")
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
                share = _column(pdf, "old_forest_share")
                if not np.isfinite(share).any():
                    share = _old_forest_shares(sched, ev, settings, hz)
            j = int(np.nanargmin(share)) if np.isfinite(share).any() else -1
            if j >= 0:
                x = float(share[j])
                achieved = (
                    f"smallest share {_pct(x)} in {where}{hz.period(j + 1)}, required {_pct(need)}"
                )
                add(key, text, achieved, judged(x >= need - 1e-9), x, need)
            else:
                add(key, text, "not measured", "not checked", limit=need)
        elif key == "flow_tolerance":
            tol = float(r.flow_tolerance)
            change = _changes(vol)
            achieved, ok = _flow_words(change, periods, tol=tol)
            worst = float(np.nanmax(np.abs(change))) if np.isfinite(change).any() else np.nan
            add(key, text, achieved, judged(ok), worst, tol)
        elif key == "non_declining":
            change = _changes(vol)
            falls = np.where(np.isfinite(change), change, 0.0)
            j = int(np.argmin(falls)) if len(falls) else 0
            if len(falls) and falls[j] < 0:
                achieved = (
                    f"largest fall {_pct(falls[j], sign=True)} ({hz.period(int(periods[j]))} "
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
                ending = float(np.nansum(_column(sched, "ending_value_npv")))
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
                achieved = f"standing volume at the end {_pct(x)} of the start"
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


def _changes(vol: np.ndarray) -> np.ndarray:
    """Relative change of each period's volume from the period before (NaN for the first)."""
    out = np.full(len(vol), np.nan)
    if len(vol) > 1:
        prev, cur = vol[:-1], vol[1:]
        with np.errstate(divide="ignore", invalid="ignore"):
            out[1:] = np.where(prev > 0, cur / prev - 1.0, np.where(cur > 0, np.inf, 0.0))
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
        parts.append(f"largest rise {_pct(up[j], sign=True)} (period {periods[j]})")
    if down.min() < 0:
        j = int(np.argmin(down))
        parts.append(f"largest fall {_pct(down[j], sign=True)} (period {periods[j]})")
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
    hz: _Horizon,
    among: np.ndarray | None = None,
) -> np.ndarray:
    """Gross-area share at least ``rules.old_forest_age_yr`` old at each mid-period, of all
    stands or of those in ``among`` (a mask)."""
    old = float(_rv.setting(settings, "rules.old_forest_age_yr"))
    delay = float(_rv.setting(settings, "regeneration.delay_yr", 0.0))
    age0 = _start_ages(schedule, settings)
    gross = np.nan_to_num(_column(schedule, "area_ha"))
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
    hz = _Horizon(settings, pdf)
    ident = id_col or str(_rv.setting(settings, "fields.id_field", "stand_id"))
    sched = _rv.current_names(schedule, "schedule")
    last = int(pdf["period"].iloc[-1]) if len(pdf) else 0
    last_m3 = float(_column(pdf, "harvest_volume_m3")[-1]) if len(pdf) else np.nan
    ltsy_rot = _rv.numeric(info.get("ltsy_rotation_m3_yr")) * hz.L
    ltsy_mai = _rv.numeric(info.get("ltsy_mai_m3_yr")) * hz.L
    with np.errstate(divide="ignore", invalid="ignore"):
        share_rot = last_m3 / ltsy_rot if ltsy_rot > 0 else np.nan
        share_mai = last_m3 / ltsy_mai if ltsy_mai > 0 else np.nan
    start = _rv.numeric(info.get("standing_volume_start_m3"))
    end = _rv.numeric(info.get("standing_volume_end_m3"))
    basis = "start and end"
    standing = _column(pdf, "standing_volume_m3")
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
            f"the end ({hz.at(hz.P * hz.L)}), {_pct(end / start if start else np.nan)} of "
            "the start."
        )
    elif basis == "mid-period":
        says.append(
            f"Standing volume: {start:,.0f} m³ in the middle of period 1 "
            f"({hz.at(0.5 * hz.L)}) and {end:,.0f} m³ in the middle of period {last} "
            f"({hz.at((last - 0.5) * hz.L)}), {_pct(end / start if start else np.nan)} of "
            "the first."
        )
    gross = np.nan_to_num(_column(sched, "area_ha"))
    total = float(gross.sum())
    if total > 0:
        delay = float(_rv.setting(settings, "regeneration.delay_yr", 0.0))
        ev = _rv.harvest_events(sched, harvests, ident)
        end_age = _rv.ages_at(_start_ages(sched, settings), ev, hz.P * hz.L, hz.L, delay)
        peak = ages.loc[ages["area_end_ha"].idxmax()]
        text = (
            f"Age classes at the end ({hz.at(hz.P * hz.L)}): the largest class is "
            f"{peak['age_class']} years with {peak['area_end_ha']:,.1f} ha "
            f"({_pct(peak['area_end_ha'] / total)} of the gross area)"
        )
        min_age = float(_rv.setting(settings, "rules.min_age_yr", 0.0) or 0.0)
        if min_age > 0:
            young = gross[end_age < min_age - 1e-9].sum() / total
            text += f"; {_pct(young)} is younger than the minimum harvest age ({min_age:g} years)"
        old_age = _rv.setting(settings, "rules.old_forest_age_yr")
        if old_age is not None:
            old = gross[end_age >= float(old_age) - 1e-9].sum() / total
            text += f"; {_pct(old)} is at least {float(old_age):g} years old"
        says.append(text + ".")
    if np.isfinite(share_rot):
        verdict = (
            "at or below it, so the late harvest can be kept up in the long run"
            if share_rot <= 1.0 + _SLACK
            else "above it, so the late harvest draws down the growing stock and cannot be "
            "kept up for ever at this level"
        )
        says.append(
            f"The harvest in the last period ({hz.text(last)}) is {_pct(share_rot, 0)} of the "
            f"LTSY at the economic rotation ({last_m3:,.0f} m³ against {ltsy_rot:,.0f} m³ per "
            f"period): {verdict}."
        )
    if np.isfinite(share_mai):
        says.append(
            f"It is {_pct(share_mai, 0)} of the LTSY at MAI culmination ({ltsy_mai:,.0f} m³ "
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


# ---------------------------------------------------------------------------------------
# HTML pieces
# ---------------------------------------------------------------------------------------
def _table(frame: pd.DataFrame, cols: Sequence[tuple[str, str, int]], cls: str = "") -> str:
    use = [(c, lbl, d) for c, lbl, d in cols if c in frame.columns]
    head = "".join(f"<th>{_esc(lbl)}</th>" for _c, lbl, _d in use)
    body = []
    for rec in frame.to_dict("records"):
        css = ' class="total"' if rec.get("_total") else ""
        tds = "".join(f"<td>{_esc(_num(rec[c], d))}</td>" for c, _l, d in use)
        body.append(f"<tr{css}>{tds}</tr>")
    return (
        f'<table class="{cls}"><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table>'
    )


def _period_frame(pdf: pd.DataFrame, hz: _Horizon) -> pd.DataFrame:
    """The periods table as the page shows it, with a totals row."""
    t = pdf.copy()
    t["_years"] = [hz.text(int(p)) for p in t["period"]]
    vol = _column(t, "harvest_volume_m3")
    t["_change_pct"] = [_signed(100.0 * c, 1) for c in _changes(vol)]
    lo, hi = _column(t, "flow_lower_m3"), _column(t, "flow_upper_m3")
    if np.isfinite(lo).any() or np.isfinite(hi).any():
        t["_flow_band"] = [
            "–" if not (np.isfinite(a) or np.isfinite(b))
            else f"{_num(a, 0) if np.isfinite(a) else '0'}–{_num(b, 0) if np.isfinite(b) else '…'}"
            for a, b in zip(lo, hi, strict=True)
        ]  # fmt: skip
    if "old_forest_share" in t.columns:
        t["_old_forest_pct"] = 100.0 * _column(t, "old_forest_share")
    for c in ("_old_forest_pct", "standing_volume_m3"):
        if c in t.columns and not np.isfinite(_column(t, c)).any():
            t = t.drop(columns=c)
    t["period"] = t["period"].astype(int).astype(str)
    area = np.nan_to_num(_column(t, "harvest_net_area_ha"))
    mean_age = _column(t, "mean_age_at_harvest_yr")
    ok = np.isfinite(mean_age) & (area > 0)
    total: dict[str, Any] = dict.fromkeys(t.columns, "")
    total.update({"period": "Total", "_years": hz.span(), "_total": True})
    for c in ("harvest_net_area_ha", "harvest_volume_m3", "gross_value", "npv",
              "stands_harvested"):  # fmt: skip
        if c in t.columns:
            total[c] = float(np.nansum(_column(t, c)))
    if ok.any():
        total["mean_age_at_harvest_yr"] = float(np.average(mean_age[ok], weights=area[ok]))
    if "largest_opening_ha" in t.columns:
        total["largest_opening_ha"] = float(np.nanmax(_column(t, "largest_opening_ha")))
    t["_total"] = False
    return pd.concat([t, pd.DataFrame([total])], ignore_index=True)


def _strata_pivot(strata_df: pd.DataFrame | None, hz: _Horizon) -> str:
    """Strata as rows, periods as columns: harvested volume (m³) / net area (ha) per cell."""
    if strata_df is None or not len(strata_df):
        return "<p>No strata.</p>"
    sdf = _rv.current_names(strata_df, "strata")
    vol = sdf.pivot_table(index="stratum", columns="period", values="harvest_volume_m3",
                          aggfunc="sum", fill_value=0.0)  # fmt: skip
    area = sdf.pivot_table(index="stratum", columns="period", values="harvest_net_area_ha",
                           aggfunc="sum", fill_value=0.0)  # fmt: skip
    periods = list(vol.columns)
    head = (
        "<th>Stratum</th>"
        + "".join(f"<th>{int(p)}<br><small>{_esc(hz.text(int(p)))}</small></th>" for p in periods)
        + "<th>Total</th>"
    )
    rows = []
    for s in vol.index:
        cells = "".join(
            f"<td>{_esc(_num(vol.loc[s, p], 0))}<br><small>"
            f"{_esc(_num(area.loc[s, p], 1))} ha</small></td>"
            for p in periods
        )
        tot = (f"<td><b>{_esc(_num(vol.loc[s].sum(), 0))}</b><br><small>"
               f"{_esc(_num(area.loc[s].sum(), 1))} ha</small></td>")  # fmt: skip
        rows.append(f"<tr><th>{_esc(s)}</th>{cells}{tot}</tr>")
    return (
        '<table class="num"><thead><tr>'
        + head
        + "</tr></thead><tbody>"
        + "".join(rows)
        + '</tbody></table><p class="note">Cells: harvested volume (m³) and harvest area '
        "(net, ha) by period.</p>"
    )


def _summary_value(key: str, v: Any, info: Mapping[str, Any]) -> str:
    x = _rv.numeric(v)
    if key == "verify_verdict":
        word, rest = _verdict_parts(v)
        return f"{word}: {rest}" if word and rest else (word or str(v))
    if not np.isfinite(x):
        return str(v)
    if key == "gap":
        return f"{100.0 * x:.2f} %"
    if key == "best_bound":
        method = str(info.get("best_bound_method") or "").strip()
        return f"{x:,.0f}" + (f" (method: {method})" if method else "")
    if key in _MONEY:
        return f"{x:,.0f}"
    if key in _VOLUME:
        return f"{x:,.0f}"
    if key == "solve_time_s":
        return f"{x:,.1f}"
    return str(v)


def _rules_html(rules: pd.DataFrame) -> str:
    if not len(rules):
        return '<p class="note">note: the plan records no settings, so its rules are unknown.</p>'
    body = []
    for rec in rules.to_dict("records"):
        check = str(rec["check"])
        css = {"passed": "ok", "failed": "bad"}.get(check, "na")
        body.append(
            f"<tr><td>{_esc(rec['rule'])}</td><td>{_esc(rec['achieved'])}</td>"
            f'<td class="{css}">{_esc(check or "–")}</td></tr>'
        )
    return (
        '<table class="rules"><thead><tr><th>Rule in force</th><th>What the plan achieved</th>'
        f"<th>Check</th></tr></thead><tbody>{''.join(body)}</tbody></table>"
        '<p class="note">Checks measured here from the plan tables; green-up and the unit '
        "restriction rest on the independent check (verify), which re-derives every rule "
        "from the stand polygons.</p>"
    )


def _age_table_html(ages: pd.DataFrame, hz: _Horizon) -> str:
    """Gross area and share by age class at the start, the middle and the end."""
    cols = ("area_start_ha", "area_mid_ha", "area_end_ha")
    tot = [float(ages[c].sum()) or 1.0 for c in cols]
    times = ages.attrs.get("times_yr", (0.0, hz.P * hz.L / 2, hz.P * hz.L))
    head = "".join(
        f'<th colspan="2">{w} ({_esc(hz.at(t))})</th>'
        for w, t in zip(("Start", "Middle", "End"), times, strict=True)
    )
    rows = "".join(
        f"<tr><td>{_esc(r['age_class'])}</td>"
        + "".join(
            f"<td>{_num(r[c], 1)}</td><td>{_num(100 * r[c] / t, 1)}</td>"
            for c, t in zip(cols, tot, strict=True)
        )
        + "</tr>"
        for r in ages.to_dict("records")
    )
    return (
        '<table class="num ages"><thead><tr><th rowspan="2">Age class (years)</th>'
        f"{head}</tr><tr>" + "<th>ha (gross)</th><th>%</th>" * 3 + "</tr></thead>"
        f"<tbody>{rows}</tbody></table>"
    )


def write_report(
    path: str | Path,
    run_info: Mapping[str, Any],
    periods_df: pd.DataFrame,
    strata_df: pd.DataFrame,
    chart_paths: Sequence[str | Path],
    map_href: str | None,
    cautions: Sequence[str] = CAUTIONS,
    *,
    settings: Any = None,
    schedule: pd.DataFrame | None = None,
    harvests: pd.DataFrame | None = None,
    openings: pd.DataFrame | None = None,
    id_col: str | None = None,
) -> None:
    """Write the one-page HTML report.

    Sections: the result (NPV, the best proven upper bound with its method, the gap to it,
    every bound recorded), the rules in force beside what the plan achieved, a
    sustainability statement (standing volume, age classes at the end, last-period harvest
    against the LTSY), the periods with calendar years and a totals row, harvest by
    stratum, the charts, the cautions and the run record.

    Parameters
    ----------
    path
        Target ``.html`` (written atomically).
    run_info
        The ``run`` table as a dict: ``npv``, ``best_bound``, ``best_bound_method``,
        ``gap``, ``bound_aspatial_lp``, ``bound_cpsat``, ``ending_value_npv``,
        ``ltsy_mai_m3_yr``, ``ltsy_rotation_m3_yr``, ``solver_status``,
        ``verify_verdict``, ``software`` ... (old keys are read too). Other keys are
        listed in the run record, except long texts (``settings_json``, ``yields_csv``).
    periods_df, strata_df
        The ``periods`` and ``strata`` tables.
    chart_paths
        PNGs to embed (base64), in order.
    map_href
        Link to the map, relative to the report (``None``: no link).
    cautions
        Cautions listed on the page.
    settings
        Settings of the plan (for the rules and calendar years; without them the rules
        section says the rules are unknown).
    schedule
        The ``schedule`` layer (rules achieved, sustainability); ``None`` leaves those
        sections out.
    harvests
        The ``harvests`` table (``None``: one harvest per stand, from the schedule).
    openings
        The ``openings`` layer.
    id_col
        Stand id column (default ``fields.id_field``).
    """
    path = Path(path)
    info = _rv.current_run_info(run_info)
    pdf = _rv.current_names(periods_df, "periods").sort_values("period").reset_index(drop=True)
    hz = _Horizon(settings, pdf)
    title = str(info.get("title") or f"Harvest plan: {path.name.removesuffix('.report.html')}")
    messages: list[str] = []
    if not hz.calendar:
        messages.append(
            "note: horizon.start_year is not set, so periods are given in years from the "
            "plan start (yr 0–5 ...), not calendar years"
        )

    summary = [
        (label, _summary_value(key, info[key], info))
        for key, label in _SUMMARY
        if key in info and str(info[key]) != ""
    ]
    shown = {k for k, _ in _SUMMARY} | _HIDDEN
    extra = [(k, str(v)) for k, v in info.items() if k not in shown and str(v) != ""]
    rows = "".join(f"<tr><th>{_esc(lbl)}</th><td>{_esc(val)}</td></tr>" for lbl, val in summary)
    extra_rows = "".join(f"<tr><th>{_esc(k)}</th><td>{_esc(v)}</td></tr>" for k, v in extra)
    word, _rest = _verdict_parts(info.get("verify_verdict"))
    if word == "failed":
        messages.append(
            "violation: the independent check failed; `spatialplan verify` lists every "
            "broken rule by stand and period"
        )
    elif not word:
        messages.append("note: no verdict of the independent check is recorded")

    rules_html = '<p class="note">note: no schedule given; rules not measured.</p>'
    sust_html = rules_html
    if schedule is not None and settings is not None:
        rules = rules_achieved(settings, schedule, pdf, info, harvests=harvests,
                               openings=openings, id_col=id_col)  # fmt: skip
        for rec in rules[rules["check"] == "failed"].to_dict("records"):
            messages.append(f"violation: {rec['rule']}: {rec['achieved']}")
        messages.extend(rules.attrs.get("notes", []))
        rules_html = _rules_html(rules)
        sust = sustainability(settings, schedule, pdf, info, harvests=harvests, id_col=id_col)
        if not np.isfinite(sust["share_of_ltsy_rotation"]):
            messages.append(
                "note: the plan records no LTSY (ltsy_rotation_m3_yr), so the last-period "
                "harvest is not compared with it"
            )
        if not sust["standing_basis"]:
            messages.append("note: the plan records no standing volume")
        sentences = "".join(f"<li>{_esc(s)}</li>" for s in sust["sentences"])
        sust_html = f'<ul class="sust">{sentences}</ul>{_age_table_html(sust["age_classes"], hz)}'
    elif settings is None:
        rules_html = _rules_html(pd.DataFrame())

    settings_block = ""
    if info.get("settings_json"):
        try:
            pretty = json.dumps(json.loads(str(info["settings_json"])), indent=2, sort_keys=True)
        except ValueError:
            pretty = str(info["settings_json"])
        settings_block = (
            f"<details><summary>All settings used</summary><pre>{_esc(pretty)}</pre></details>"
        )
    charts = []
    for cp in chart_paths:
        p = Path(cp)
        if not p.is_file():
            continue
        b64 = base64.b64encode(p.read_bytes()).decode("ascii")
        charts.append(
            f'<figure><img alt="{_esc(p.stem.replace("_", " "))}" '
            f'src="data:image/png;base64,{b64}"></figure>'
        )
    map_link = (
        f'<p class="maplink"><a href="{html.escape(map_href, quote=True)}">Open the map of '
        "harvest periods</a> (works offline)</p>"
        if map_href
        else ""
    )
    lead = f"{hz.P} periods of {hz.L:g} years, {hz.span()}"
    if word:
        lead += f" · independent check: {word}"
    msg_html = "".join(f'<li class="{m.split(":", 1)[0]}">{_esc(m)}</li>' for m in messages)
    cautions_html = "".join(f"<li>{_esc(c)}</li>" for c in cautions)
    period_table = _table(_period_frame(pdf, hz), _PERIOD_COLS, "num periods")
    record = (
        f'<table class="summary">{extra_rows}</table>' if extra_rows else "<p>Nothing more.</p>"
    )
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{_esc(title)}</title>
<style>
body{{font:15px/1.45 system-ui,sans-serif;margin:1.5rem auto;max-width:1150px;padding:0 1rem;
color:#222}}
h1{{font-size:1.6rem;margin-bottom:.2rem}} h2{{font-size:1.2rem;margin-top:1.8rem;
border-bottom:1px solid #ccc}}
.lead{{color:#444;margin-top:0}}
table{{border-collapse:collapse;margin:.5rem 0;font-size:.85rem}}
th,td{{border:1px solid #ccc;padding:3px 6px;vertical-align:top}}
thead th{{background:#eef0ec;font-weight:600}} table.num td{{text-align:right}}
.summary th{{text-align:left;background:#f7f7f5;font-weight:600;white-space:nowrap}}
.wide{{overflow-x:auto}} table.periods td:nth-child(2){{white-space:nowrap}}
table.periods th{{font-size:.8rem}}
tr.total td{{font-weight:700;background:#f4f4f0;border-top:2px solid #888}}
.rules td.ok{{color:#1d6b2f;font-weight:600}} .rules td.bad{{color:#a3161b;font-weight:700}}
.rules td.na{{color:#777}}
.msgs{{list-style:none;padding:0}} .msgs li{{padding:2px 8px;margin:2px 0;border-left:4px solid
#999}} .msgs li.violation{{border-color:#a3161b;background:#fbeaea}}
.msgs li.warning{{border-color:#c77c00;background:#fff4e0}}
.msgs li.note{{border-color:#6b8fb3;background:#f1f5f9}}
figure{{margin:1rem 0}} img{{max-width:100%;height:auto;border:1px solid #ddd}}
.cautions{{background:#fff7e6;border:1px solid #e0b050;padding:.6rem 1.2rem}}
.maplink{{font-size:1.1rem}} .note{{color:#555;font-size:.85rem}}
pre{{background:#f7f7f7;padding:.5rem;overflow:auto;font-size:.8rem}}
</style></head>
<body>
<h1>{_esc(title)}</h1>
<p class="lead">{_esc(lead)}</p>
{map_link}
<ul class="msgs">{msg_html}</ul>
<h2>Result</h2>
<table class="summary">{rows}</table>
<h2>Rules in force</h2>
{rules_html}
<h2>Sustainability</h2>
{sust_html}
<h2>Periods</h2>
<div class="wide">{period_table}</div>
<p class="note">Total row: sums over the periods; mean age weighted by net harvest area;
largest opening over all periods. Harvest areas are net of stream buffers; openings are
measured on the gross stand polygons.</p>
<h2>Harvest by stratum</h2>
{_strata_pivot(strata_df, hz)}
<h2>Charts</h2>
{"".join(charts) or "<p>No charts.</p>"}
<h2>Cautions</h2>
<ul class="cautions">{cautions_html}</ul>
<h2>Run record</h2>
{record}
{settings_block}
</body></html>
"""
    write_text_atomic(path, page, "report")


def review_paths(gpkg: str | Path, out_html: str | Path | None = None) -> dict[str, Path]:
    """Default paths beside ``NAME.gpkg``: ``map`` NAME.map.html, ``report``
    NAME.report.html, ``charts`` NAME_charts/ (``out_html`` overrides the map path)."""
    g = Path(gpkg)
    stem = g.with_suffix("")
    return {
        "map": Path(out_html) if out_html else stem.with_name(stem.name + ".map.html"),
        "report": stem.with_name(stem.name + ".report.html"),
        "charts": stem.with_name(stem.name + "_charts"),
    }


def write_review_files(
    gpkg: str | Path,
    schedule: Any,
    openings: Any,
    periods_df: pd.DataFrame,
    strata_df: pd.DataFrame,
    run_info: Mapping[str, Any],
    settings: Any,
    *,
    harvests: pd.DataFrame | None = None,
    out_html: str | Path | None = None,
    basemap: str | None = None,
    id_col: str = "stand_id",
    stratum_col: str = "stratum",
    reserve_col: str | None = "reserve",
    title: str | None = None,
    cautions: Sequence[str] = CAUTIONS,
) -> dict[str, Any]:
    """Write the map, the charts and the report that go with a plan GeoPackage.

    Used by ``spatialplan plan`` (after the GeoPackage is written) and ``spatialplan map``.

    Parameters
    ----------
    gpkg
        The plan GeoPackage; the review files are named after it (:func:`review_paths`).
    schedule, openings, periods_df, strata_df
        The plan's ``schedule`` and ``openings`` layers and ``periods`` and ``strata``
        tables.
    run_info
        The ``run`` table as a dict.
    settings
        Settings of the plan.
    harvests
        The ``harvests`` table, one row per harvest (``None``: one harvest per stand, as
        the schedule's ``period`` says).
    out_html
        Map path (default beside the GeoPackage).
    basemap
        Tile URL template for the map (none: no network needed).
    id_col, stratum_col, reserve_col
        Columns of the schedule.
    title
        Title of map and report.
    cautions
        Cautions shown on the map and in the report.

    Returns
    -------
    dict
        ``map``, ``report`` (paths), ``charts`` (list of PNG paths).
    """
    from spatialplan.charts import plan_charts
    from spatialplan.mapping import write_map

    paths = review_paths(gpkg, out_html)
    P = int(_rv.setting(settings, "horizon.periods", len(periods_df)))
    name = title or f"Harvest plan: {Path(gpkg).stem}"
    age_col = str(_rv.setting(settings, "fields.age_field", "age"))
    report_href = os.path.relpath(paths["report"].resolve(), paths["map"].resolve().parent)
    write_map(schedule, openings, paths["map"], id_col=id_col, stratum_col=stratum_col,
              reserve_col=reserve_col, periods=P, title=name, basemap=basemap,
              age_col=age_col if age_col in schedule.columns else "age", harvests=harvests,
              start_year=int(_rv.setting(settings, "horizon.start_year", 0) or 0),
              period_length_yr=float(_rv.setting(settings, "horizon.period_length_yr", 5.0)),
              report_href=Path(report_href).as_posix(), cautions=cautions)  # fmt: skip
    charts = plan_charts(periods_df, schedule, settings, paths["charts"], harvests=harvests,
                         run_info=run_info, id_col=id_col)  # fmt: skip
    href = os.path.relpath(paths["map"].resolve(), paths["report"].resolve().parent)
    info = {"title": name, **dict(run_info)}
    write_report(
        paths["report"], info, periods_df, strata_df, charts, Path(href).as_posix(), cautions,
        settings=settings, schedule=schedule, harvests=harvests, openings=openings,
        id_col=id_col,
    )  # fmt: skip
    return {"map": paths["map"], "report": paths["report"], "charts": charts}
