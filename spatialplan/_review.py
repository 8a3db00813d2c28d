"""Plain-data helpers shared by the review outputs (charts, map, report, assessment, re-render).

The review outputs read what the plan GeoPackage holds: the ``schedule`` layer (one row
per stand), the ``harvests`` table (one row per harvest), the ``periods`` table, the
``openings`` layer and the ``run`` table. Plans written before the estate model used other
column names; :func:`current_names` maps them once, on reading, so every writer below
uses only the names of the current format.

Timing follows ``docs/architecture.md``: periods ``p = 1 .. P`` of ``L`` years, a harvest
at mid-period ``(p - 0.5) L``; after a harvest the new crop is age 0
``regeneration.delay_yr`` years later.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from spatialplan.errors import OutputError

__all__ = [
    "CAUTIONS",
    "INOPERABLE_SYSTEM",
    "OLD_NAMES",
    "Horizon",
    "ages_at",
    "column",
    "current_names",
    "current_run_info",
    "fmt_number",
    "fmt_percent",
    "fmt_signed",
    "harvest_events",
    "inoperable_mask",
    "numeric",
    "period_array",
    "period_years",
    "setting",
    "verdict_parts",
    "verdict_word",
    "volume_changes",
    "years_text",
]

#: Cautions shown on the map and in the report.
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

#: Old column (or run key) -> current name, by table. Read-side only: nothing is written
#: under an old name.
OLD_NAMES: dict[str, dict[str, str]] = {
    "schedule": {
        "value": "npv",
        "harvest_year": "harvest_mid_year",
        "age_at_harvest": "age_at_harvest_yr",
    },
    "harvests": {
        "value": "npv",
        "harvest_year": "harvest_mid_year",
        "age_at_harvest": "age_at_harvest_yr",
    },
    "periods": {"harvest_area_ha": "harvest_net_area_ha", "discounted_value": "npv"},
    "strata": {"harvest_area_ha": "harvest_net_area_ha"},
    "openings": {"area_ha": "gross_area_ha", "new_harvest_ha": "new_harvest_gross_ha"},
    "run": {
        "cpsat_bound": "bound_cpsat",
        "lp_bound": "bound_aspatial_lp",
        "spatialplan_version": "software",
    },
}

#: The ``harvest_system`` word the terrain stage writes for a stand it cannot log.
INOPERABLE_SYSTEM = "inoperable"

#: Words of the bound methods, keyed by the run key of the bound.
BOUND_METHODS = {"bound_cpsat": "CP-SAT", "bound_aspatial_lp": "aspatial LP (HiGHS)"}


def current_names(frame: pd.DataFrame | None, kind: str) -> Any:
    """``frame`` with old column names of table ``kind`` renamed to the current ones.

    A column is renamed only when the current name is not there already, so a file that
    holds both keeps its current column. ``None`` stays ``None``; the input is not changed.

    Examples
    --------
    >>> old = pd.DataFrame({"period": [1], "value": [9.5], "age_at_harvest": [40.0]})
    >>> list(current_names(old, "schedule").columns)
    ['period', 'npv', 'age_at_harvest_yr']
    """
    if frame is None:
        return None
    table = OLD_NAMES.get(kind, {})
    ren = {o: n for o, n in table.items() if o in frame.columns and n not in frame.columns}
    return frame.rename(columns=ren) if ren else frame


def numeric(value: Any) -> float:
    """A run-table text or number as float; NaN when empty or not a number."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        return math.nan
    return x


def current_run_info(run_info: Mapping[str, Any]) -> dict[str, Any]:
    """Run facts under current keys; ``best_bound`` derived for plans that lack it.

    An old plan records ``cpsat_bound`` and ``lp_bound``; both are upper bounds on the NPV,
    so the best (tightest) proven bound is the smaller one.

    Examples
    --------
    >>> info = current_run_info({"npv": "90", "cpsat_bound": "99", "lp_bound": "100"})
    >>> info["best_bound"], info["best_bound_method"], info["bound_aspatial_lp"]
    (99.0, 'CP-SAT', '100')
    """
    info = dict(run_info)
    for old, new in OLD_NAMES["run"].items():
        if old in info and new not in info:
            info[new] = info.pop(old)
    if not np.isfinite(numeric(info.get("best_bound"))):
        found = [(numeric(info.get(k)), k) for k in BOUND_METHODS]
        found = [(v, k) for v, k in found if np.isfinite(v)]
        if found:
            v, k = min(found)
            info["best_bound"] = v
            info.setdefault("best_bound_method", BOUND_METHODS[k])
    return info


def setting(settings: Any, dotted: str, default: Any = None) -> Any:
    """Read a ``horizon.periods`` style key from a Settings tree or a nested mapping."""
    node = settings
    for part in dotted.split("."):
        if node is None:
            return default
        node = node.get(part) if isinstance(node, Mapping) else getattr(node, part, None)
    return default if node is None else node


def period_array(values: Any) -> np.ndarray:
    """Integer harvest period per stand, 0 where not harvested (null/NaN/0)."""
    s = pd.to_numeric(pd.Series(values), errors="coerce").fillna(0)
    return s.to_numpy(dtype=np.int64)


def period_years(periods: int, period_length_yr: float, start_year: float) -> np.ndarray:
    """(P, 2) calendar ``start_year``, ``end_year`` of each period (names contract).

    Examples
    --------
    >>> period_years(2, 5.0, 2025).tolist()
    [[2025.0, 2030.0], [2030.0, 2035.0]]
    """
    start = float(start_year) + np.arange(int(periods)) * float(period_length_yr)
    return np.c_[start, start + float(period_length_yr)]


def years_text(start: float, end: float, calendar: bool = True) -> str:
    """``2025–2030`` for calendar years; ``yr 0–5`` when the plan has no start year.

    Examples
    --------
    >>> years_text(2025, 2030), years_text(0, 2.5, calendar=False)
    ('2025–2030', 'yr 0–2.5')
    """
    text = f"{start:g}–{end:g}"
    return text if calendar else f"yr {text}"


def harvest_events(
    schedule: pd.DataFrame, harvests: pd.DataFrame | None, id_col: str
) -> pd.DataFrame:
    """Every harvest of the plan as a row: the stand's row position and the period.

    Parameters
    ----------
    schedule
        The ``schedule`` layer (one row per stand).
    harvests
        The ``harvests`` table (one row per harvest, stand id in ``id_col``), or ``None``:
        then the stand's ``harvest_periods`` text (``"3;12"``) when the layer has it, else
        its ``period``.
    id_col
        Stand id column of both.

    Returns
    -------
    pandas.DataFrame
        ``pos`` (row of the stand in ``schedule``), ``period``, ``harvest`` (1, 2, ... per
        stand) and, from the harvests table, ``age_at_harvest_yr``, ``volume_m3``,
        ``gross_value``, ``npv`` when present (current names); sorted by stand then period.

    Raises
    ------
    OutputError
        The harvests table lacks the id or period column, or names stands that the
        schedule does not hold (the ids are listed).
    """
    cols = ["pos", "period", "harvest"]
    if harvests is not None:
        h = current_names(pd.DataFrame(harvests), "harvests")
        missing = [c for c in (id_col, "period") if c not in h.columns]
        if missing:
            msg = (
                f"the harvests table lacks column(s) {', '.join(missing)} "
                f"(has {', '.join(map(str, h.columns))})"
            )
            raise OutputError(msg)
        where = pd.Series(np.arange(len(schedule)), index=schedule[id_col].astype(str).to_numpy())
        ids = h[id_col].astype(str)
        unknown = sorted(set(ids) - set(where.index))
        if unknown:
            msg = (
                f"the harvests table names stand(s) not in the schedule: {', '.join(unknown[:10])}"
            )
            raise OutputError(msg)
        out = pd.DataFrame(
            {"pos": where.reindex(ids.to_numpy()).to_numpy(), "period": period_array(h["period"])}
        )
        for c in ("age_at_harvest_yr", "volume_m3", "gross_value", "npv", "stratum"):
            if c in h.columns:
                out[c] = h[c].to_numpy()
        out = out[out["period"] > 0]
    elif "harvest_periods" in schedule.columns:
        text = schedule["harvest_periods"].fillna("").astype(str).to_numpy()
        pos: list[int] = []
        listed: list[int] = []
        for i, t in enumerate(text):
            for part in t.replace(",", ";").split(";"):
                if part.strip():
                    pos.append(i)
                    listed.append(int(float(part)))
        out = pd.DataFrame(
            {"pos": np.asarray(pos, dtype=np.int64), "period": np.asarray(listed, dtype=np.int64)}
        )
    else:
        per = period_array(schedule["period"]) if "period" in schedule else np.zeros(0, int)
        cut = np.flatnonzero(per > 0)
        out = pd.DataFrame({"pos": cut, "period": per[cut]})
        sched = current_names(schedule, "schedule")
        for c in ("age_at_harvest_yr", "volume_m3", "gross_value", "npv"):
            if c in sched.columns:
                out[c] = pd.to_numeric(sched[c], errors="coerce").to_numpy()[cut]
    out = out.astype({"pos": np.int64, "period": np.int64})
    out = out.sort_values(["pos", "period"], kind="stable").reset_index(drop=True)
    out["harvest"] = out.groupby("pos").cumcount().to_numpy(dtype=np.int64) + 1
    return out[cols + [c for c in out.columns if c not in cols]]


def ages_at(
    age_start_yr: np.ndarray,
    events: pd.DataFrame,
    time_yr: float,
    period_length_yr: float,
    delay_yr: float = 0.0,
) -> np.ndarray:
    """Age of every stand ``time_yr`` years after the plan start.

    A stand never harvested before ``time_yr`` is ``age_start + time_yr`` old. After its
    last harvest at mid-period ``(q - 0.5) L <= time_yr`` the new crop is
    ``time_yr - (q - 0.5) L - delay_yr`` old (0 while the ground waits to regenerate).

    Examples
    --------
    >>> ev = pd.DataFrame({"pos": [0, 0], "period": [1, 3]})
    >>> ages_at(np.array([50.0, 20.0]), ev, 10.0, 5.0).tolist()  # cut at 2.5 yr, 3rd not yet
    [7.5, 30.0]
    """
    age0 = np.asarray(age_start_yr, dtype=float)
    out = age0 + float(time_yr)
    if len(events):
        t_cut = (events["period"].to_numpy(dtype=float) - 0.5) * float(period_length_yr)
        done = t_cut <= float(time_yr) + 1e-9
        last = np.full(len(age0), -np.inf)
        np.maximum.at(last, events["pos"].to_numpy(dtype=np.int64)[done], t_cut[done])
        cut = np.isfinite(last)
        out[cut] = np.maximum(float(time_yr) - last[cut] - float(delay_yr), 0.0)
    return out


def inoperable_mask(schedule: pd.DataFrame) -> np.ndarray:
    """Stands the plan may not log: ``operable`` = 0, or ``harvest_system`` = inoperable."""
    bad = np.zeros(len(schedule), dtype=bool)
    if "operable" in schedule.columns:
        op = pd.to_numeric(schedule["operable"], errors="coerce")
        bad |= (op == 0).to_numpy()
    if "harvest_system" in schedule.columns:
        bad |= (schedule["harvest_system"].astype(str).str.lower() == INOPERABLE_SYSTEM).to_numpy()
    return bad


def verdict_word(verdict: Any) -> str:
    """``passed`` / ``failed`` from the recorded verdict of the independent check, else "".

    Examples
    --------
    >>> verdict_word("PASS: all rules hold"), verdict_word("failed: 2 violation(s)")
    ('passed', 'failed')
    """
    head = str(verdict or "").strip().lower()
    if head.startswith("pass"):
        return "passed"
    if head.startswith("fail"):
        return "failed"
    return ""


def fmt_number(v: Any, digits: int) -> str:
    """A table cell: ``1,234.5``, ``yes``/``no`` for flags, ``–`` when not finite."""
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


def fmt_percent(x: float, digits: int = 1, sign: bool = False) -> str:
    """A share as ``12.5 %`` (``+12.5 %`` with ``sign``), ``–`` when not finite."""
    if not np.isfinite(x):
        return "–"
    return fmt_signed(100.0 * x, digits) + " %" if sign else f"{100.0 * x:.{digits}f} %"


def fmt_signed(x: float, digits: int) -> str:
    """``+4.1`` / ``−9.8`` (a true minus sign), ``–`` when not finite."""
    if not np.isfinite(x):
        return "–"
    return f"{x:+,.{digits}f}".replace("-", "−")


class Horizon:
    """Periods and their years, as the report states them."""

    def __init__(self, settings: Any, periods_df: pd.DataFrame | None) -> None:
        self.P = int(setting(settings, "horizon.periods", 0) or 0)
        if not self.P and periods_df is not None and len(periods_df):
            self.P = int(pd.to_numeric(periods_df["period"]).max())
        self.L = float(setting(settings, "horizon.period_length_yr", 5.0))
        self.start_year = float(setting(settings, "horizon.start_year", 0) or 0)
        self.calendar = self.start_year != 0
        self.years = period_years(self.P, self.L, self.start_year)
        if periods_df is not None and {"start_year", "end_year"} <= set(periods_df.columns):
            got = periods_df.sort_values("period")[["start_year", "end_year"]].to_numpy(float)
            if got.shape == self.years.shape:
                self.years = got

    def text(self, p: int) -> str:
        """``2025–2030`` for period ``p`` (1-based)."""
        if not 1 <= p <= self.P:
            return "–"
        a, b = self.years[p - 1]
        return years_text(a, b, self.calendar)

    def span(self) -> str:
        """The whole horizon, ``2025–2075``."""
        if not self.P:
            return "–"
        return years_text(self.years[0, 0], self.years[-1, 1], self.calendar)

    def at(self, t_yr: float) -> str:
        """A time in years from the start as a calendar year (or ``year t``)."""
        return f"{self.start_year + t_yr:g}" if self.calendar else f"year {t_yr:g}"

    def period(self, p: int) -> str:
        """``period 3 (2035–2040)``."""
        return f"period {p} ({self.text(p)})"


def column(frame: pd.DataFrame | None, name: str) -> np.ndarray:
    """A column as floats (NaN where missing or not a number; all NaN when absent)."""
    if frame is None or name not in frame.columns:
        return np.full(0 if frame is None else len(frame), np.nan)
    return pd.to_numeric(frame[name], errors="coerce").to_numpy(float)


def verdict_parts(verdict: Any) -> tuple[str, str]:
    """(``passed``/``failed``/"", the rest of the recorded verdict)."""
    text = str(verdict or "").strip()
    word = verdict_word(text)
    if word:
        rest = text.split(":", 1)[1].strip() if ":" in text else ""
        return word, rest
    return "", text


def volume_changes(vol: np.ndarray) -> np.ndarray:
    """Relative change of each period's volume from the period before (NaN for the first)."""
    out = np.full(len(vol), np.nan)
    if len(vol) > 1:
        prev, cur = vol[:-1], vol[1:]
        with np.errstate(divide="ignore", invalid="ignore"):
            out[1:] = np.where(prev > 0, cur / prev - 1.0, np.where(cur > 0, np.inf, 0.0))
    return out
