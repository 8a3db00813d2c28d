"""Management units: plan every unit on its own, with its own flow rules, and merge.

With ``fields.unit_field`` set, :func:`plan_by_unit` reads the inputs once
(:func:`spatialplan.pipeline.load_inputs`), restricts them to each unit's stands
(:func:`subset_inputs`), runs the solve step of ``plan``
(:func:`spatialplan.pipeline.solve_plan`) on every unit - as a Dask task when a client is
given - and writes one merged plan with :func:`spatialplan.pipeline.write_plan`. The
decomposition is exact when units share no flow rule and no stand of one unit touches a
stand of another (see ``docs/scaling.md``).
"""

from __future__ import annotations

import dataclasses
import math
import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from spatialplan.errors import InputError, SettingsError
from spatialplan.scenarios._worker import diagnosis_of, error_for, error_text, status_of, where
from spatialplan.settings import Settings, apply_overrides

if TYPE_CHECKING:
    from spatialplan.pipeline import PlanInputs, PlanOutcome
    from spatialplan.scenarios.scenario_file import ScenarioSet

__all__ = [
    "UnitSolve",
    "check_unit_overrides",
    "check_units_settings",
    "cross_unit_edges",
    "merge_unit_plans",
    "plan_by_unit",
    "solve_unit",
    "subset_inputs",
    "unit_labels",
    "units_for",
]

# Per-period targets in absolute m3 / ha do not split across units (see plan_by_unit).
_ABSOLUTE_TARGETS = (
    "rules.period_volume_min_m3",
    "rules.period_volume_max_m3",
    "rules.period_area_min_ha",
    "rules.period_area_max_ha",
)
# Sections that shape what is read (fields, yield table, growth, slope and stream buffers):
# the inputs are read once for the whole layer, so a unit cannot change them.
_READ_SECTIONS = ("fields", "yields", "growth", "terrain")
# Solver statuses from best to worst; the merged plan takes the worst of its units.
_STATUS_RANK = ("optimal", "feasible", "time_limit", "interrupted")


@dataclass
class UnitSolve:
    """The plan of one management unit (positions refer to the whole layer)."""

    unit: str
    ok: bool
    status: str
    positions: np.ndarray
    period: np.ndarray
    npv: float = float("nan")
    lp_bound: float = float("nan")
    cpsat_bound: float | None = None
    solve_time_s: float = float("nan")
    verify_ok: bool = False
    verify_verdict: str = ""
    error: str | None = None
    diagnosis: list[str] = field(default_factory=list)
    worker: str = ""
    # (k,) uint64 harvest periods of each stand's prescription (bit p - 1 = period p):
    # a stand may be cut more than once, which `period` (the first harvest) does not say.
    harvest_mask: np.ndarray | None = None


# ---------------------------------------------------------------------------------------
# checks (on the client, before anything runs)
# ---------------------------------------------------------------------------------------
def check_units_settings(settings: Settings, where: str = "by-unit planning") -> None:
    """Refuse forest-wide absolute per-period targets, which do not split across units."""
    bad = [k for k in _ABSOLUTE_TARGETS if getattr(settings.rules, k.split(".")[1]) is not None]
    if bad:
        msg = (
            f"{where}: {', '.join(bad)} is a forest-wide amount per period and cannot be "
            "split across units; give it per unit in [units.<name>] of a scenario file"
        )
        raise SettingsError(msg)


def check_unit_overrides(
    settings: Settings, unit_overrides: Mapping[str, Mapping[str, Any]], where: str = ""
) -> None:
    """Check every unit's overrides apply to ``settings`` and leave the inputs alone.

    Raises
    ------
    SettingsError
        A bad key or value (naming ``[units.<name>]`` and the key), or a key of a section
        that shapes what is read (``fields``, ``yields``, ``growth``, ``terrain``): the
        inputs are read once for the whole layer.
    """
    pre = f"{where} " if where else ""
    for u, ov in unit_overrides.items():
        read = [k for k in ov if k.split(".")[0] in _READ_SECTIONS]
        if read:
            msg = (
                f"{pre}[units.{u}]: '{read[0]}' cannot differ between units: the inputs "
                f"({', '.join(_READ_SECTIONS)} settings) are read once for the whole layer"
            )
            raise SettingsError(msg)
        try:
            apply_overrides(settings, ov)
        except SettingsError as exc:
            msg = f"{pre}[units.{u}]: {exc}"
            raise SettingsError(msg) from None


def _labels(stands: pd.DataFrame, source: object, unit_field: str | None) -> np.ndarray:
    """Unit label per stand (text); every stand must name its unit."""
    u = stands["unit"] if "unit" in stands.columns else pd.Series([None] * len(stands))
    labels = u.astype(object).where(u.notna(), None).to_numpy(dtype=object)
    missing = [str(i) for i, v in zip(stands["stand_id"], labels, strict=True) if v is None]
    if missing:
        msg = (
            f"{source}: {len(missing)} stand(s) have no value in unit field "
            f"'{unit_field}': {', '.join(missing[:20])}"
        )
        raise InputError(msg)
    return labels


def unit_labels(inputs: PlanInputs) -> np.ndarray:
    """Unit label of every stand of the inputs, by position.

    Raises
    ------
    InputError
        Stands without a unit value (ids listed).
    """
    s = inputs.settings
    return _labels(inputs.inventory.stands, inputs.stands_path, s.fields.unit_field)


def units_for(scen: ScenarioSet) -> list[str]:
    """Unit values of a scenario set's stand layer (read once on the client), checked."""
    from spatialplan.inventory import read_stands

    fields = {s.settings.fields for s in scen.scenarios}
    if len(fields) > 1:
        msg = f"{scen.path}: --by-unit needs the same [fields] in every scenario"
        raise SettingsError(msg)
    f = next(iter(fields))
    if not f.unit_field:
        msg = (
            f"{scen.path}: --by-unit needs fields.unit_field (the attribute naming each "
            "stand's management unit)"
        )
        raise SettingsError(msg)
    for s in scen.scenarios:
        check_units_settings(s.settings, f"{scen.path} scenario '{s.name}'")
        check_unit_overrides(s.settings, scen.unit_overrides, f"{scen.path} scenario '{s.name}'")
    inv = read_stands(scen.stands, f)
    inv.raise_for_errors()
    u = _labels(inv.stands, scen.stands, f.unit_field)
    unknown = sorted(set(scen.unit_overrides) - {str(v) for v in u})
    if unknown:
        msg = f"{scen.path}: [units] names unit(s) not in the stand layer: {', '.join(unknown)}"
        raise SettingsError(msg)
    return sorted({str(v) for v in u})


# ---------------------------------------------------------------------------------------
# one unit (runs on a Dask worker or in-process)
# ---------------------------------------------------------------------------------------
def subset_inputs(inputs: PlanInputs, mask: np.ndarray) -> PlanInputs:
    """The same inputs restricted to the stands in ``mask`` (positions renumbered).

    Every per-stand table is cut by position: the stand frame and its attributes, the
    terrain rows (slope, operability, harvest cost) and the net-area rows (stream
    buffers). Nothing is read or computed again.
    """
    mask = np.asarray(mask, dtype=bool)
    inv = inputs.inventory
    sub_inv = dataclasses.replace(
        inv,
        stands=inv.stands[mask].reset_index(drop=True),
        attributes=inv.attributes[mask].reset_index(drop=True),
    )
    out = dataclasses.replace(inputs, inventory=sub_inv, messages=list(inputs.messages))
    if inputs.terrain is not None:
        out.terrain = dataclasses.replace(
            inputs.terrain, stands=inputs.terrain.stands[mask].reset_index(drop=True)
        )
    if inputs.net is not None:
        out.net = dataclasses.replace(
            inputs.net, stands=inputs.net.stands[mask].reset_index(drop=True)
        )
    return out


def solve_unit(
    inputs: PlanInputs, unit: str, overrides: Mapping[str, Any] | None = None
) -> UnitSolve:
    """Solve and verify one management unit with its own settings; never raises.

    ``inputs`` hold the whole layer (positions in the result refer to it); the unit's
    stands are cut out with :func:`subset_inputs`, its ``overrides`` (``[units.<name>]``)
    applied, and the solve step of ``plan`` (:func:`spatialplan.pipeline.solve_plan`) and
    its verification (:func:`spatialplan.pipeline.verify_plan`) run on them: flow rules,
    opening rules and verification apply to the unit alone.
    """
    from spatialplan.pipeline import solve_plan, verify_plan

    empty = np.zeros(0, dtype=np.int64)
    try:
        mask = unit_labels(inputs) == unit
        positions = np.flatnonzero(mask)
        settings = apply_overrides(inputs.settings, overrides) if overrides else inputs.settings
        sub = dataclasses.replace(subset_inputs(inputs, mask), settings=settings)
        bundle, r = solve_plan(sub)
        _sched, rep = verify_plan(sub, bundle, r)
        masks = np.asarray(bundle.problem.rx().harvest_mask, dtype=np.uint64)[r.prescription]
        return UnitSolve(
            unit,
            True,
            str(r.status),
            positions,
            np.asarray(r.period, dtype=np.int64),
            float(r.npv),
            float(r.lp_bound),
            None if r.cpsat_bound is None else float(r.cpsat_bound),
            float(r.solve_time_s),
            bool(rep.ok),
            str(rep.verdict),
            worker=where(),
            harvest_mask=masks,
        )
    except Exception as exc:  # reported per unit; merge_unit_plans raises it on the client
        return UnitSolve(
            unit,
            False,
            status_of(exc),
            empty,
            empty,
            error=error_text(exc),
            diagnosis=diagnosis_of(exc),
            worker=where(),
        )


# ---------------------------------------------------------------------------------------
# merging
# ---------------------------------------------------------------------------------------
def cross_unit_edges(edges: np.ndarray, units: np.ndarray) -> np.ndarray:
    """Adjacent stand pairs whose stands belong to different units ((k, 2) positions)."""
    e = np.asarray(edges, dtype=np.int64).reshape(-1, 2)
    if not len(e):
        return e
    u = np.asarray(units, dtype=object)
    return e[u[e[:, 0]] != u[e[:, 1]]]


def _merge_status(statuses: list[str]) -> str:
    ranks = [
        (_STATUS_RANK.index(s) if s in _STATUS_RANK else len(_STATUS_RANK), s) for s in statuses
    ]
    return max(ranks)[1] if ranks else "optimal"


def _without_flow_rules(s: Settings) -> Settings:
    """The settings with every rule of the flow family off (they apply per unit)."""
    r = dataclasses.replace(
        s.rules,
        flow_tolerance=None,
        non_declining=False,
        period_volume_min_m3=None,
        period_volume_max_m3=None,
        period_area_min_ha=None,
        period_area_max_ha=None,
        ending_volume_fraction=None,
        ending_mean_age_yr=None,
    )
    return dataclasses.replace(s, rules=r)


def merge_unit_plans(
    inputs: PlanInputs, solves: list[UnitSolve], out_path: str | Path
) -> PlanOutcome:
    """Merge per-unit plans into one plan of the whole layer and write it.

    Builds the whole problem (adjacency included) to find stands of different units that
    touch, then writes the output as ``plan`` does (:func:`spatialplan.pipeline.write_plan`:
    schedule frame, verification, openings, period and strata tables, run table, optional
    views). The flow family of rules (flow tolerance, non-declining flow, per-period
    targets, ending inventory) belongs to each unit and was verified per unit; the merged
    plan is verified against every other rule, forest-wide (opening size and green-up
    across unit boundaries).

    Parameters
    ----------
    inputs
        The whole layer, as the units were cut from.
    solves
        One :class:`UnitSolve` per unit.
    out_path
        Output GeoPackage.

    Returns
    -------
    spatialplan.pipeline.PlanOutcome
        ``result`` is the merged plan: NPV and bounds are sums over units, status the worst
        unit status, ``stats`` counts ``units`` and ``cross_unit_edges``.

    Raises
    ------
    InfeasibleError, NoSolutionError, SpatialPlanError
        A unit has no plan: the error of that unit (infeasible first), naming every failed
        unit, with the diagnosis lines prefixed by the unit.
    """
    from spatialplan import schedule
    from spatialplan.pipeline import build_problem, write_plan

    solves = sorted(solves, key=lambda u: u.unit)
    failed = [u for u in solves if not u.ok]
    if failed:
        lines = [f"unit {u.unit}: {u.status}: {u.error}" for u in failed]
        diag = [f"unit {u.unit}: {d}" for u in failed for d in u.diagnosis]
        status = "infeasible" if any(u.status == "infeasible" for u in failed) else failed[0].status
        raise error_for(status, "; ".join(lines), diag)
    bundle = build_problem(inputs)
    period = np.zeros(len(inputs.inventory.stands), dtype=np.int64)
    for u in solves:
        period[u.positions] = u.period
    prescription = _merged_prescriptions(bundle, solves)
    cross = cross_unit_edges(bundle.problem.edges, unit_labels(inputs))
    messages = list(inputs.messages) + list(bundle.messages)
    if len(cross):
        ids = inputs.inventory.stands["stand_id"].to_numpy(dtype=object)
        ex = ", ".join(f"{ids[a]}-{ids[b]}" for a, b in cross[:5])
        messages.append(
            f"warning: {len(cross)} adjacent stand pair(s) lie in different units (e.g. "
            f"{ex}); the opening rule across unit boundaries is not enforced by by-unit "
            "planning, only checked by the verification of the merged plan"
        )
    messages.extend(
        f"unit {u.unit} failed its own verification: {u.verify_verdict}"
        for u in solves
        if not u.verify_ok
    )
    npv = float(sum(u.npv for u in solves))
    lp = float(sum(u.lp_bound for u in solves))
    cps = (
        None
        if any(u.cpsat_bound is None for u in solves)
        else float(sum(u.cpsat_bound for u in solves if u.cpsat_bound is not None))
    )
    # The tighter of the two bounds, as for one plan.
    bound = (
        min(lp, cps) if cps is not None and math.isfinite(lp) else (cps if cps is not None else lp)
    )
    result = schedule.PlanResult(
        period,
        _merge_status([u.status for u in solves]),
        npv,
        cps,
        lp,
        schedule.gap(npv, bound),
        float(max(u.solve_time_s for u in solves)) if solves else 0.0,
        {"units": len(solves), "cross_unit_edges": len(cross), "warnings": []},
        prescription,
    )
    unit_info = "; ".join(
        f"{u.unit}: {u.status}, NPV {u.npv:.2f}, {u.verify_verdict}" for u in solves
    )
    # Flow rules belong to each unit (checked by each unit's own verification); the merged
    # plan is checked forest-wide for everything else, the spatial rules above all.
    return write_plan(
        inputs,
        bundle,
        result,
        out_path,
        verify_settings=_without_flow_rules(inputs.settings),
        messages=messages,
        run_extra={
            "planned_by_unit": "true",
            "units": unit_info,
            "cross_unit_edges": str(len(cross)),
            "verification": "flow rules per unit (each unit verified on its own); all other "
            "rules on the merged plan",
        },
    )


def _merged_prescriptions(bundle: Any, solves: list[UnitSolve]) -> np.ndarray | None:
    """Each stand's prescription in the whole problem: the one with its unit plan's harvests.

    ``None`` when a unit recorded only first harvests (the merge then cuts each stand once).
    """
    if any(u.harvest_mask is None for u in solves):
        return None
    rx = bundle.problem.rx()
    want = np.zeros(bundle.problem.n_stands, dtype=np.uint64)
    for u in solves:
        want[u.positions] = np.asarray(u.harvest_mask, dtype=np.uint64)
    stand_of = rx.stand_of
    hit = np.flatnonzero(np.asarray(rx.harvest_mask, dtype=np.uint64) == want[stand_of])
    chosen = np.full(len(want), -1, dtype=np.int64)
    chosen[stand_of[hit]] = hit  # a stand's prescriptions differ in their harvest periods
    return None if (chosen < 0).any() else chosen


def plan_by_unit(
    inputs: PlanInputs,
    out_path: str | Path,
    *,
    client: Any = None,
    unit_overrides: Mapping[str, Mapping[str, Any]] | None = None,
    on_unit: Callable[[UnitSolve], None] | None = None,
) -> PlanOutcome:
    """Plan each management unit on its own and merge the plans into one output.

    Parameters
    ----------
    inputs
        From :func:`spatialplan.pipeline.load_inputs`, read once for the whole layer, with
        ``fields.unit_field`` naming the unit attribute. Relative flow rules
        (``rules.flow_tolerance``, ``rules.non_declining``) apply within every unit;
        forest-wide absolute per-period targets are refused (give them per unit).
    out_path
        Output GeoPackage (map, report and charts beside it unless ``output.no_map``).
    client
        A ``dask.distributed.Client``: the inputs are scattered once and every unit is a
        task; ``None`` solves the units one after another here.
    unit_overrides
        Unit value -> dotted overrides for that unit (its own targets, tolerance ...).
    on_unit
        Called with each unit's :class:`UnitSolve` as it completes.

    Returns
    -------
    spatialplan.pipeline.PlanOutcome
        ``result`` is the merged plan: NPV and bounds are sums over units, status the worst
        unit status; ``result.stats["cross_unit_edges"]`` counts adjacent stands of
        different units (a warning is added to ``messages`` when there are any).

    Raises
    ------
    SettingsError
        No unit field, an absolute per-period target at forest level, or a bad unit
        override.
    InputError
        Stands without a unit value (ids listed).
    InfeasibleError
        A unit's rules admit no plan (the diagnosis names the unit).
    """
    settings = inputs.settings
    if not settings.fields.unit_field:
        msg = "by-unit planning needs fields.unit_field (the attribute naming each stand's unit)"
        raise SettingsError(msg)
    check_units_settings(settings)
    unit_overrides = dict(unit_overrides or {})
    check_unit_overrides(settings, unit_overrides)
    units = sorted({str(u) for u in unit_labels(inputs)})
    solves: list[UnitSolve] = []
    if client is None:
        for u in units:
            solve = solve_unit(inputs, u, unit_overrides.get(u))
            if on_unit:
                on_unit(solve)
            solves.append(solve)
    else:
        from distributed import as_completed

        shared = client.scatter(inputs, broadcast=False, hash=False)
        tag = os.urandom(4).hex()
        futs = [
            client.submit(
                solve_unit, shared, u, unit_overrides.get(u), pure=False, key=f"unit-{u}-{tag}"
            )
            for u in units
        ]
        for fut in as_completed(futs):
            solve = fut.result()
            if on_unit:
                on_unit(solve)
            solves.append(solve)
    return merge_unit_plans(inputs, solves, out_path)
