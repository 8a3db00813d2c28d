"""An independent check of a harvest schedule against every rule.

:func:`verify_schedule` trusts nothing the solver says. From the schedule layer alone (the
stand geometry, ids, start ages, yield keys and the harvest ``period`` column) and the run
settings it

* rebuilds the adjacency graph from the geometry,
* recomputes which stands are open in which period with its own code (not
  :mod:`spatialplan.rules`, which the problem builder uses),
* finds the openings of every period as plain connected components (networkx), and
* recomputes harvest volumes from the yield table,

then checks the area restriction (with green-up), the unit restriction, minimum harvest
age, reserves, the period range, even flow, non-declining flow, per-period volume and area
bounds and the ending-inventory floors.

How an over-size opening is named
---------------------------------
Only openings that contain a stand cut *in that period* can be a breach of the plan: an
opening without a new cut is a subset of an opening of the period before (stands only
green up as time passes), which was judged there.

* ``max_opening``: the stands cut in the period form, on their own, a connected group
  larger than the limit.
* ``green_up``: the stands cut in the period are within the limit on their own, but the
  opening exceeds it together with earlier cuts (or stands young at the start) that have
  not yet greened up.
* pre-existing condition: in period 1, an opening over the limit made only of stands that
  were young at the start, with no harvest of the plan in it. Reported, not a breach.
"""

from __future__ import annotations

import json
import math
import sqlite3
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import geopandas as gpd
import networkx as nx
import numpy as np
import pandas as pd

from spatialplan.adjacency import build_adjacency
from spatialplan.errors import InputError, SettingsError
from spatialplan.settings import Settings, settings_from_dict

__all__ = ["VerifyReport", "Violation", "read_plan", "verify_schedule"]

#: slack on areas (ha) so an opening of exactly the limit passes despite float sums
AREA_EPS_HA = 1e-6
#: relative slack on volume comparisons (rounding of values written to files)
REL_EPS = 1e-6
#: slack on ages (years)
AGE_EPS_YR = 1e-9
_TRUE_TEXT = {"1", "true", "t", "yes", "y", "reserve", "r", "x"}


@dataclass(frozen=True)
class Violation:
    """One broken rule (or one pre-existing condition).

    Attributes
    ----------
    rule
        ``max_opening``, ``green_up``, ``unit_restriction``, ``min_age``, ``reserve``,
        ``period_range``, ``even_flow``, ``non_declining``, ``volume_min``,
        ``volume_max``, ``area_min``, ``area_max``, ``ending_volume`` or ``ending_age``.
    period
        Planning period (1-based) or ``None`` for whole-horizon rules.
    stand_ids
        Stands involved.
    value
        The measured size (ha, m3, years, period number).
    limit
        The limit it is compared with.
    message
        One plain sentence.
    """

    rule: str
    period: int | None
    stand_ids: tuple[str, ...]
    value: float | None
    limit: float | None
    message: str

    def line(self) -> str:
        """One printable line."""
        per = f"period {self.period}" if self.period is not None else "horizon"
        ids = ",".join(self.stand_ids[:12]) + (
            f",... ({len(self.stand_ids)} stands)" if len(self.stand_ids) > 12 else ""
        )
        ids_part = f" stands {ids}" if ids else ""
        return f"{self.rule} {per}{ids_part}: {self.message}"


@dataclass(frozen=True, eq=False)
class VerifyReport:
    """What :func:`verify_schedule` found.

    Attributes
    ----------
    violations
        Broken rules; empty when the schedule is legal.
    preexisting
        Conditions over a limit at the start with no harvest of the plan in them.
    notes
        Other remarks (adjacency warnings, conversions, rules not checkable).
    openings
        Every opening of every period: ``period``, ``opening``, ``n_stands``,
        ``area_ha``, ``new_cut_ha``, ``stand_ids`` (comma-separated), ``positions``.
    periods
        Per period: ``period``, ``volume_m3``, ``area_ha``, ``n_stands``,
        ``max_opening_ha``.
    n_stands, n_periods
        Size of the checked schedule.
    """

    violations: list[Violation]
    preexisting: list[Violation]
    notes: list[str]
    openings: pd.DataFrame
    periods: pd.DataFrame
    n_stands: int
    n_periods: int
    rules_checked: tuple[str, ...] = field(default_factory=tuple)

    @property
    def ok(self) -> bool:
        """True when every rule holds."""
        return not self.violations

    @property
    def verdict(self) -> str:
        """One line: PASS or FAIL with counts per rule."""
        pre = (
            f"; {len(self.preexisting)} pre-existing condition(s) noted" if self.preexisting else ""
        )
        if self.ok:
            return (
                f"PASS: all rules hold for {self.n_stands} stands over {self.n_periods} "
                f"periods ({', '.join(self.rules_checked)}){pre}"
            )
        counts: dict[str, int] = {}
        for v in self.violations:
            counts[v.rule] = counts.get(v.rule, 0) + 1
        parts = ", ".join(f"{k} {c}" for k, c in counts.items())
        return f"FAIL: {len(self.violations)} violation(s) ({parts}){pre}"

    def to_frame(self) -> pd.DataFrame:
        """Violations and pre-existing conditions as one table (column ``kind``)."""
        rows = [
            {
                "kind": kind,
                "rule": v.rule,
                "period": v.period,
                "stand_ids": ",".join(v.stand_ids),
                "value": v.value,
                "limit": v.limit,
                "message": v.message,
            }
            for kind, items in (("violation", self.violations), ("preexisting", self.preexisting))
            for v in items
        ]
        cols = ["kind", "rule", "period", "stand_ids", "value", "limit", "message"]
        return pd.DataFrame(rows, columns=cols)


# ---------------------------------------------------------------------------------------
# reading the plan
# ---------------------------------------------------------------------------------------
def _read_run_table(path: Path) -> dict[str, str]:
    """The ``run`` key/value table of a plan GeoPackage ({} when there is none)."""
    try:
        con = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    except sqlite3.Error as exc:
        msg = f"{path} cannot be opened as a GeoPackage: {exc}"
        raise InputError(msg) from None
    try:
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if "run" not in tables:
            return {}
        cols = [r[1] for r in con.execute('PRAGMA table_info("run")')]
        if "key" not in cols or "value" not in cols:
            msg = (
                f"{path}: table 'run' needs text columns 'key' and 'value' (has {', '.join(cols)})"
            )
            raise InputError(msg)
        return {
            str(k): ("" if v is None else str(v))
            for k, v in con.execute('SELECT "key", "value" FROM "run"')
        }
    except sqlite3.DatabaseError as exc:
        msg = f"{path} cannot be read as a GeoPackage: {exc}"
        raise InputError(msg) from None
    finally:
        con.close()


def read_plan(
    gpkg_path: str | Path,
    overrides: dict[str, Any] | None = None,
    yields_path: str | Path | None = None,
    settings: Settings | None = None,
) -> tuple[gpd.GeoDataFrame, Settings | None, Any]:
    """Read a plan GeoPackage: the ``schedule`` layer, recorded settings and yield table.

    Parameters
    ----------
    gpkg_path
        Output of ``spatialplan plan`` (or any GeoPackage with a ``schedule`` layer).
    overrides
        Dotted-key settings overrides applied to the recorded settings (CLI flags).
    yields_path
        Yield-table CSV to use instead of the table recorded in the file.
    settings
        Settings to use instead of the recorded ones (``overrides`` are not applied to
        them; e.g. from a ``--settings`` file with the flags already applied).

    Returns
    -------
    schedule
        The schedule layer.
    settings
        Recorded settings with the overrides, or ``None`` when the file records none.
    yield_table
        :class:`~spatialplan.growth.YieldTable` from ``yields_path`` or the recorded
        ``yields_csv``, or ``None`` when neither exists.

    Raises
    ------
    InputError
        Missing file or ``schedule`` layer, unreadable recorded settings or yield table.
    """
    from spatialplan import growth

    path = Path(gpkg_path)
    if not path.is_file():
        msg = f"plan file not found: {path}"
        raise InputError(msg)
    import pyogrio

    try:
        layers = [str(x) for x in pyogrio.list_layers(path)[:, 0]]
    except Exception as exc:  # pyogrio raises its own DataSourceError types
        msg = f"{path} cannot be opened as a GeoPackage: {exc}"
        raise InputError(msg) from None
    if "schedule" not in layers:
        msg = f"{path} has no layer 'schedule' (layers: {', '.join(layers) or 'none'})"
        raise InputError(msg)
    schedule = gpd.read_file(path, layer="schedule")
    run = _read_run_table(path)
    if settings is None and run.get("settings_json"):
        try:
            data = json.loads(run["settings_json"])
        except json.JSONDecodeError as exc:
            msg = f"{path}: run.settings_json is not valid JSON: {exc}"
            raise InputError(msg) from None
        try:
            settings = settings_from_dict(data, path=f"{path}:run.settings_json")
        except SettingsError as exc:
            msg = f"{path}: recorded settings are not valid: {exc}"
            raise InputError(msg) from None
        if overrides:
            settings = settings.with_overrides(overrides)
    s_for_yields = settings or Settings().with_overrides(overrides or {})
    keys = s_for_yields.fields.yield_keys
    table = None
    if yields_path is not None:
        table = growth.load_yield_table(yields_path, keys, s_for_yields.yields)
    elif run.get("yields_csv"):
        table = growth.yield_table_from_csv_text(
            run["yields_csv"], keys, s_for_yields.yields, source=f"{path}:run.yields_csv"
        )
    return schedule, settings, table


# ---------------------------------------------------------------------------------------
# checking
# ---------------------------------------------------------------------------------------
def _is_true(values: pd.Series) -> np.ndarray:
    out = np.zeros(len(values), dtype=bool)
    for k, v in enumerate(values.to_numpy(dtype=object)):
        if v is None or (isinstance(v, float) and math.isnan(v)):
            continue
        if isinstance(v, bool | np.bool_):
            out[k] = bool(v)
        elif isinstance(v, int | float | np.integer | np.floating):
            out[k] = v != 0
        else:
            out[k] = str(v).strip().lower() in _TRUE_TEXT
    return out


def _growth_model(yields: Any, settings: Settings) -> Any:
    """A growth model from a GrowthModel, YieldTable or long-format DataFrame."""
    from spatialplan import growth

    if yields is None:
        msg = "verify needs a yield table (none recorded in the plan; pass --yields)"
        raise InputError(msg)
    if isinstance(yields, growth.GrowthModel):
        return yields
    if isinstance(yields, pd.DataFrame):
        yields = growth.yield_table_from_frame(
            yields, settings.fields.yield_keys, settings.yields, source="<yields frame>"
        )
    return growth.build_growth_model(yields, settings.growth, settings.fields.yield_keys)


def _green_up_by_stand(
    strata: np.ndarray, settings: Settings, model: Any, notes: list[str]
) -> np.ndarray:
    """Green-up delay per stand, in periods, worked out here from the settings."""
    r, length = settings.rules, settings.horizon.period_length_yr
    n = len(strata)
    if r.green_up_height_m is not None:
        out = np.zeros(n, dtype=np.int64)
        for lab in pd.unique(strata):
            delay = None
            for k in range(1, 1001):  # a new stand is k L years old k periods after its cut
                h = model.height(np.array([lab], dtype=object), np.array([k * length]))
                if h is None or np.isnan(h[0]):
                    msg = f"green-up by height: stratum {lab} has no height curve"
                    raise SettingsError(msg)
                if h[0] >= r.green_up_height_m:
                    delay = k
                    break
            out[strata == lab] = delay if delay is not None else settings.horizon.periods + 1
        return out
    if r.green_up_years is not None:
        g = 0
        while g * length < r.green_up_years - 1e-9:  # smallest whole number of periods
            g += 1
        notes.append(f"green-up of {r.green_up_years:g} years checked as {g} period(s)")
        return np.full(n, g, dtype=np.int64)
    return np.full(n, int(r.green_up_periods), dtype=np.int64)


def _project(schedule: gpd.GeoDataFrame, notes: list[str]) -> gpd.GeoDataFrame:
    if schedule.crs is None:
        notes.append("schedule layer has no CRS; coordinates taken as metres")
        return schedule
    if schedule.crs.is_geographic:
        utm = schedule.estimate_utm_crs()
        notes.append(f"geographic CRS projected to {utm.to_string()} for areas and adjacency")
        return schedule.to_crs(utm)
    return schedule


def _fmt_ids(ids: Sequence[str]) -> str:
    return ", ".join(ids[:20]) + (f" and {len(ids) - 20} more" if len(ids) > 20 else "")


def verify_schedule(
    schedule: gpd.GeoDataFrame,
    settings: Settings,
    yields: Any,
    period_field: str = "period",
) -> VerifyReport:
    """Check a harvest schedule against every rule, independently of the solver.

    Parameters
    ----------
    schedule
        One row per stand: geometry, the fields named in ``settings.fields`` (id, age at
        the start, yield keys, optional reserve flag), an optional ``net_area_ha`` column
        and the harvest period (integer ``1 .. P``; empty or 0 when not harvested).
    settings
        Rules, horizon and adjacency settings.
    yields
        :class:`~spatialplan.growth.GrowthModel`, :class:`~spatialplan.growth.YieldTable`
        or a long-format yield DataFrame; used for the flow and ending-inventory checks.
    period_field
        Column holding the harvest period.

    Returns
    -------
    VerifyReport

    Raises
    ------
    InputError
        Missing fields, duplicate stand ids or missing ages (all named at once).
    """
    from spatialplan import growth

    fm, r, hz = settings.fields, settings.rules, settings.horizon
    P, L = int(hz.periods), float(hz.period_length_yr)
    notes: list[str] = []
    needed = [fm.id_field, fm.age_field, *fm.yield_keys, period_field]
    if fm.reserve_field:
        needed.append(fm.reserve_field)
    missing = [c for c in dict.fromkeys(needed) if c not in schedule.columns]
    if missing:
        have = [c for c in schedule.columns if c != schedule.geometry.name]
        msg = (
            f"schedule layer lacks field(s) {', '.join(missing)} "
            f"(fields present: {', '.join(map(str, have))})"
        )
        raise InputError(msg)
    gdf = _project(schedule, notes)
    n = len(gdf)
    ids = gdf[fm.id_field].astype(str).to_numpy(dtype=object)
    dup = pd.Series(ids)[pd.Series(ids).duplicated()].unique().tolist()
    if dup:
        msg = f"schedule field {fm.id_field} has duplicate stand ids: {_fmt_ids(dup)}"
        raise InputError(msg)
    age = pd.to_numeric(gdf[fm.age_field], errors="coerce").to_numpy(dtype=float)
    if np.isnan(age).any():
        bad = list(ids[np.isnan(age)])
        msg = f"schedule field {fm.age_field} has no numeric age for stands {_fmt_ids(bad)}"
        raise InputError(msg)

    violations: list[Violation] = []
    preexisting: list[Violation] = []

    # ---- harvest period ---------------------------------------------------------------
    raw = gdf[period_field]
    per = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
    blank = raw.isna().to_numpy() | raw.astype(str).str.strip().isin(["", "nan", "None"]).to_numpy()
    textual = np.isnan(per) & ~blank
    per = np.where(np.isnan(per), 0.0, per)
    bad_p = textual | (per != np.round(per)) | (per < 0) | (per > P)
    for k in np.flatnonzero(bad_p):
        violations.append(
            Violation(
                "period_range",
                None,
                (str(ids[k]),),
                None,
                float(P),
                f"harvest period {raw.iloc[k]!r} is not a whole number in 1..{P} "
                "(empty or 0 = not harvested)",
            )
        )
    harvest = np.where(bad_p, 0, per).astype(np.int64)  # 0 = not harvested
    cut = harvest > 0

    # ---- areas ------------------------------------------------------------------------
    if schedule.crs is not None and schedule.crs.is_geographic:
        # Degrees: geodesic area on the ellipsoid (what a projection only approximates).
        geod = schedule.crs.get_geod()
        gross_ha = (
            np.array(
                [
                    abs(geod.geometry_area_perimeter(g)[0])
                    if g is not None and not g.is_empty
                    else 0.0
                    for g in schedule.geometry
                ],
                dtype=float,
            )
            / 10_000.0
        )
    else:
        gross_ha = gdf.geometry.area.to_numpy(dtype=float) / 10_000.0
    if "net_area_ha" in gdf.columns:
        net_ha = pd.to_numeric(gdf["net_area_ha"], errors="coerce").to_numpy(dtype=float)
        if np.isnan(net_ha).any():
            notes.append(
                f"net_area_ha empty for {int(np.isnan(net_ha).sum())} stands; polygon area used"
            )
            net_ha = np.where(np.isnan(net_ha), gross_ha, net_ha)
    else:
        net_ha = gross_ha

    # ---- minimum age, reserves --------------------------------------------------------
    age_cut = age + (harvest - 0.5) * L
    for k in np.flatnonzero(cut & (age_cut < r.min_age_yr - AGE_EPS_YR)):
        violations.append(
            Violation(
                "min_age",
                int(harvest[k]),
                (str(ids[k]),),
                float(age_cut[k]),
                r.min_age_yr,
                f"harvested at age {age_cut[k]:g} years (mid-period), below the minimum "
                f"of {r.min_age_yr:g}",
            )
        )
    if fm.reserve_field:
        reserve = _is_true(gdf[fm.reserve_field])
        for k in np.flatnonzero(cut & reserve):
            violations.append(
                Violation(
                    "reserve",
                    int(harvest[k]),
                    (str(ids[k]),),
                    None,
                    None,
                    f"reserve stand (field {fm.reserve_field}) is harvested",
                )
            )

    # ---- openness, rebuilt here from the period column and the start ages ------------
    strata = growth.stratum_labels(gdf, list(fm.yield_keys))
    need_model = (
        r.green_up_height_m is not None
        or r.flow_tolerance is not None
        or r.non_declining
        or any(
            v is not None
            for v in (
                r.period_volume_min_m3,
                r.period_volume_max_m3,
                r.ending_volume_fraction,
                r.ending_mean_age_yr,
            )
        )
    )
    model = _growth_model(yields, settings) if need_model or yields is not None else None
    G = _green_up_by_stand(strata, settings, model, notes)
    adj = build_adjacency(
        gdf.geometry,
        min_shared_edge_m=settings.adjacency.min_shared_edge_m,
        gap_tolerance_m=settings.adjacency.gap_tolerance_m,
        corner_adjacency=settings.adjacency.corner_adjacency,
        ids=list(ids),
    )
    notes.extend(adj.warnings)
    graph: nx.Graph = adj.graph
    open_rows = []
    opening_rows = []
    max_open = np.zeros(P)
    for p in range(1, P + 1):
        open_cut = cut & (harvest <= p) & (p <= harvest + G - 1)
        open_young = age + (p - 0.5) * L < G * L
        is_open = open_cut | open_young
        open_rows.append(is_open)
        new = harvest == p
        sub = graph.subgraph(np.flatnonzero(is_open).tolist())
        for o, comp in enumerate(sorted(nx.connected_components(sub), key=min)):
            members = np.array(sorted(comp), dtype=np.int64)
            area = float(gross_ha[members].sum())
            new_m = members[new[members]]
            opening_rows.append(
                {
                    "period": p,
                    "opening": o + 1,
                    "n_stands": len(members),
                    "area_ha": area,
                    "new_cut_ha": float(gross_ha[new_m].sum()),
                    "stand_ids": ",".join(str(ids[m]) for m in members),
                    "positions": members,
                }
            )
            max_open[p - 1] = max(max_open[p - 1], area)
            if r.max_opening_ha is None or area <= r.max_opening_ha + AREA_EPS_HA:
                continue
            member_ids = tuple(str(ids[m]) for m in members)
            if len(new_m) == 0:
                if p == 1:
                    preexisting.append(
                        Violation(
                            "max_opening",
                            p,
                            member_ids,
                            area,
                            r.max_opening_ha,
                            f"opening of {area:.2f} ha of stands young at the start is over "
                            f"the {r.max_opening_ha:g} ha limit with no harvest of the plan "
                            "in it (pre-existing condition)",
                        )
                    )
                continue  # later: part of an opening judged in an earlier period
            new_only = graph.subgraph(new_m.tolist())
            new_max = max(float(gross_ha[list(c)].sum()) for c in nx.connected_components(new_only))
            if new_max > r.max_opening_ha + AREA_EPS_HA:
                violations.append(
                    Violation(
                        "max_opening",
                        p,
                        member_ids,
                        area,
                        r.max_opening_ha,
                        f"opening of {area:.2f} ha exceeds {r.max_opening_ha:g} ha; stands "
                        f"cut in period {p} alone form {new_max:.2f} ha",
                    )
                )
            else:
                older = members[~new[members]]
                earlier = sorted({int(harvest[m]) for m in older if cut[m] and harvest[m] < p})
                young = [str(ids[m]) for m in older if not (cut[m] and harvest[m] < p)]
                why = []
                if earlier:
                    why.append(f"stands cut in period(s) {', '.join(map(str, earlier))}")
                if young:
                    why.append("stands young at the start")
                violations.append(
                    Violation(
                        "green_up",
                        p,
                        member_ids,
                        area,
                        r.max_opening_ha,
                        f"opening of {area:.2f} ha exceeds {r.max_opening_ha:g} ha: stands cut "
                        f"in period {p} ({float(gross_ha[new_m].sum()):.2f} ha) join "
                        f"{' and '.join(why)} that have not greened up",
                    )
                )
        if r.unit_restriction:
            e = adj.edges
            both = is_open[e[:, 0]] & is_open[e[:, 1]] if len(e) else np.zeros(0, bool)
            for i, j in e[both]:
                pair = (str(ids[i]), str(ids[j]))
                if new[i] or new[j]:
                    violations.append(
                        Violation(
                            "unit_restriction",
                            p,
                            pair,
                            None,
                            None,
                            "adjacent stands are open in the same period",
                        )
                    )
                elif p == 1 and not (cut[i] and harvest[i] < p) and not (cut[j] and harvest[j] < p):
                    preexisting.append(
                        Violation(
                            "unit_restriction",
                            p,
                            pair,
                            None,
                            None,
                            "adjacent stands are both young at the start (pre-existing condition)",
                        )
                    )

    # ---- volumes and flow -------------------------------------------------------------
    vol = np.zeros(P)
    area_p = np.zeros(P)
    n_cut = np.zeros(P, dtype=np.int64)
    if cut.any() and model is not None:
        v_ha = model.volume(strata[cut], age_cut[cut])
        np.add.at(vol, harvest[cut] - 1, v_ha * net_ha[cut])
    np.add.at(area_p, harvest[cut] - 1, net_ha[cut])
    np.add.at(n_cut, harvest[cut] - 1, 1)
    checked = ["period_range", "min_age", "max_opening/green_up"]
    if fm.reserve_field:
        checked.append("reserve")
    if r.unit_restriction:
        checked.append("unit_restriction")

    def eps(a: float, b: float) -> float:
        return REL_EPS * max(abs(a), abs(b)) + 1e-9

    if r.flow_tolerance is not None:
        checked.append("even_flow")
        tol = r.flow_tolerance
        for p in range(1, P):
            a, b = vol[p - 1], vol[p]
            if abs(b - a) > tol * a + eps(a, b):
                change = f"{(b - a) / a:+.1%}" if a > 0 else "from 0"
                violations.append(
                    Violation(
                        "even_flow",
                        p + 1,
                        (),
                        float(b),
                        float(a),
                        f"volume {b:,.0f} m3 changes {change} from period {p} ({a:,.0f} m3); "
                        f"allowed +-{tol:.0%}",
                    )
                )
    if r.non_declining:
        checked.append("non_declining")
        for p in range(1, P):
            a, b = vol[p - 1], vol[p]
            if b < a - eps(a, b):
                violations.append(
                    Violation(
                        "non_declining",
                        p + 1,
                        (),
                        float(b),
                        float(a),
                        f"volume falls to {b:,.0f} m3 from {a:,.0f} m3 in period {p}",
                    )
                )
    bounds = (
        ("volume_min", r.period_volume_min_m3, vol, "volume", "m3", False),
        ("volume_max", r.period_volume_max_m3, vol, "volume", "m3", True),
        ("area_min", r.period_area_min_ha, area_p, "harvest area", "ha", False),
        ("area_max", r.period_area_max_ha, area_p, "harvest area", "ha", True),
    )
    for rule, lim, arr, what, unit, upper in bounds:
        if lim is None:
            continue
        checked.append(rule)
        for p in range(1, P + 1):
            x = arr[p - 1]
            bad = x > lim + eps(x, lim) if upper else x < lim - eps(x, lim)
            if bad:
                word = "above the maximum" if upper else "below the minimum"
                violations.append(
                    Violation(
                        rule,
                        p,
                        (),
                        float(x),
                        float(lim),
                        f"{what} {x:,.2f} {unit} is {word} of {lim:,.2f} {unit}",
                    )
                )
    if model is not None and (
        r.ending_volume_fraction is not None or r.ending_mean_age_yr is not None
    ):
        end_age = np.where(cut, (P - harvest + 0.5) * L, age + P * L)
        if r.ending_volume_fraction is not None:
            checked.append("ending_volume")
            v0 = float((model.volume(strata, age) * net_ha).sum())
            v1 = float((model.volume(strata, end_age) * net_ha).sum())
            need = r.ending_volume_fraction * v0
            if v1 < need - eps(v1, need):
                violations.append(
                    Violation(
                        "ending_volume",
                        None,
                        (),
                        v1,
                        need,
                        f"standing volume at the end {v1:,.0f} m3 is below "
                        f"{r.ending_volume_fraction:.0%} of the start ({v0:,.0f} m3)",
                    )
                )
        if r.ending_mean_age_yr is not None:
            checked.append("ending_age")
            w = net_ha.sum()
            mean_age = float((end_age * net_ha).sum() / w) if w > 0 else 0.0
            if mean_age < r.ending_mean_age_yr - 1e-9:
                violations.append(
                    Violation(
                        "ending_age",
                        None,
                        (),
                        mean_age,
                        r.ending_mean_age_yr,
                        f"area-weighted mean age at the end {mean_age:.1f} years is below "
                        f"{r.ending_mean_age_yr:g}",
                    )
                )
    if "operable" not in gdf.columns:
        notes.append("operability is not checked (no terrain columns in the schedule)")
    periods = pd.DataFrame(
        {
            "period": np.arange(1, P + 1),
            "volume_m3": vol,
            "area_ha": area_p,
            "n_stands": n_cut,
            "max_opening_ha": max_open,
        }
    )
    openings = pd.DataFrame(
        opening_rows,
        columns=[
            "period",
            "opening",
            "n_stands",
            "area_ha",
            "new_cut_ha",
            "stand_ids",
            "positions",
        ],
    )
    return VerifyReport(
        violations=violations,
        preexisting=preexisting,
        notes=notes,
        openings=openings,
        periods=periods,
        n_stands=n,
        n_periods=P,
        rules_checked=tuple(checked),
    )
