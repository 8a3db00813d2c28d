"""Scenario comparison: run every scenario as a Dask task, tabulate, cost each rule.

:func:`run_comparison` runs each scenario through the same pipeline as ``plan`` as one
Dask task (``Client.submit(..., pure=False)``; with ``--by-unit`` a load task, one task
per unit and a merge task), collects the results as they complete (``as_completed``),
writes each scenario's GeoPackage into the output folder, then the comparison table
(``comparison.csv``, :func:`comparison_table`) with the cost of each rule
(:func:`rule_costs`) and a chart.

Column names of the table are plain (letters, digits and ``_``) so spreadsheets, GIS
tools and databases take them as they are: a varied setting ``rules.max_opening_ha``
is the column ``rules_max_opening_ha`` (:func:`column_name`), its cost
``cost_rules_max_opening_ha``. The console and the chart label the same columns in words
(:func:`setting_label`: "max opening 60 ha").

Inputs reach the workers in one of two ways:

* **shared** - workers read the input files from the same paths as the client (local
  cluster, or a cluster on a shared file system);
* **shipped** - the client reads the files (up to a size limit) and scatters their bytes
  once; each worker writes them into a temporary folder for the task.

Outputs always come back with the task result as bytes and are written by the client,
so the output folder need not be visible to remote workers.
"""

from __future__ import annotations

import math
import os
import re
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from spatialplan._io import atomic_path
from spatialplan.errors import OutputError
from spatialplan.scenarios.scenario_file import DEFAULT_SHIP_LIMIT_MB, InputFiles, ScenarioSet
from spatialplan.scenarios.tasks import (
    ScenarioResult,
    ScenarioTask,
    load_scenario_inputs,
    merge_units_task,
    run_scenario_task,
)
from spatialplan.scenarios.units import solve_unit, units_for
from spatialplan.schedule import best_bound
from spatialplan.settings import OFF, Settings, flatten_overrides

__all__ = [
    "RELAX_DIRECTION",
    "SPATIAL_COST_LABELS",
    "ComparisonResult",
    "best_bound",
    "check_outputs",
    "column_labels",
    "column_name",
    "comparison_table",
    "rule_costs",
    "run_comparison",
    "scenario_labels",
    "setting_label",
]

#: Which direction of a setting relaxes the rule: +1 larger is looser (``None`` = rule off
#: is loosest), -1 smaller is looser (``None`` = off is loosest), 0 for a flag where
#: ``False`` is looser. Keys not listed have no "relaxed" side (prices, discount rate).
RELAX_DIRECTION: dict[str, int] = {
    "rules.max_opening_ha": +1,
    "rules.flow_tolerance": +1,
    "rules.green_up_periods": -1,
    "rules.min_age_yr": -1,
    "rules.period_volume_min_m3": -1,
    "rules.period_volume_max_m3": +1,
    "rules.period_area_min_ha": -1,
    "rules.period_area_max_ha": +1,
    "rules.ending_volume_fraction": -1,
    "rules.ending_mean_age_yr": -1,
    "rules.non_declining": 0,
    "rules.unit_restriction": 0,
    "adjacency.min_shared_edge_m": +1,
    "adjacency.digitising_tolerance_m": -1,
    "adjacency.corner_adjacency": 0,
}

#: Words for the two ends of the cost of the spatial rules (console, chart, docs).
SPATIAL_COST_LABELS: dict[str, str] = {
    "cost_spatial_rules_upper": "cost of spatial rules + solver gap (upper estimate)",
    "cost_spatial_rules_lower": "cost of spatial rules, lower estimate (best proven bound)",
}

# Unit suffixes of settings names, as read aloud; fractions are shown in per cent.
_UNITS: tuple[tuple[str, str], ...] = (
    ("_per_m3", "per m³"),
    ("_per_ha", "per ha"),
    ("_m3", "m³"),
    ("_ha", "ha"),
    ("_yr", "yr"),
    ("_pct", "%"),
    ("_periods", "periods"),
    ("_m", "m"),
    ("_s", "s"),
)
_FRACTIONS = ("_rate", "_tolerance", "_fraction", "_share")
_NOT_PLAIN = re.compile(r"[^A-Za-z0-9_]")


def column_name(key: str) -> str:
    """The comparison-table column of a dotted settings key: ``.`` (and any other
    character that is not a letter, digit or ``_``) becomes ``_``.

    Settings keys are ``<section>.<name>``, so the column keeps the section as a prefix
    (``rules_``, ``economics_``, ``adjacency_`` ...) and cannot meet a fixed column such
    as ``status`` or ``npv``.

    Examples
    --------
    >>> column_name("rules.max_opening_ha")
    'rules_max_opening_ha'
    >>> column_name("economics.discount_rate")
    'economics_discount_rate'
    """
    return _NOT_PLAIN.sub("_", key)


def _is_off(value: Any) -> bool:
    return value is None or (isinstance(value, str) and value == OFF)


_NO_VALUE: Any = object()


def _words(key: str) -> tuple[str, str, bool]:
    """(name in words, unit, is a fraction) of a dotted settings key."""
    name = key.rsplit(".", 1)[-1]
    unit = ""
    for suffix, word in _UNITS:
        if name.endswith(suffix) and len(name) > len(suffix):
            name, unit = name[: -len(suffix)], word
            break
    fraction = not unit and name.endswith(_FRACTIONS)
    if fraction:
        unit = "%"
    return name.replace("green_up", "green-up").replace("_", " "), unit, fraction


def setting_label(key: str, value: Any = _NO_VALUE) -> str:
    """A settings key (and a value) in words, for legends and table headers.

    The section prefix is dropped, the unit suffix is spoken after the value, fractions
    (rates, tolerances, shares) are shown in per cent; ``None`` or ``"off"`` reads
    ``off``, ``True``/``False`` read ``on``/``off``. Without a value the unit is put in
    brackets.

    Examples
    --------
    >>> setting_label("rules.max_opening_ha", 60)
    'max opening 60 ha'
    >>> setting_label("rules.max_opening_ha", "off")
    'max opening off'
    >>> setting_label("economics.discount_rate", 0.03)
    'discount rate 3 %'
    >>> setting_label("rules.max_opening_ha")
    'max opening (ha)'
    """
    words, unit, fraction = _words(key)
    if value is _NO_VALUE:
        return f"{words} ({unit})" if unit else words
    if _is_off(value):
        return f"{words} off"
    if isinstance(value, bool):
        return f"{words} {'on' if value else 'off'}"
    if isinstance(value, int | float):
        if fraction:
            return f"{words} {100 * float(value):,.4g} %"
        shown = f"{value:,}" if isinstance(value, int) else f"{value:,.6g}"
        return f"{words} {shown} {unit}".rstrip()
    return f"{words} {value} {unit}".rstrip()


def scenario_labels(scen: ScenarioSet) -> dict[str, str]:
    """Scenario name -> the settings that define it, in words (chart legends).

    Examples
    --------
    A scenario ``open60`` that sets ``rules.max_opening_ha = 60`` is labelled
    ``"max opening 60 ha"``; a scenario that varies nothing gets an empty label.
    """
    return {
        s.name: ", ".join(setting_label(k, v) for k, v in s.varied.items()) for s in scen.scenarios
    }


def column_labels(table: pd.DataFrame, scen: ScenarioSet) -> dict[str, str]:
    """Column of :func:`comparison_table` -> its words in the console and the chart.

    Covers the varied settings, their costs and the two ends of the cost of the spatial
    rules (:data:`SPATIAL_COST_LABELS`).

    Examples
    --------
    ``rules_max_opening_ha`` reads ``max opening (ha)``, ``cost_rules_max_opening_ha``
    reads ``cost of max opening``.
    """
    keys = {column_name(k): k for s in scen.scenarios for k in _flat_settings(s.settings)}
    out: dict[str, str] = {}
    for c in table.columns:
        c = str(c)
        if c in SPATIAL_COST_LABELS:
            out[c] = SPATIAL_COST_LABELS[c]
        elif c.startswith("cost_") and c[5:] in keys:
            out[c] = f"cost of {_words(keys[c[5:]])[0]}"
        elif c in keys:
            out[c] = setting_label(keys[c])
    return out


@dataclass
class ComparisonResult:
    """Outcome of :func:`run_comparison`."""

    table: pd.DataFrame
    results: dict[str, ScenarioResult]
    csv_path: Path
    chart_path: Path | None
    mode: str  # "shared" or "shipped"
    #: Column -> words (:func:`column_labels`), scenario -> its settings in words.
    labels: dict[str, str] = field(default_factory=dict)
    scenario_labels: dict[str, str] = field(default_factory=dict)

    @property
    def failed(self) -> list[str]:
        """Scenarios that did not produce a verified plan."""
        return [n for n, r in self.results.items() if not r.succeeded]


def _relax_score(value: Any, direction: int) -> float:
    if value is None:
        return math.inf  # the rule switched off is the loosest it gets
    if direction == 0:
        return 0.0 if bool(value) else 1.0
    return direction * float(value)


def rule_costs(scen: ScenarioSet, results: Mapping[str, ScenarioResult]) -> pd.DataFrame:
    """The NPV cost of each rule per scenario.

    The cost of the spatial rules is measured against the aspatial LP bound (the LP
    keeps the flow rules but drops opening size, green-up, adjacency and integrality, so
    it is the no-spatial-rules reference). The scenario's optimal NPV lies between its
    NPV and its best proven bound (:func:`best_bound`), so that cost is given as two
    columns:

    * ``cost_spatial_rules_upper`` = LP bound - NPV: the cost of the spatial rules plus
      the solver's own shortfall (gap), an upper estimate;
    * ``cost_spatial_rules_lower`` = LP bound - best proven bound, a lower estimate; the
      two are equal when the plan is proven optimal, and the lower one is 0 when the
      only bound is the LP bound itself.

    For every rule key that differs between scenarios and has a known relaxed side
    (:data:`RELAX_DIRECTION`, or ``relaxed`` in a sweep), ``cost_<column>`` is the NPV of
    the scenario with the loosest value of that key at the same other settings minus
    this scenario's NPV, and ``ref_<column>`` names that scenario (``<column>`` is
    :func:`column_name` of the key).

    Returns
    -------
    pandas.DataFrame
        Indexed by scenario name.
    """
    direction = {**RELAX_DIRECTION, **scen.relaxed}
    flat = {
        s.name: {k: v for k, v in _flat_settings(s.settings).items() if not k.startswith("output.")}
        for s in scen.scenarios
    }
    names = scen.names
    keys = sorted({k for n in names for k in flat[n]})
    varying = [k for k in keys if len({repr(flat[n].get(k)) for n in names}) > 1]
    out = pd.DataFrame(index=pd.Index(names, name="scenario"))
    ran = {n: n in results and results[n].ok for n in names}
    npv = {n: results[n].npv if ran[n] else math.nan for n in names}
    lp = {n: results[n].lp_bound if ran[n] else math.nan for n in names}
    best = {n: best_bound(results[n]) if ran[n] else math.nan for n in names}
    out["cost_spatial_rules_upper"] = [lp[n] - npv[n] for n in names]
    out["cost_spatial_rules_lower"] = [lp[n] - best[n] for n in names]
    for k in varying:
        if k not in direction:
            continue
        others = [o for o in varying if o != k]
        groups: dict[str, list[str]] = {}
        for n in names:
            groups.setdefault(repr([flat[n].get(o) for o in others]), []).append(n)
        cost, ref = [], []
        for n in names:
            group = groups[repr([flat[n].get(o) for o in others])]
            done = [m for m in group if math.isfinite(npv[m])]
            if len({repr(flat[m].get(k)) for m in group}) < 2 or not done:
                cost.append(math.nan)
                ref.append("")
                continue
            loosest = max(done, key=lambda m: _relax_score(flat[m].get(k), direction[k]))
            cost.append(npv[loosest] - npv[n])
            ref.append(loosest)
        if any(r for r in ref):
            out[f"cost_{column_name(k)}"] = cost
            out[f"ref_{column_name(k)}"] = ref
    return out


#: Columns of :func:`comparison_table` that are not settings (period columns aside).
_FIXED_COLUMNS = frozenset(
    {
        "scenario",
        "origin",
        "status",
        "error",
        "diagnosis",
        "npv",
        "bound_aspatial_lp",
        "bound_cpsat",
        "bound_cover_lp",
        "best_bound",
        "gap",
        "solve_time_s",
        "wall_s",
        "verification",
        "verify_verdict",
        "area_harvested_ha",
        "volume_harvested_m3",
        "largest_opening_ha",
        "output",
        "worker",
    }
)


def _flat_settings(s: Settings) -> dict[str, Any]:
    """Every setting as dotted key -> value (lists kept as values)."""
    return flatten_overrides(s.to_dict())


def _shown(value: Any) -> Any:
    """A setting as the table shows it: ``off`` for a rule switched off, lists as text."""
    if _is_off(value):
        return "off"
    if isinstance(value, list | tuple | dict):
        return str(value)
    return value


def comparison_table(
    scen: ScenarioSet, results: Mapping[str, ScenarioResult], out_dir: Path | None = None
) -> pd.DataFrame:
    """One row per scenario: what it set, how it ran, NPV, bounds, flows, cost of rules.

    Columns (all plain names: letters, digits, ``_``):

    * ``scenario``, ``origin``;
    * one column per varied setting, named by :func:`column_name` (``rules.max_opening_ha``
      -> ``rules_max_opening_ha``), holding the value the scenario ran with (``off`` for
      a rule switched off);
    * ``status``, ``error``, ``diagnosis``, ``npv``, ``bound_aspatial_lp``, ``bound_cpsat``, ``bound_cover_lp``,
      ``best_bound`` (:func:`best_bound`), ``gap``, ``solve_time_s``, ``wall_s``;
    * ``verification`` (``passed`` / ``failed``; empty without a plan) and
      ``verify_verdict``;
    * ``area_harvested_ha``, ``volume_harvested_m3``, ``largest_opening_ha``,
      ``volume_m3_p<k>`` and ``area_ha_p<k>`` per period;
    * the cost columns of :func:`rule_costs` (``cost_spatial_rules_upper``,
      ``cost_spatial_rules_lower``, ``cost_<column>``, ``ref_<column>``);
    * ``output`` and ``worker``.

    Raises
    ------
    ValueError
        Two columns would get the same name (never for valid settings keys, which all
        keep their section prefix).
    """
    varied_keys: list[str] = []
    for s in scen.scenarios:
        for k in s.varied:
            if k not in varied_keys:
                varied_keys.append(k)
    # Settings keys keep their section prefix, so this never fires for valid keys.
    names = [column_name(k) for k in varied_keys]
    clash = sorted({c for c in names if names.count(c) > 1} | (set(names) & _FIXED_COLUMNS))
    if clash:
        msg = f"comparison table: the setting column {clash[0]!r} clashes with another column"
        raise ValueError(msg)
    P = max((s.settings.horizon.periods for s in scen.scenarios), default=0)
    rows = []
    for s in scen.scenarios:
        r = results.get(s.name) or ScenarioResult(s.name, False, "not_run", error="not run")
        row: dict[str, Any] = {"scenario": s.name, "origin": s.origin}
        flat = _flat_settings(s.settings)
        for k in varied_keys:
            # The value the scenario ran with, also where only another scenario set the key.
            row[column_name(k)] = _shown(flat.get(k, s.varied.get(k, "")))
        row |= {
            "status": r.status,
            "error": r.error or "",
            "diagnosis": " | ".join(r.diagnosis),
            "npv": r.npv,
            "bound_aspatial_lp": r.lp_bound,
            "bound_cpsat": math.nan if r.cpsat_bound is None else r.cpsat_bound,
            "bound_cover_lp": math.nan if r.cover_bound is None else r.cover_bound,
            "best_bound": best_bound(r),
            "gap": r.gap,
            "solve_time_s": r.solve_time_s,
            "wall_s": r.wall_s,
            "verification": ("passed" if r.verify_ok else "failed") if r.ok else "",
            "verify_verdict": r.verify_verdict,
        }
        pdf = r.periods
        vols = np.full(P, np.nan)
        areas = np.full(P, np.nan)
        largest = math.nan
        if pdf is not None and len(pdf):
            idx = pdf["period"].to_numpy(dtype=int) - 1
            ok = (idx >= 0) & (idx < P)
            vols[idx[ok]] = pdf["volume_m3"].to_numpy(float)[ok]
            areas[idx[ok]] = pdf["area_ha"].to_numpy(float)[ok]
            largest = float(np.nanmax(pdf["largest_opening_ha"].to_numpy(float), initial=0.0))
        row["area_harvested_ha"] = float(np.nansum(areas)) if r.ok else math.nan
        row["volume_harvested_m3"] = float(np.nansum(vols)) if r.ok else math.nan
        row["largest_opening_ha"] = largest
        for j in range(P):
            row[f"volume_m3_p{j + 1}"] = vols[j]
        for j in range(P):
            row[f"area_ha_p{j + 1}"] = areas[j]
        row["output"] = f"{s.name}.gpkg" if r.ok else ""
        row["worker"] = r.worker
        rows.append(row)
    table = pd.DataFrame(rows)
    costs = rule_costs(scen, results)
    table = table.merge(costs, left_on="scenario", right_index=True, how="left")
    # keep output/worker at the end
    tail = ["output", "worker"]
    return table[[c for c in table.columns if c not in tail] + tail]


def _write_files(out_dir: Path, files: Mapping[str, bytes]) -> None:
    for rel, data in files.items():
        target = out_dir / rel
        target.parent.mkdir(parents=True, exist_ok=True)
        with atomic_path(target) as tmp:
            tmp.write_bytes(data)


def _outputs_of(scen: ScenarioSet, out_dir: Path) -> list[Path]:
    return [out_dir / "comparison.csv", out_dir / "comparison.png"] + [
        out_dir / f"{n}.gpkg" for n in scen.names
    ]


def check_outputs(scen: ScenarioSet, out_dir: str | Path, overwrite: bool) -> Path:
    """Create the output folder; refuse to overwrite earlier outputs or any input.

    Returns
    -------
    pathlib.Path
        The folder.

    Raises
    ------
    OutputError
        ``out_dir`` is a file or not writable, outputs exist without ``overwrite``, or an
        output would replace an input file.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        msg = f"--out {out} is a file; give a folder"
        raise OutputError(msg)
    out.mkdir(parents=True, exist_ok=True)
    if not os.access(out, os.W_OK):
        msg = f"output folder {out} is not writable"
        raise OutputError(msg)
    existing = [p for p in _outputs_of(scen, out) if p.exists()]
    if existing and not overwrite:
        msg = (
            f"output folder {out} already holds {', '.join(p.name for p in existing[:5])}"
            f"{' ...' if len(existing) > 5 else ''}; pass --overwrite to replace them"
        )
        raise OutputError(msg)
    inputs = {
        p.resolve()
        for p in InputFiles.collect(
            scen.stands, scen.yields, [s.settings for s in scen.scenarios]
        ).paths.values()
    }
    clash = [p for p in _outputs_of(scen, out) if p.resolve() in inputs]
    if clash:
        msg = f"output {clash[0]} is an input file; choose another --out"
        raise OutputError(msg)
    return out


def run_comparison(
    scen: ScenarioSet,
    out_dir: str | Path,
    *,
    client: Any = None,
    ship: bool | None = None,
    ship_limit_mb: float = DEFAULT_SHIP_LIMIT_MB,
    by_unit: bool = False,
    overwrite: bool = False,
    on_submit: Callable[[list[str], str], None] | None = None,
    on_result: Callable[[ScenarioResult], None] | None = None,
    chart: bool = True,
) -> ComparisonResult:
    """Run every scenario as a Dask task and write the comparison.

    Parameters
    ----------
    scen
        From :func:`load_scenarios`.
    out_dir
        Output folder (created when missing): ``<scenario>.gpkg`` each, ``comparison.csv``
        and ``comparison.png``.
    client
        A ``dask.distributed.Client``; ``None`` runs the scenarios one after another in
        this process (same code path per scenario, for tests and debugging).
    ship
        ``True`` send the inputs with the tasks; ``False`` workers read the shared paths;
        ``None`` (default) shared when every worker sees the files (same size), else
        shipped.
    ship_limit_mb
        Largest total input size that is shipped.
    by_unit
        Plan each management unit of each scenario as its own task and merge them.
    overwrite
        Replace earlier outputs in ``out_dir``.
    on_submit
        Called once with the task names and the input mode.
    on_result
        Called with each :class:`ScenarioResult` as it completes (progress display).
    chart
        Write ``comparison.png``.

    Returns
    -------
    ComparisonResult

    Raises
    ------
    OutputError
        Earlier outputs exist without ``overwrite``, or the folder cannot be written.
    """
    out = check_outputs(scen, out_dir, overwrite)
    files = InputFiles.collect(scen.stands, scen.yields, [s.settings for s in scen.scenarios])
    if ship is None:
        # A local cluster sees the client's files; a remote one is asked.
        ship = client is not None and not all(
            client.run(InputFiles.present, files.sizes()).values()
        )
    mode = "shipped" if ship else "shared"
    if ship:
        files = files.ship(ship_limit_mb)

    units: list[str] = []
    if by_unit:
        units = units_for(scen)

    results: dict[str, ScenarioResult] = {}
    if on_submit:
        on_submit(scen.names, mode)

    def _done(res: ScenarioResult) -> None:
        if res.ok and res.files:
            _write_files(out, res.files)
        res.files = {}
        results[res.name] = res
        if on_result:
            on_result(res)

    if client is None:
        for s in scen.scenarios:
            task = ScenarioTask(s.name, s.settings, files)
            if not by_unit:
                _done(run_scenario_task(task))
                continue
            t0 = time.perf_counter()
            try:
                inputs = load_scenario_inputs(task)
            except Exception as exc:  # bad input: this scenario fails, the others go on
                _done(ScenarioResult.from_error(s.name, exc, t0))
                continue
            solves = [solve_unit(inputs, u, scen.unit_overrides.get(u)) for u in units]
            _done(merge_units_task(s.name, inputs, files, *solves))
    else:
        from distributed import as_completed

        shared = client.scatter(files, broadcast=False, hash=False) if ship else files
        light = InputFiles(dict(files.paths))  # the bytes travel once, via ``shared``
        futs: dict[Any, str] = {}
        tag = os.urandom(4).hex()
        for s in scen.scenarios:
            task = ScenarioTask(s.name, s.settings, light)
            if by_unit:
                # Read once per scenario; the unit tasks and the merge take the result.
                loaded = client.submit(
                    load_scenario_inputs, task, shared, pure=False, key=f"load-{s.name}-{tag}"
                )
                ufuts = [
                    client.submit(
                        solve_unit,
                        loaded,
                        u,
                        scen.unit_overrides.get(u),
                        pure=False,
                        key=f"unit-{s.name}-{u}-{tag}",
                    )
                    for u in units
                ]
                f = client.submit(
                    merge_units_task,
                    s.name,
                    loaded,
                    shared,
                    *ufuts,
                    pure=False,
                    key=f"merge-{s.name}-{tag}",
                )
            else:
                f = client.submit(
                    run_scenario_task, task, shared, pure=False, key=f"scenario-{s.name}-{tag}"
                )
            futs[f] = s.name
        try:
            for fut in as_completed(list(futs)):
                try:
                    res = fut.result()
                except Exception as exc:  # the worker died or the task could not run
                    res = ScenarioResult.from_error(futs[fut], exc, time.perf_counter())
                    res.worker = ""
                _done(res)
                fut.release()
        except KeyboardInterrupt:
            client.cancel(list(futs))
            raise

    table = comparison_table(scen, results)
    labels = column_labels(table, scen)
    legend = scenario_labels(scen)
    csv_path = out / "comparison.csv"
    with atomic_path(csv_path) as tmp:
        table.to_csv(tmp, index=False)
    chart_path = None
    if chart:
        from spatialplan.charts import comparison_chart

        chart_path = comparison_chart(
            table,
            out / "comparison.png",
            title=f"Scenario comparison: {scen.path.name}",
            column_labels=labels,
            scenario_labels=legend,
        )
    return ComparisonResult(table, results, csv_path, chart_path, mode, labels, legend)
