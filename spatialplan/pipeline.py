"""Wire the stages together for ``check``, ``plan``, ``demo`` and ``compare``.

Stages run in one direction: inventory -> growth/economics -> terrain -> adjacency/rules
-> problem -> schedule -> verify -> outputs. Each function here takes the previous
stage's plain data and settings; nothing reaches back.
"""

from __future__ import annotations

import dataclasses
import logging
import platform
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd

from spatialplan import __version__
from spatialplan._io import sha256_file
from spatialplan.errors import InputError, SettingsError
from spatialplan.inventory import InventoryResult, match_strata, read_stands
from spatialplan.problem import FlowRules, PlanProblem
from spatialplan.settings import Settings

__all__ = [
    "PlanBundle",
    "PlanInputs",
    "PlanOutcome",
    "build_problem",
    "load_inputs",
    "run_plan",
    "schedule_frame",
    "write_plan",
]

log = logging.getLogger(__name__)

# Output columns added to the stand attributes in the `schedule` layer.
PLAN_COLUMNS = (
    "period",
    "harvest_year",
    "age_at_harvest",
    "volume_m3",
    "gross_value",
    "value",
    "stratum",
    "area_ha",
    "net_area_ha",
    "reserve",
    "green_up_periods",
    "slope_pct_mean",
    "steep_share",
    "harvest_system",
    "opening_id",
)


@dataclass
class PlanInputs:
    """Everything read and validated from the user's files."""

    settings: Settings
    inventory: InventoryResult
    growth: Any  # growth.GrowthModel
    yield_table: Any  # growth.YieldTable
    stands_path: Path
    yields_path: Path | None
    terrain: Any = None  # terrain.TerrainResult
    net: Any = None  # terrain.NetAreaResult
    messages: list[str] = field(default_factory=list)


@dataclass
class PlanBundle:
    """The problem and the per-stand arrays that explain it."""

    problem: PlanProblem
    values: Any  # economics.HarvestValues
    adjacency: Any  # adjacency.AdjacencyResult
    net_area_ha: np.ndarray
    reserve: np.ndarray
    messages: list[str] = field(default_factory=list)


@dataclass
class PlanOutcome:
    """What ``plan`` produced."""

    out_path: Path
    result: Any  # schedule.PlanResult
    verify: Any  # verify.VerifyReport
    schedule: gpd.GeoDataFrame
    periods: pd.DataFrame
    extra_files: list[Path] = field(default_factory=list)
    messages: list[str] = field(default_factory=list)


def load_inputs(
    stands_path: str | Path,
    yields_path: str | Path | None,
    settings: Settings,
    *,
    strict: bool = True,
) -> PlanInputs:
    """Read stands, yield table and optional terrain inputs; validate them together.

    Parameters
    ----------
    stands_path, yields_path
        Stand layer and yield-table CSV (``None`` when every stratum has a
        Chapman-Richards curve in ``[growth]``).
    settings
        Run settings.
    strict
        Raise :class:`InputError` on any inventory error (``plan``); ``check`` passes
        ``False`` to print every problem instead.
    """
    from spatialplan import growth as gr

    if settings.rules.reharvest:
        msg = "rules.reharvest = true is not supported yet; at most one harvest per stand"
        raise SettingsError(msg)
    inv = read_stands(stands_path, settings.fields)
    settings = dataclasses.replace(settings, fields=inv.fields)
    table = None
    if yields_path is not None:
        table = gr.load_yield_table(yields_path, inv.fields.yield_keys, settings.yields)
    elif not settings.growth.chapman_richards and strict:
        msg = "no yield table given: pass --yields YIELDS.csv (or Chapman-Richards curves in [growth])"
        raise InputError(msg)
    growth = None
    if table is not None or settings.growth.chapman_richards:
        growth = gr.build_growth_model(table, settings.growth, inv.fields.yield_keys)
        # Stratum labels exactly as the growth stage forms them.
        if len(inv.stands):
            inv.stands["stratum"] = gr.stratum_labels(inv.stands, list(inv.fields.yield_keys))
        inv = match_strata(
            inv, set(growth.strata), str(yields_path or "[growth]"), inv.fields.skip_unmatched
        )
    if strict:
        inv.raise_for_errors()
    inputs = PlanInputs(
        settings,
        inv,
        growth,
        table,
        Path(stands_path),
        None if yields_path is None else Path(yields_path),
    )
    t = settings.terrain
    if len(inv.stands) and not inv.errors:
        if t.dem:
            from spatialplan import terrain as tr

            inputs.terrain = tr.stand_terrain(inv.stands, t, t.dem)
            inputs.messages.extend(inputs.terrain.messages)
        if t.streams:
            from spatialplan import terrain as tr

            inputs.net = tr.net_area(inv.stands, t.streams, t, layer=t.streams_layer)
            inputs.messages.extend(inputs.net.messages)
    return inputs


def _flow_rules(settings: Settings, start_volume_m3: float) -> FlowRules:
    r = settings.rules
    return FlowRules(
        flow_tolerance=r.flow_tolerance,
        non_declining=r.non_declining,
        volume_min_m3=r.period_volume_min_m3,
        volume_max_m3=r.period_volume_max_m3,
        area_min_ha=r.period_area_min_ha,
        area_max_ha=r.period_area_max_ha,
        ending_volume_min_m3=(
            None if r.ending_volume_fraction is None else r.ending_volume_fraction * start_volume_m3
        ),
        ending_mean_age_min_yr=r.ending_mean_age_yr,
    )


def build_problem(inputs: PlanInputs, progress: Callable[[str], None] | None = None) -> PlanBundle:
    """Turn validated inputs into a :class:`PlanProblem` for the scheduler."""
    from spatialplan import adjacency, economics, rules

    s = inputs.settings
    st = inputs.inventory.stands
    n = len(st)
    P, L = s.horizon.periods, s.horizon.period_length_yr
    strata = st["stratum"].to_numpy(dtype=object)
    age0 = st["age"].to_numpy(dtype=float)
    area = st["area_ha"].to_numpy(dtype=float)
    messages: list[str] = []
    hc = None
    operable = np.ones(n, dtype=bool)
    if inputs.terrain is not None:
        tf = inputs.terrain.stands
        hc = tf["harvest_cost_per_m3"].to_numpy(dtype=float)
        operable = tf["operable"].to_numpy(dtype=bool)
    net_area = area.copy()
    if inputs.net is not None:
        net_area = np.minimum(area, inputs.net.stands["net_area_ha"].to_numpy(dtype=float))
    reserve = st["reserve"].to_numpy(dtype=bool) | (net_area <= 1e-6)
    cost_class = st["cost_class"].to_numpy(dtype=object) if s.fields.cost_class_field else None
    values = economics.harvest_values(
        strata, age0, inputs.growth, s, harvest_cost_per_m3=hc, cost_class=cost_class
    )
    green, gmsg = rules.green_up_periods_for_stands(strata, s, inputs.growth)
    messages.extend(gmsg)
    init_open = rules.initially_open(age0, green, P, L)
    eligible = rules.eligible_matrix(age0, reserve, s.rules.min_age_yr, P, L, operable)
    eligible_any_age = rules.eligible_matrix(age0, reserve, 0.0, P, L, operable)
    if n and not eligible.any():
        # Not an error (harvesting nothing is a legal plan) but never what was meant.
        messages.append(
            f"no stand may be harvested in any period: rules.min_age_yr = {s.rules.min_age_yr:g} "
            "(--min-age), reserves and operability exclude every stand; the plan harvests "
            "nothing"
        )
    if progress:
        progress("adjacency")
    adj = adjacency.build_adjacency(
        st.geometry,
        s.adjacency.min_shared_edge_m,
        s.adjacency.gap_tolerance_m,
        s.adjacency.corner_adjacency,
        ids=st["stand_id"].tolist(),
    )
    # Overlaps are already reported (with their areas) by the inventory check.
    messages.extend(w for w in adj.warnings if "overlap" not in w)
    start_vol = float((inputs.growth.volume(strata, age0) * net_area).sum())
    npv_ha = values.npv_per_ha
    end_vol = values.ending_volume_m3_ha
    problem = PlanProblem(
        stand_ids=st["stand_id"].to_numpy(dtype=object),
        area_ha=net_area,
        opening_area_ha=area,
        age_start_yr=age0,
        eligible=eligible,
        volume_m3_ha=values.volume_m3_ha,
        npv_per_ha=npv_ha,
        green_up_periods=np.asarray(green, dtype=int),
        initially_open=init_open,
        edges=adj.edges,
        periods=P,
        period_length_yr=L,
        max_opening_ha=s.rules.max_opening_ha,
        unit_restriction=s.rules.unit_restriction,
        flow=_flow_rules(s, start_vol),
        ending_volume_m3_ha=end_vol,
        ending_age_yr=values.ending_age_yr,
        eligible_no_min_age=eligible_any_age,
        min_age_yr=s.rules.min_age_yr,
    )
    if s.economics.include_ending_value:
        problem = _with_ending_value(problem, values)
    problem.validate()
    n_res = int(reserve.sum())
    if n_res:
        messages.append(f"{n_res} stand(s) reserved (reserve flag or no net area)")
    if not operable.all():
        messages.append(f"{int((~operable).sum())} stand(s) inoperable on slope, never harvested")
    return PlanBundle(problem, values, adj, net_area, reserve, messages)


def _with_ending_value(problem: PlanProblem, values: Any) -> PlanProblem:
    """Fold the discounted value of the standing inventory at the end into the objective.

    The value of leaving a stand uncut is a constant per stand that does not depend on
    the period chosen, except through the choice itself; adding (end value if harvested
    in p) - (end value if not harvested) to period p keeps the objective exact up to a
    constant (reported separately).
    """
    ev = values.ending_value_per_ha * values.ending_discount
    delta = ev[:, 1:] - ev[:, [0]]
    return dataclasses.replace(problem, npv_per_ha=problem.npv_per_ha + delta)


def schedule_frame(inputs: PlanInputs, bundle: PlanBundle, period: np.ndarray) -> gpd.GeoDataFrame:
    """The ``schedule`` layer: original attributes plus the plan, in the input CRS."""
    s = inputs.settings
    inv = inputs.inventory
    st = inv.stands
    P, L = s.horizon.periods, s.horizon.period_length_yr
    period = np.asarray(period, dtype=int)
    n = len(st)
    cut = period > 0
    col = np.clip(period - 1, 0, P - 1)
    rows = np.arange(n)
    hv = bundle.values
    t = (period - 0.5) * L
    attrs = inv.attributes.copy()
    renamed = {c: f"{c}_input" for c in attrs.columns if c in PLAN_COLUMNS}
    if renamed:
        attrs = attrs.rename(columns=renamed)
    area_net = bundle.net_area_ha
    out = pd.DataFrame(index=range(n))
    out["period"] = pd.Series(np.where(cut, period, 0), dtype="Int64").where(cut, pd.NA)
    out["harvest_year"] = np.where(cut, s.horizon.start_year + t, np.nan)
    out["age_at_harvest"] = np.where(cut, st["age"].to_numpy() + t, np.nan)
    out["volume_m3"] = np.where(cut, hv.volume_m3_ha[rows, col] * area_net, 0.0)
    out["gross_value"] = np.where(cut, hv.gross_value_per_ha[rows, col] * area_net, 0.0)
    out["value"] = np.where(cut, bundle.problem.npv_per_ha[rows, col] * area_net, 0.0)
    out["stratum"] = st["stratum"].to_numpy()
    out["area_ha"] = st["area_ha"].to_numpy()
    out["net_area_ha"] = area_net
    out["reserve"] = bundle.reserve.astype(int)
    out["green_up_periods"] = bundle.problem.green_up_periods
    if inputs.terrain is not None:
        tf = inputs.terrain.stands
        out["slope_pct_mean"] = tf["slope_pct_mean"].to_numpy()
        out["steep_share"] = tf["steep_share"].to_numpy()
        out["harvest_system"] = tf["harvest_system"].to_numpy()
    frame = pd.concat([attrs.reset_index(drop=True), out], axis=1)
    geom = st.geometry.to_crs(inv.source_crs) if st.crs != inv.source_crs else st.geometry
    return gpd.GeoDataFrame(frame, geometry=geom.values, crs=inv.source_crs)


def run_table(
    inputs: PlanInputs, result: Any, verdict: str, extra: dict[str, Any] | None = None
) -> pd.DataFrame:
    """Key/value rows recording everything needed to reproduce and audit the plan."""
    from importlib.metadata import version

    import geopandas
    import shapely

    s = inputs.settings
    rows: dict[str, Any] = {
        "software": f"spatialplan {__version__}",
        "python": platform.python_version(),
        "versions": (
            f"ortools {version('ortools')}; highspy {version('highspy')}; geopandas {geopandas.__version__}; "
            f"shapely {shapely.__version__}; numpy {np.__version__}; pandas {pd.__version__}"
        ),
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "stands_path": str(inputs.stands_path),
        "stands_layer": str(inputs.inventory.layer or ""),
        "stands_sha256": sha256_file(inputs.stands_path) if inputs.stands_path.is_file() else "",
        "yields_path": str(inputs.yields_path or ""),
        "yields_sha256": sha256_file(inputs.yields_path) if inputs.yields_path else "",
        "yields_csv": inputs.yield_table.to_csv_text() if inputs.yield_table is not None else "",
        "source_crs": inputs.inventory.source_crs.to_string(),
        "working_crs": inputs.inventory.working_crs.to_string(),
        "settings_json": s.to_json(),
        "solver_status": result.status,
        "npv": f"{result.npv:.2f}",
        "cpsat_bound": "" if result.cpsat_bound is None else f"{result.cpsat_bound:.2f}",
        "lp_bound": f"{result.lp_bound:.2f}",
        "gap": f"{result.gap:.6f}",
        "solve_time_s": f"{result.solve_time_s:.2f}",
        "verify_verdict": verdict,
    }
    for path_key in ("dem", "streams"):
        p = getattr(s.terrain, path_key)
        if p:
            rows[f"{path_key}_path"] = p
            rows[f"{path_key}_sha256"] = sha256_file(p) if Path(p).is_file() else ""
    for k, v in (result.stats or {}).items():
        rows[f"stat_{k}"] = v
    rows.update(extra or {})
    return pd.DataFrame({"key": list(rows), "value": [str(v) for v in rows.values()]})


def run_plan(
    inputs: PlanInputs,
    out_path: str | Path,
    *,
    on_progress: Callable[[Any], None] | None = None,
    on_stage: Callable[[str], None] | None = None,
) -> PlanOutcome:
    """Solve, verify and write a plan.

    Parameters
    ----------
    inputs
        From :func:`load_inputs`.
    out_path
        Output GeoPackage; map, report and charts are written beside it with the same stem
        unless ``output.no_map``.
    on_progress
        Called with :class:`spatialplan.schedule.SolveProgress` while solving.
    on_stage
        Called with a short stage name as the run proceeds.

    Returns
    -------
    PlanOutcome
    """
    from spatialplan import schedule

    stage = on_stage or (lambda _s: None)
    s = inputs.settings
    stage("building the model")
    bundle = build_problem(inputs, progress=stage)
    stage("solving")
    result = schedule.solve(bundle.problem, s.solver, on_progress=on_progress)
    return write_plan(inputs, bundle, result, out_path, on_stage=stage)


def write_plan(
    inputs: PlanInputs,
    bundle: PlanBundle,
    result: Any,
    out_path: str | Path,
    *,
    verify_settings: Settings | None = None,
    run_extra: dict[str, str] | None = None,
    messages: list[str] | None = None,
    on_stage: Callable[[str], None] | None = None,
) -> PlanOutcome:
    """Verify a solved plan independently and write the GeoPackage and review files.

    Parameters
    ----------
    inputs, bundle
        What the plan was built from.
    result
        Anything with the fields of :class:`spatialplan.schedule.PlanResult`.
    out_path
        Output GeoPackage.
    verify_settings
        Rules to verify against (default: ``inputs.settings``); by-unit planning checks
        the merged plan without the per-unit flow rules.
    run_extra
        More key/value rows for the ``run`` table.
    messages
        Messages to report instead of those of the inputs and the bundle.
    on_stage
        Called with a short stage name as the run proceeds.
    """
    from spatialplan import outputs, verify

    stage = on_stage or (lambda _s: None)
    s = inputs.settings
    out_path = Path(out_path)
    stage("verifying")
    sched = schedule_frame(inputs, bundle, result.period)
    report = verify.verify_schedule(sched, verify_settings or s, inputs.yield_table)
    openings, stand_opening = outputs.opening_table(
        sched,
        bundle.problem.edges,
        s.horizon.periods,
        bundle.problem.green_up_periods,
        bundle.problem.initially_open,
        s.rules.max_opening_ha,
        bundle.problem.opening_area_ha,
        id_col=s.fields.id_field,
    )
    sched["opening_id"] = stand_opening
    periods_df = outputs.period_table(sched, verify_settings or s, openings)
    strata_df = outputs.strata_table(sched, s)
    run_df = run_table(
        inputs,
        result,
        report.verdict,
        {
            "violations": str(len(report.violations)),
            "max_opening_ha": str(s.rules.max_opening_ha),
            **(run_extra or {}),
        },
    )
    stage("writing outputs")
    layers: dict[str, Any] = {
        "schedule": sched,
        "openings": openings,
        "periods": periods_df,
        "strata": strata_df,
        "run": run_df,
    }
    outputs.write_plan_geopackage(out_path, layers)
    extra: list[Path] = []
    if s.output.raster_out:
        outputs.write_period_raster(sched, s.output.raster_out, s.output.raster_cell_m)
        extra.append(Path(s.output.raster_out))
    if not s.output.no_map:
        from spatialplan.report import write_review_files

        info = dict(zip(run_df["key"], run_df["value"], strict=True))
        views = write_review_files(
            out_path,
            sched,
            openings,
            periods_df,
            strata_df,
            info,
            s,
            basemap=s.output.basemap,
            id_col=s.fields.id_field,
        )
        extra.extend([Path(views["map"]), Path(views["report"]), *map(Path, views["charts"])])
    if s.output.write_back:
        outputs.write_back(inputs.stands_path, layers)
    msgs = messages if messages is not None else inputs.messages + bundle.messages
    return PlanOutcome(out_path, result, report, sched, periods_df, extra, msgs)
