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
    "chosen_prescriptions",
    "harvests_frame",
    "load_inputs",
    "plan_layers",
    "run_plan",
    "schedule_frame",
    "solve_plan",
    "stand_areas",
    "verify_plan",
    "write_plan",
]

log = logging.getLogger(__name__)

# Output columns added to the stand attributes in the `schedule` layer (docs/architecture.md).
PLAN_COLUMNS = (
    "period",
    "harvest_count",
    "harvest_periods",
    "harvest_mid_year",
    "age_at_harvest_yr",
    "volume_m3",
    "gross_value",
    "npv",
    "ending_value_npv",
    "stratum",
    "area_ha",
    "net_area_ha",
    "reserve",
    "operable",
    "green_up_periods",
    "slope_pct_mean",
    "steep_share",
    "harvest_system",
    "opening_id",
)

# Columns of the `harvests` table after the stand id (named as the input id field).
HARVEST_COLUMNS = (
    "harvest",
    "period",
    "harvest_mid_year",
    "age_at_harvest_yr",
    "stratum",
    "volume_m3",
    "gross_value",
    "npv",
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
    messages: list[str] = []
    areas = stand_areas(inputs)
    area, net_area = areas.area_ha, areas.net_area_ha
    reserve, operable = areas.reserve, areas.operable
    hc = None
    if inputs.terrain is not None:
        hc = inputs.terrain.stands["harvest_cost_per_m3"].to_numpy(dtype=float)
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
    cap_note = prescriptions.harvest_cap(s)[1]
    if cap_note:
        messages.append(cap_note)
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


def chosen_prescriptions(problem: PlanProblem, plan: Any) -> np.ndarray:
    """(n,) prescription index (global, into ``problem.rx()``) of every stand's plan.

    Parameters
    ----------
    problem
        The planning problem.
    plan
        A :class:`spatialplan.schedule.PlanResult` (its ``prescription``; a result that
        holds only a ``period`` array means one harvest per stand in that period, 0 =
        none) or an (n,) array of prescription indices.

    Raises
    ------
    ValueError
        A period array names a period that is none of a stand's prescriptions, or the
        indices are out of range or belong to other stands.
    """
    from spatialplan.schedule.model import plan_from_periods

    rx = problem.rx()
    if hasattr(plan, "period"):
        k = getattr(plan, "prescription", None)
        if k is None:
            return plan_from_periods(rx, np.asarray(plan.period, dtype=np.int64))
        plan = k
    k = np.asarray(plan, dtype=np.int64)
    n = problem.n_stands
    inside = k.shape == (n,) and (not n or (k.min() >= 0 and k.max() < rx.n_prescriptions))
    if not inside or np.any(rx.stand_of[k] != np.arange(n)):
        msg = f"a plan needs one prescription of each stand ({n} stands)"
        raise ValueError(msg)
    return k


@dataclass(frozen=True)
class _Harvests:
    """Every harvest of a plan by position (rows sorted by stand, then period)."""

    stand: np.ndarray  # (H,) stand position
    number: np.ndarray  # (H,) 1, 2, ... per stand
    period: np.ndarray  # (H,) 1-based
    age_yr: np.ndarray  # (H,) age of the crop cut, at mid-period
    stratum: np.ndarray  # (H,) stratum of the crop cut
    volume_m3: np.ndarray  # (H,) on the stand's net area
    gross_value: np.ndarray  # (H,) volume x price, undiscounted
    npv: np.ndarray  # (H,) discounted net value, regeneration cost included
    crops: list[np.ndarray]  # crops[c]: (n,) stratum standing after c harvests


def _crop_strata(inputs: PlanInputs, count: int) -> list[np.ndarray]:
    """``crops[c]``: (n,) stratum standing after ``c`` harvests, ``c = 0 .. count``."""
    from spatialplan.prescriptions import regenerated_strata, regeneration_map

    crops = [inputs.inventory.stands["stratum"].to_numpy(dtype=object)]
    if count > 0:
        regen = regeneration_map(inputs.settings.regeneration, inputs.growth)
        for _ in range(count):
            crops.append(regenerated_strata(crops[-1], regen, inputs.growth))
    return crops


def _plan_harvests(inputs: PlanInputs, bundle: PlanBundle, k: np.ndarray) -> _Harvests:
    """The harvests of prescriptions ``k`` with the crop each cuts, its volume and values.

    Volumes and NPVs come from the prescriptions (what the scheduler optimised), per ha
    times the stand's net area; the crop's age and stratum follow the regrowth convention
    of :mod:`spatialplan.prescriptions`; the gross value is volume x price by the crop's
    mean diameter (:func:`spatialplan.economics.stumpage_price`).
    """
    from spatialplan.economics import stumpage_price

    s = inputs.settings
    L, delay = s.horizon.period_length_yr, s.regeneration.delay_yr
    rx = bundle.problem.rx()
    h0 = rx.harvest_start[k]
    counts = (rx.harvest_start[k + 1] - h0).astype(np.int64)
    stand = np.repeat(np.arange(len(k)), counts)
    offset = np.arange(int(counts.sum())) - np.repeat(np.cumsum(counts) - counts, counts)
    h = np.repeat(h0, counts) + offset
    period = np.asarray(rx.harvest_period, dtype=np.int64)[h]
    first = offset == 0
    previous = np.where(
        first, 0, np.asarray(rx.harvest_period, dtype=np.int64)[np.maximum(h - 1, 0)]
    )
    age0 = inputs.inventory.stands["age"].to_numpy(dtype=float)
    age = np.where(first, age0[stand] + (period - 0.5) * L, (period - previous) * L - delay)
    crops = _crop_strata(inputs, int(counts.max(initial=0)))
    stratum = np.empty(len(h), dtype=object)
    for c in range(len(crops) - 1):
        at = offset == c
        stratum[at] = crops[c][stand[at]]
    net = np.asarray(bundle.net_area_ha, dtype=float)[stand]
    vol_ha = np.asarray(rx.harvest_volume_m3_ha, dtype=float)[h]
    if len(h):
        grown = np.maximum(age, 0.0)
        price = stumpage_price(inputs.growth.diameter(stratum, grown), s.economics)
    else:
        price = np.zeros(0)
    return _Harvests(
        stand=stand,
        number=offset + 1,
        period=period,
        age_yr=age,
        stratum=stratum,
        volume_m3=vol_ha * net,
        gross_value=vol_ha * price * net,
        npv=np.asarray(rx.harvest_npv_per_ha, dtype=float)[h] * net,
        crops=crops,
    )


def _harvests_frame(inputs: PlanInputs, hv: _Harvests) -> pd.DataFrame:
    s = inputs.settings
    L = s.horizon.period_length_yr
    ids = inputs.inventory.attributes[s.fields.id_field].to_numpy()
    return pd.DataFrame(
        {
            s.fields.id_field: ids[hv.stand],
            "harvest": hv.number.astype(np.int64),
            "period": hv.period.astype(np.int64),
            "harvest_mid_year": s.horizon.start_year + (hv.period - 0.5) * L,
            "age_at_harvest_yr": hv.age_yr,
            "stratum": hv.stratum.astype(str),
            "volume_m3": hv.volume_m3,
            "gross_value": hv.gross_value,
            "npv": hv.npv,
        }
    )


def harvests_frame(inputs: PlanInputs, bundle: PlanBundle, plan: Any) -> pd.DataFrame:
    """The ``harvests`` table: one row per harvest of the plan, sorted by stand then period.

    Parameters
    ----------
    inputs, bundle
        What the plan was built from.
    plan
        A :class:`spatialplan.schedule.PlanResult` or an (n,) array of prescription
        indices (:func:`chosen_prescriptions`).

    Returns
    -------
    pandas.DataFrame
        The stand id (column named as ``fields.id_field``), ``harvest`` (1, 2, ... per
        stand), ``period``, ``harvest_mid_year`` (calendar year at mid-period),
        ``age_at_harvest_yr`` and ``stratum`` of the crop cut, ``volume_m3`` and
        ``gross_value`` (volume x price, undiscounted) on the stand's net area, ``npv``
        (that harvest's discounted net value, regeneration cost included, the ending
        value of the stand excluded).
    """
    k = chosen_prescriptions(bundle.problem, plan)
    return _harvests_frame(inputs, _plan_harvests(inputs, bundle, k))


def _schedule_frame(
    inputs: PlanInputs, bundle: PlanBundle, k: np.ndarray, hv: _Harvests
) -> gpd.GeoDataFrame:
    s = inputs.settings
    inv = inputs.inventory
    st = inv.stands
    L = s.horizon.period_length_yr
    n = len(st)
    rx = bundle.problem.rx()
    attrs = inv.attributes.copy()
    renamed = {c: f"{c}_input" for c in attrs.columns if c in PLAN_COLUMNS}
    if renamed:
        attrs = attrs.rename(columns=renamed)
    area_net = np.asarray(bundle.net_area_ha, dtype=float)
    count = np.bincount(hv.stand, minlength=n).astype(np.int64)
    cut = count > 0
    first = np.zeros(n, dtype=np.int64)
    first_row = np.flatnonzero(hv.number == 1)
    first[hv.stand[first_row]] = first_row
    period = np.where(cut, hv.period[first] if len(hv.period) else 0, 0)
    joined = pd.Series(hv.period.astype(str)).groupby(hv.stand).agg(";".join)
    out = pd.DataFrame(index=range(n))
    out["period"] = pd.Series(period, dtype="Int64").where(cut, pd.NA)
    out["harvest_count"] = count
    out["harvest_periods"] = joined.reindex(range(n), fill_value="").to_numpy(dtype=object)
    out["harvest_mid_year"] = np.where(cut, s.horizon.start_year + (period - 0.5) * L, np.nan)
    out["age_at_harvest_yr"] = np.where(cut, hv.age_yr[first] if len(hv.age_yr) else 0, np.nan)
    out["volume_m3"] = np.bincount(hv.stand, weights=hv.volume_m3, minlength=n)
    out["gross_value"] = np.bincount(hv.stand, weights=hv.gross_value, minlength=n)
    # The stand's share of the plan NPV: its prescription's value (harvests and the
    # discounted ending value), so the column adds up to the plan's NPV.
    out["npv"] = np.asarray(rx.npv_per_ha, dtype=float)[k] * area_net
    out["ending_value_npv"] = np.asarray(rx.ending_value_per_ha, dtype=float)[k] * area_net
    out["stratum"] = st["stratum"].to_numpy()
    out["area_ha"] = st["area_ha"].to_numpy()
    out["net_area_ha"] = area_net
    out["reserve"] = bundle.reserve.astype(int)
    out["operable"] = stand_areas(inputs).operable.astype(int)
    out["green_up_periods"] = bundle.problem.green_up_periods
    if inputs.terrain is not None:
        tf = inputs.terrain.stands
        out["slope_pct_mean"] = tf["slope_pct_mean"].to_numpy()
        out["steep_share"] = tf["steep_share"].to_numpy()
        out["harvest_system"] = tf["harvest_system"].to_numpy()
    frame = pd.concat([attrs.reset_index(drop=True), out], axis=1)
    geom = st.geometry.to_crs(inv.source_crs) if st.crs != inv.source_crs else st.geometry
    return gpd.GeoDataFrame(frame, geometry=geom.values, crs=inv.source_crs)


def schedule_frame(inputs: PlanInputs, bundle: PlanBundle, plan: Any) -> gpd.GeoDataFrame:
    """The ``schedule`` layer: original attributes plus the plan, in the input CRS.

    Parameters
    ----------
    inputs, bundle
        What the plan was built from.
    plan
        A :class:`spatialplan.schedule.PlanResult` or an (n,) array of prescription
        indices (:func:`chosen_prescriptions`).

    Returns
    -------
    geopandas.GeoDataFrame
        One row per stand: its attributes (an attribute named like an output column is
        kept as ``<name>_input``), then ``period`` (first harvest, null when none),
        ``harvest_count``, ``harvest_periods`` (``"3;12"``), ``harvest_mid_year`` and
        ``age_at_harvest_yr`` (first harvest), ``volume_m3`` and ``gross_value`` (all
        harvests), ``npv`` (the stand's share of the plan NPV: every harvest and the
        discounted ending value), ``ending_value_npv``, ``stratum``, ``area_ha`` (gross),
        ``net_area_ha``, ``reserve``, ``operable``, ``green_up_periods`` and, with a DEM,
        ``slope_pct_mean``, ``steep_share``, ``harvest_system``. ``opening_id`` is added by
        :func:`plan_layers`.
    """
    k = chosen_prescriptions(bundle.problem, plan)
    return _schedule_frame(inputs, bundle, k, _plan_harvests(inputs, bundle, k))


def _forest_state(
    inputs: PlanInputs, bundle: PlanBundle, hv: _Harvests
) -> tuple[np.ndarray, np.ndarray]:
    """Standing volume (m3) and old-forest share of the gross area at every mid-period.

    Ages follow the regrowth convention (a stand cut in ``q`` is ``(p - q) L - delay`` old
    at mid-period ``p >= q``: standing volume after the period's harvests); the share is
    NaN when ``rules.old_forest_age_yr`` is off.
    """
    s = inputs.settings
    P, L = s.horizon.periods, s.horizon.period_length_yr
    delay = s.regeneration.delay_yr
    st = inputs.inventory.stands
    n = len(st)
    p = np.arange(1, P + 1)
    latest = np.zeros((n, P), dtype=np.int64)
    crop_no = np.zeros((n, P), dtype=np.int64)
    if len(hv.stand):
        latest[hv.stand, hv.period - 1] = hv.period
        np.add.at(crop_no, (hv.stand, hv.period - 1), 1)
    latest = np.maximum.accumulate(latest, axis=1)
    crop_no = np.cumsum(crop_no, axis=1)
    age0 = st["age"].to_numpy(dtype=float)
    age = np.where(
        latest > 0, (p[None, :] - latest) * L - delay, age0[:, None] + (p - 0.5)[None, :] * L
    )
    grown = np.maximum(age, 0.0)
    per_ha = np.zeros((n, P))
    for c, strata in enumerate(hv.crops):
        at = crop_no == c
        if at.any():
            per_ha = np.where(at, inputs.growth.volume(strata, grown), per_ha)
    standing = (per_ha * np.asarray(bundle.net_area_ha, dtype=float)[:, None]).sum(axis=0)
    old_age = s.rules.old_forest_age_yr
    gross = np.asarray(bundle.problem.opening_area_ha, dtype=float)
    if old_age is None or gross.sum() <= 0:
        share = np.full(P, np.nan)
    else:
        share = (gross[:, None] * (age >= old_age - 1e-9)).sum(axis=0) / gross.sum()
    return standing, share


def _sustained_yield(inputs: PlanInputs, bundle: PlanBundle, crops: list[np.ndarray]) -> Any:
    """LTSY over the net harvestable area (reserves and inoperable stands count 0 ha)."""
    from spatialplan import economics
    from spatialplan.errors import SettingsError

    areas = stand_areas(inputs)
    regrown = _crop_strata(inputs, 1)[1] if len(crops) < 2 else crops[1]
    try:
        return economics.long_term_sustained_yield(
            regrown,
            np.where(areas.harvestable, areas.net_area_ha, 0.0),
            inputs.growth,
            inputs.settings,
            bundle.values.harvest_cost_per_m3,
        )
    except SettingsError:  # a Faustmann rotation needs a discount rate > 0
        return None


def plan_layers(
    inputs: PlanInputs,
    bundle: PlanBundle,
    result: Any,
    verify_settings: Settings | None = None,
    run_extra: dict[str, str] | None = None,
) -> tuple[dict[str, Any], Any]:
    """The layers and tables of a plan, in memory, and its independent verification.

    Parameters
    ----------
    inputs, bundle
        What the plan was built from.
    result
        Anything with the fields of :class:`spatialplan.schedule.PlanResult`.
    verify_settings
        Rules to verify against and to draw the flow band of the ``periods`` table from
        (default: ``inputs.settings``).
    run_extra
        More key/value rows for the ``run`` table.

    Returns
    -------
    layers : dict
        ``schedule`` (GeoDataFrame), ``harvests``, ``openings`` (GeoDataFrame),
        ``periods``, ``strata`` and ``run`` (DataFrames), as written into the GeoPackage.
    report : spatialplan.verify.VerifyReport
        The independent check of the schedule and harvests.
    """
    from spatialplan import outputs, runtable, verify

    s = inputs.settings
    vs = verify_settings or s
    problem = bundle.problem
    k = chosen_prescriptions(problem, result)
    hv = _plan_harvests(inputs, bundle, k)
    sched = _schedule_frame(inputs, bundle, k, hv)
    harvests = _harvests_frame(inputs, hv)
    report = verify.verify_schedule(sched, vs, inputs.yield_table, harvests=harvests)
    id_col = s.fields.id_field
    openings, stand_opening = outputs.opening_table(
        sched,
        problem.edges,
        s.horizon.periods,
        problem.green_up_periods,
        problem.initially_open,
        s.rules.max_opening_ha,
        problem.opening_area_ha,
        id_col=id_col,
        harvests=harvests,
    )
    sched["opening_id"] = stand_opening
    standing, old_share = _forest_state(inputs, bundle, hv)
    periods_df = outputs.period_table(
        sched,
        vs,
        openings,
        harvests=harvests,
        id_col=id_col,
        standing_volume_m3=standing,
        old_forest_share=old_share,
    )
    strata_df = outputs.strata_table(sched, s, harvests=harvests, id_col=id_col)
    info = runtable.plan_run_info(
        inputs,
        result,
        report.verdict,
        {
            "violations": str(len(report.violations)),
            "max_opening_ha": str(s.rules.max_opening_ha),
            **(run_extra or {}),
        },
        ending_value_npv=float(sched["ending_value_npv"].sum()),
        sustained_yield=_sustained_yield(inputs, bundle, hv.crops),
    )
    layers: dict[str, Any] = {
        "schedule": sched,
        "harvests": harvests,
        "openings": openings,
        "periods": periods_df,
        "strata": strata_df,
        "run": runtable.run_table(info),
    }
    return layers, report


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
    plan: Any,
    settings: Settings | None = None,
) -> tuple[gpd.GeoDataFrame, Any]:
    """The ``schedule`` layer of a plan and its independent verification.

    Parameters
    ----------
    inputs, bundle
        What the plan was built from.
    plan
        A :class:`spatialplan.schedule.PlanResult` or an (n,) array of prescription
        indices (:func:`chosen_prescriptions`).
    settings
        Rules to verify against (default: ``inputs.settings``).

    Returns
    -------
    (geopandas.GeoDataFrame, spatialplan.verify.VerifyReport)
        Verify reads every harvest from the ``harvests`` table of the plan.
    """
    from spatialplan import verify

    k = chosen_prescriptions(bundle.problem, plan)
    hv = _plan_harvests(inputs, bundle, k)
    sched = _schedule_frame(inputs, bundle, k, hv)
    report = verify.verify_schedule(
        sched, settings or inputs.settings, inputs.yield_table, harvests=_harvests_frame(inputs, hv)
    )
    return sched, report


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
    from spatialplan import outputs

    stage = on_stage or (lambda _s: None)
    s = inputs.settings
    out_path = Path(out_path)
    stage("verifying")
    layers, report = plan_layers(inputs, bundle, result, verify_settings, run_extra)
    stage("writing outputs")
    outputs.write_plan_geopackage(out_path, layers)
    sched = layers["schedule"]
    extra: list[Path] = []
    if s.output.raster_out:
        outputs.write_period_raster(sched, s.output.raster_out, s.output.raster_cell_m)
        extra.append(Path(s.output.raster_out))
    if not s.output.no_map:
        views = _write_review(out_path, layers, s)
        extra.extend([Path(views["map"]), Path(views["report"]), *map(Path, views["charts"])])
    if s.output.write_back:
        outputs.write_back(inputs.stands_path, layers)
    msgs = messages if messages is not None else inputs.messages + bundle.messages
    return PlanOutcome(out_path, result, report, sched, layers["periods"], extra, msgs)


def _write_review(out_path: Path, layers: dict[str, Any], s: Settings) -> dict[str, Any]:
    """The map, report and charts of a plan (:func:`spatialplan.review.write_review_files`)."""
    from spatialplan.review import write_review_files

    run = layers["run"]
    return write_review_files(
        out_path,
        layers["schedule"],
        layers["openings"],
        layers["periods"],
        layers["strata"],
        dict(zip(run["key"], run["value"], strict=True)),
        s,
        harvests=layers["harvests"],
        basemap=s.output.basemap,
        id_col=s.fields.id_field,
    )
