"""Wire the stages together for ``check``, ``plan``, ``demo`` and ``compare``.

Stages run in one direction: inventory -> growth/economics -> terrain -> adjacency/rules
-> problem -> schedule -> verify -> outputs. Each function here takes the previous
stage's plain data and settings; nothing reaches back.
"""

from __future__ import annotations

import dataclasses
import logging
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd

from spatialplan.errors import InputError
from spatialplan.inventory import InventoryResult, match_strata, read_stands
from spatialplan.problem import FlowRules, PlanProblem
from spatialplan.settings import Settings

__all__ = [
    "PlanBundle",
    "PlanInputs",
    "PlanOutcome",
    "StandAreas",
    "build_problem",
    "load_inputs",
    "run_plan",
    "schedule_frame",
    "solve_plan",
    "stand_areas",
    "verify_plan",
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
        # A regenerated stratum without a yield curve is named now, not after terrain work.
        from spatialplan.prescriptions import regeneration_map

        regeneration_map(settings.regeneration, growth)
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


@dataclass(frozen=True)
class StandAreas:
    """Per-stand areas and flags as the planning problem sees them (rows by position).

    Attributes
    ----------
    area_ha
        Gross area from the geometry (openings are measured on it).
    net_area_ha
        Area net of stream buffers (the gross area when no streams are given); volumes
        and values are per net hectare.
    reserve
        Never harvested: flagged as reserve, or no net area left after the buffers.
    operable
        ``False`` where the terrain rules out every harvest system (all ``True`` without
        a DEM).
    """

    area_ha: np.ndarray
    net_area_ha: np.ndarray
    reserve: np.ndarray
    operable: np.ndarray

    @property
    def harvestable(self) -> np.ndarray:
        """Stands that may be harvested at some age: not reserved and operable."""
        return ~self.reserve & self.operable

    @property
    def harvestable_net_area_ha(self) -> float:
        """Net area of the harvestable stands: the land base the plan can cut.

        Each stand counts once, with its area net of stream buffers; reserves and
        inoperable stands count nothing, whatever their buffer area.

        Examples
        --------
        >>> import numpy as np
        >>> a = StandAreas(
        ...     area_ha=np.array([4.0, 4.0, 4.0]),
        ...     net_area_ha=np.array([3.4, 3.4, 4.0]),
        ...     reserve=np.array([True, False, False]),
        ...     operable=np.array([True, True, False]),
        ... )
        >>> round(a.harvestable_net_area_ha, 6)
        3.4
        """
        return float(self.net_area_ha[self.harvestable].sum())


def stand_areas(inputs: PlanInputs) -> StandAreas:
    """Gross and net area, reserve and operability of every stand, from validated inputs.

    The same rules :func:`build_problem` applies: the net area is the stream-buffer net
    area capped at the gross area; a stand with no net area left is a reserve; the DEM's
    ``operable`` flag marks stands no harvest system can reach.
    """
    st = inputs.inventory.stands
    area = st["area_ha"].to_numpy(dtype=float) if len(st) else np.zeros(0)
    net_area = area.copy()
    if inputs.net is not None:
        net_area = np.minimum(area, inputs.net.stands["net_area_ha"].to_numpy(dtype=float))
    reserve = (st["reserve"].to_numpy(dtype=bool) if len(st) else np.zeros(0, bool)) | (
        net_area <= 1e-6
    )
    operable = np.ones(len(area), dtype=bool)
    if inputs.terrain is not None:
        operable = inputs.terrain.stands["operable"].to_numpy(dtype=bool)
    return StandAreas(area, net_area, reserve, operable)


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
        old_forest_age_yr=r.old_forest_age_yr,
        old_forest_min_share=r.old_forest_min_share,
    )


def build_problem(inputs: PlanInputs, progress: Callable[[str], None] | None = None) -> PlanBundle:
    """Turn validated inputs into a :class:`PlanProblem` for the scheduler."""
    from spatialplan import adjacency, economics, prescriptions, rules

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
        s.adjacency.digitising_tolerance_m,
        s.adjacency.corner_adjacency,
        ids=st["stand_id"].tolist(),
    )
    # Overlaps are already reported (with their areas) by the inventory check.
    messages.extend(w for w in adj.warnings if "overlap" not in w)
    start_vol = float((inputs.growth.volume(strata, age0) * net_area).sum())
    npv_ha = values.npv_per_ha
    end_vol = values.ending_volume_m3_ha
    # Model I: every stand's harvest sequences with regeneration and the ending value; the
    # (n, P) arrays below keep describing the first harvest (diagnosis, charts).
    rx = prescriptions.build_prescriptions(
        strata, age0, eligible, inputs.growth, s, values.harvest_cost_per_m3, eligible_any_age
    )
    old_group = None
    if s.fields.unit_field:
        old_group = pd.factorize(st["unit"].fillna("").astype(str))[0].astype(np.int64)
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
        prescriptions=rx,
        old_forest_group=old_group,
    )
    problem.validate()
    n_res = int(reserve.sum())
    if n_res:
        messages.append(f"{n_res} stand(s) reserved (reserve flag or no net area)")
    if not operable.all():
        messages.append(f"{int((~operable).sum())} stand(s) inoperable on slope, never harvested")
    return PlanBundle(problem, values, adj, net_area, reserve, messages)


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
    # The two steps on their own serve callers that solve without writing (by-unit plans).
    bundle, result = solve_plan(inputs, on_progress=on_progress, on_stage=on_stage)
    return write_plan(inputs, bundle, result, out_path, on_stage=on_stage)


def solve_plan(
    inputs: PlanInputs,
    *,
    on_progress: Callable[[Any], None] | None = None,
    on_stage: Callable[[str], None] | None = None,
) -> tuple[PlanBundle, Any]:
    """Build the problem from the inputs and solve it: the solve step of ``plan``.

    Parameters
    ----------
    inputs
        From :func:`load_inputs` (or a subset of them, one management unit).
    on_progress
        Called with :class:`spatialplan.schedule.SolveProgress` while solving.
    on_stage
        Called with a short stage name as the run proceeds.

    Returns
    -------
    (PlanBundle, spatialplan.schedule.PlanResult)
    """
    from spatialplan import schedule

    stage = on_stage or (lambda _s: None)
    stage("building the model")
    bundle = build_problem(inputs, progress=stage)
    stage("solving")
    result = schedule.solve(bundle.problem, inputs.settings.solver, on_progress=on_progress)
    return bundle, result


def verify_plan(
    inputs: PlanInputs,
    bundle: PlanBundle,
    period: np.ndarray,
    settings: Settings | None = None,
) -> tuple[gpd.GeoDataFrame, Any]:
    """The ``schedule`` layer of a plan and its independent verification.

    Parameters
    ----------
    inputs, bundle
        What the plan was built from.
    period
        (n,) harvest period per stand, 0 = not harvested.
    settings
        Rules to verify against (default: ``inputs.settings``).

    Returns
    -------
    (geopandas.GeoDataFrame, spatialplan.verify.VerifyReport)
    """
    from spatialplan import verify

    sched = schedule_frame(inputs, bundle, period)
    return sched, verify.verify_schedule(sched, settings or inputs.settings, inputs.yield_table)


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
    from spatialplan import outputs, runtable

    stage = on_stage or (lambda _s: None)
    s = inputs.settings
    out_path = Path(out_path)
    stage("verifying")
    sched, report = verify_plan(inputs, bundle, result.period, verify_settings)
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
    run_df = runtable.run_table(
        runtable.plan_run_info(
            inputs,
            result,
            report.verdict,
            {
                "violations": str(len(report.violations)),
                "max_opening_ha": str(s.rules.max_opening_ha),
                **(run_extra or {}),
            },
        )
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
