"""Scenario sets: many plans of one forest under different settings, run as Dask tasks.

A *scenario file* (TOML) names the inputs, a base block of settings overrides, named
scenarios and compact sweeps (one key over several values, or the cartesian product of
several keys). :func:`load_scenarios` resolves and validates every scenario's
:class:`~spatialplan.settings.Settings` on the client before anything runs, so a typo in
a key stops the comparison at once with the key named.

:func:`run_comparison` runs each scenario through the same pipeline as ``plan``
(:func:`spatialplan.pipeline.load_inputs` + :func:`spatialplan.pipeline.run_plan`) as one
Dask task (``Client.submit(..., pure=False)``), collects the results as they complete
(``as_completed``), writes each scenario's GeoPackage into the output folder, then the
comparison table (``comparison.csv``) with the "cost of each rule" and a chart.

Inputs reach the workers in one of two ways:

* **shared** - workers read the input files from the same paths as the client (local
  cluster, or a cluster on a shared file system);
* **shipped** - the client reads the files (up to a size limit) and scatters their bytes
  once; each worker writes them into a temporary folder for the task.

Outputs always come back with the task result as bytes and are written by the client,
so the output folder need not be visible to remote workers.

Management units (:func:`plan_by_unit`): with ``fields.unit_field`` set, every unit is
planned as its own task with its own flow rules and the plans are merged into one
output. This decomposition is exact when units share no flow rule and no stand of one
unit touches a stand of another (see ``docs/scaling.md``).
"""

from __future__ import annotations

import dataclasses
import difflib
import itertools
import logging
import math
import os
import re
import shutil
import socket
import tempfile
import time
import tomllib
import traceback
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from spatialplan._io import atomic_path
from spatialplan.errors import (
    InfeasibleError,
    InputError,
    NoSolutionError,
    OutputError,
    SettingsError,
    SpatialPlanError,
)
from spatialplan.settings import Settings, load_settings

__all__ = [
    "DEFAULT_SHIP_LIMIT_MB",
    "RELAX_DIRECTION",
    "ComparisonResult",
    "InputFiles",
    "Scenario",
    "ScenarioResult",
    "ScenarioSet",
    "ScenarioTask",
    "UnitSolve",
    "apply_overrides",
    "check_outputs",
    "check_units_settings",
    "comparison_table",
    "cross_unit_edges",
    "dask_client",
    "flatten_overrides",
    "load_scenarios",
    "merge_unit_plans",
    "plan_by_unit",
    "rule_costs",
    "run_comparison",
    "run_scenario_task",
    "solve_unit_task",
    "split_threads",
    "unit_tasks",
    "units_for",
]

log = logging.getLogger(__name__)

#: Inputs larger than this (sum of all files, MB) are not shipped with the tasks.
DEFAULT_SHIP_LIMIT_MB = 200.0

#: Sentinel value in scenario files that switches an optional rule off (TOML has no null).
OFF = "off"

_SECTIONS = ("inputs", "base", "scenarios", "sweep", "units")
_SWEEP_KEYS = ("name", "vary", "labels", "set", "relaxed")
_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")
_PATH_KEYS = ("terrain.dem", "terrain.streams")
# Settings a comparison cannot honour: they write files beside inputs or to one fixed path.
_REFUSED = {
    "output.write_back": "it would modify the input layer once per scenario",
    "output.raster_out": "every scenario would write the same raster; use plan for rasters",
}
# Per-period targets in absolute m3 / ha do not split across units (see plan_by_unit).
_ABSOLUTE_TARGETS = (
    "rules.period_volume_min_m3",
    "rules.period_volume_max_m3",
    "rules.period_area_min_ha",
    "rules.period_area_max_ha",
)

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
    "adjacency.gap_tolerance_m": -1,
    "adjacency.corner_adjacency": 0,
}


# ---------------------------------------------------------------------------------------
# scenario file
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Scenario:
    """One resolved scenario.

    Attributes
    ----------
    name
        Unique, file-name-safe name (the GeoPackage is ``<name>.gpkg``).
    overrides
        Every dotted override applied on top of the settings file, in order (base,
        sweep ``set``, then the scenario's own keys).
    varied
        The keys that define this scenario (its own table, or the swept keys).
    settings
        The validated settings the scenario runs with.
    origin
        ``"scenario"`` or ``"sweep <i>"``.
    """

    name: str
    overrides: dict[str, Any]
    varied: dict[str, Any]
    settings: Settings
    origin: str = "scenario"


@dataclass(frozen=True)
class ScenarioSet:
    """A parsed scenario file."""

    path: Path
    stands: Path
    yields: Path | None
    settings_path: Path | None
    base: dict[str, Any]
    scenarios: tuple[Scenario, ...]
    unit_overrides: dict[str, dict[str, Any]] = field(default_factory=dict)
    relaxed: dict[str, int] = field(default_factory=dict)

    @property
    def names(self) -> list[str]:
        """Scenario names in file order."""
        return [s.name for s in self.scenarios]


def flatten_overrides(
    table: Mapping[str, Any], prefix: str = "", *, lists_are_leaves: bool = True
) -> dict[str, Any]:
    """Flatten nested TOML tables into dotted keys.

    ``{"rules": {"max_opening_ha": 40}}`` and ``{"rules.max_opening_ha": 40}`` (a quoted
    key) both give ``{"rules.max_opening_ha": 40}``.

    Parameters
    ----------
    table
        Parsed TOML table.
    prefix
        Prefix of the keys (used in recursion).
    lists_are_leaves
        Lists are values (always true for settings; kept for clarity).

    Returns
    -------
    dict
        Dotted key -> value.
    """
    out: dict[str, Any] = {}
    for k, v in table.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict):
            out.update(flatten_overrides(v, key + ".", lists_are_leaves=lists_are_leaves))
        else:
            out[key] = v
    return out


def apply_overrides(settings: Settings, overrides: Mapping[str, Any]) -> Settings:
    """Apply dotted overrides; the value ``"off"`` sets an optional rule to ``None``.

    Parameters
    ----------
    settings
        Starting settings.
    overrides
        Dotted key -> value, as read from a scenario file.

    Returns
    -------
    Settings
        Validated copy.

    Raises
    ------
    SettingsError
        Unknown key (with the nearest valid key), wrong type, out-of-range value, or
        ``"off"`` for a setting that cannot be switched off.
    """
    on = {k: v for k, v in overrides.items() if not (isinstance(v, str) and v == OFF)}
    off = [k for k, v in overrides.items() if isinstance(v, str) and v == OFF]
    s = settings.with_overrides(on) if on else settings
    if not off:
        return s
    from spatialplan.settings import settings_from_dict

    data = s.to_dict()
    for key in off:
        parts = key.split(".")
        node: Any = data
        for p in parts[:-1]:
            node = node.get(p) if isinstance(node, dict) else None
        if not isinstance(node, dict) or parts[-1] not in node:
            settings.with_overrides({key: 0})  # raises the unknown-key error with a hint
            msg = f"unknown setting '{key}'"  # pragma: no cover - with_overrides raised
            raise SettingsError(msg)
        node[parts[-1]] = None
    try:
        return settings_from_dict(data)
    except SettingsError as exc:
        msg = f"{exc} ('{OFF}' only switches off optional rules)"
        raise SettingsError(msg) from None


def _fmt_value(v: Any) -> str:
    if v is None or (isinstance(v, str) and v == OFF):
        return "off"
    if isinstance(v, bool):
        return "on" if v else "off"
    if isinstance(v, float):
        return f"{v:g}"
    return re.sub(r"[^A-Za-z0-9.-]+", "-", str(v)).strip("-") or "x"


def _label(key: str) -> str:
    return key.split(".")[-1]


def _resolve_path_keys(overrides: dict[str, Any], base_dir: Path) -> dict[str, Any]:
    out = dict(overrides)
    for k in _PATH_KEYS:
        v = out.get(k)
        if isinstance(v, str) and v != OFF and not Path(v).is_absolute():
            out[k] = str((base_dir / v).resolve())
    return out


def _check_refused(overrides: Mapping[str, Any], where: str) -> None:
    for k, why in _REFUSED.items():
        v = overrides.get(k)
        if v not in (None, False, OFF):
            msg = f"{where}: setting '{k}' is not supported in a comparison: {why}"
            raise SettingsError(msg)


def load_scenarios(path: str | Path, extra_base: Mapping[str, Any] | None = None) -> ScenarioSet:
    """Read and validate a scenario file.

    File layout (paths are relative to the scenario file)::

        [inputs]
        stands = "stands.gpkg"
        yields = "yields.csv"
        settings = "plan.toml"            # optional settings file

        [base]                            # overrides applied to every scenario
        "solver.time_limit_s" = 15        # quoted dotted keys or nested tables

        [scenarios.no_flow]               # a named scenario
        "rules.flow_tolerance" = "off"    # "off" switches an optional rule off

        [[sweep]]                         # one key = a sweep; several = cartesian product
        name = "grid"                     # optional prefix of the generated names
        vary = { "rules.max_opening_ha" = [20, 40], "economics.discount_rate" = [0.03, 0.05] }
        labels = { "rules.max_opening_ha" = "open", "economics.discount_rate" = "rate" }
        set = { "rules.green_up_periods" = 2 }      # optional, fixed for this sweep
        relaxed = { "rules.max_opening_ha" = "higher" }  # optional, for unknown keys

        [units.North]                     # optional per-unit overrides (--by-unit)
        "rules.period_volume_min_m3" = 5000

    Generated names join ``<label><value>`` with ``_`` (``open20_rate0.03``), after the
    sweep's ``name`` when given.

    Parameters
    ----------
    path
        The scenario TOML file.
    extra_base
        Overrides applied after ``[base]`` (command-line choices such as no maps).

    Returns
    -------
    ScenarioSet

    Raises
    ------
    SettingsError
        Unknown section or key, bad value (naming the scenario and the key), duplicate or
        unsafe scenario names, missing inputs, or no scenario at all.
    """
    p = Path(path)
    if not p.is_file():
        msg = f"scenario file not found: {p}"
        raise SettingsError(msg)
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        msg = f"scenario file {p} is not valid TOML: {exc}"
        raise SettingsError(msg) from None
    here = p.parent
    bad = [k for k in data if k not in _SECTIONS]
    if bad:
        near = difflib.get_close_matches(bad[0], _SECTIONS, n=1)
        hint = f"; did you mean '[{near[0]}]'?" if near else ""
        msg = (
            f"{p}: unknown section(s) {', '.join(repr(b) for b in bad)}{hint}; "
            f"allowed: {', '.join(_SECTIONS)}"
        )
        raise SettingsError(msg)

    inputs = data.get("inputs", {})
    for k in inputs:
        if k not in ("stands", "yields", "settings"):
            msg = f"{p}: unknown key 'inputs.{k}'; allowed: stands, yields, settings"
            raise SettingsError(msg)
    if "stands" not in inputs:
        msg = f"{p}: [inputs] needs 'stands' (the stand layer)"
        raise SettingsError(msg)

    def _path(key: str) -> Path | None:
        v = inputs.get(key)
        if v is None:
            return None
        if not isinstance(v, str):
            msg = f"{p}: 'inputs.{key}' must be a file path, got {v!r}"
            raise SettingsError(msg)
        q = Path(v)
        q = q if q.is_absolute() else (here / q).resolve()
        if not q.exists():
            msg = f"{p}: 'inputs.{key}' = {v!r}: file not found ({q})"
            raise SettingsError(msg)
        return q

    stands = _path("stands")
    assert stands is not None
    yields = _path("yields")
    settings_path = _path("settings")
    start = load_settings(settings_path)

    base = _resolve_path_keys(flatten_overrides(_table(data, "base", p)), here)
    base.update(extra_base or {})
    _check_refused(base, f"{p} [base]")
    try:
        base_settings = apply_overrides(start, base)
    except SettingsError as exc:
        msg = f"{p} [base]: {exc}"
        raise SettingsError(msg) from None

    relaxed: dict[str, int] = {}
    scenarios: list[Scenario] = []

    def _add(name: str, layers: list[dict[str, Any]], varied: dict[str, Any], origin: str) -> None:
        if not _NAME_RE.match(name):
            msg = (
                f"{p}: scenario name {name!r} may hold only letters, digits, '.', '_' and '-' "
                "(it becomes a file name)"
            )
            raise SettingsError(msg)
        s = base_settings
        merged = dict(base)
        for layer in layers:
            layer = _resolve_path_keys(layer, here)
            _check_refused(layer, f"{p} scenario '{name}'")
            try:
                s = apply_overrides(s, layer)
            except SettingsError as exc:
                msg = f"{p} scenario '{name}': {exc}"
                raise SettingsError(msg) from None
            merged.update(layer)
        scenarios.append(Scenario(name, merged, dict(varied), s, origin))

    for name, table in _table(data, "scenarios", p).items():
        if not isinstance(table, dict):
            msg = f"{p}: [scenarios.{name}] must be a table of settings overrides"
            raise SettingsError(msg)
        ov = flatten_overrides(table)
        _add(str(name), [ov], ov, "scenario")

    sweeps = data.get("sweep", [])
    if isinstance(sweeps, dict):
        sweeps = [sweeps]
    if not isinstance(sweeps, list):
        msg = f"{p}: 'sweep' must be [[sweep]] tables"
        raise SettingsError(msg)
    for i, sw in enumerate(sweeps, start=1):
        where = f"{p} [[sweep]] #{i}"
        if not isinstance(sw, dict):
            msg = f"{where}: must be a table"
            raise SettingsError(msg)
        unknown = [k for k in sw if k not in _SWEEP_KEYS]
        if unknown:
            msg = f"{where}: unknown key(s) {unknown}; allowed: {', '.join(_SWEEP_KEYS)}"
            raise SettingsError(msg)
        vary = flatten_overrides(sw.get("vary", {}))
        if not vary:
            msg = f"{where}: needs 'vary' = {{ \"dotted.key\" = [values, ...] }}"
            raise SettingsError(msg)
        for k, vals in vary.items():
            if not isinstance(vals, list) or not vals:
                msg = f"{where}: 'vary.{k}' must be a non-empty list of values"
                raise SettingsError(msg)
        labels = {k: str(v) for k, v in flatten_overrides(sw.get("labels", {})).items()}
        for k, d in flatten_overrides(sw.get("relaxed", {})).items():
            if d not in ("higher", "lower"):
                msg = f'{where}: \'relaxed.{k}\' must be "higher" or "lower", got {d!r}'
                raise SettingsError(msg)
            relaxed[k] = +1 if d == "higher" else -1
        fixed = flatten_overrides(sw.get("set", {}))
        prefix = str(sw["name"]) + "_" if sw.get("name") else ""
        keys = list(vary)
        for combo in itertools.product(*(vary[k] for k in keys)):
            point = dict(zip(keys, combo, strict=True))
            name = prefix + "_".join(
                f"{labels.get(k, _label(k))}{_fmt_value(v)}" for k, v in point.items()
            )
            _add(name, [fixed, point], point, f"sweep {i}")

    if not scenarios:
        msg = f"{p}: no scenarios; add [scenarios.<name>] tables or [[sweep]] tables"
        raise SettingsError(msg)
    seen: dict[str, int] = {}
    for s in scenarios:
        seen[s.name] = seen.get(s.name, 0) + 1
    dup = [n for n, c in seen.items() if c > 1]
    if dup:
        msg = f"{p}: duplicate scenario name(s) {', '.join(dup)}; rename or add a sweep 'name'"
        raise SettingsError(msg)
    if "comparison" in seen:
        msg = f"{p}: 'comparison' is reserved for the comparison table; rename the scenario"
        raise SettingsError(msg)

    units_raw = _table(data, "units", p)
    unit_overrides = {
        str(u): _resolve_path_keys(flatten_overrides(t), here)
        for u, t in units_raw.items()
        if isinstance(t, dict)
    }
    for u, ov in unit_overrides.items():
        try:
            apply_overrides(base_settings, ov)
        except SettingsError as exc:
            msg = f"{p} [units.{u}]: {exc}"
            raise SettingsError(msg) from None
    return ScenarioSet(
        p, stands, yields, settings_path, base, tuple(scenarios), unit_overrides, relaxed
    )


def _table(data: dict[str, Any], key: str, p: Path) -> dict[str, Any]:
    t = data.get(key, {})
    if not isinstance(t, dict):
        msg = f"{p}: [{key}] must be a table"
        raise SettingsError(msg)
    return t


# ---------------------------------------------------------------------------------------
# inputs: shared paths or shipped bytes
# ---------------------------------------------------------------------------------------
def _with_sidecars(path: Path) -> list[Path]:
    """A shapefile comes with .shx/.dbf/.prj... siblings; other formats are one file."""
    if path.suffix.lower() == ".shp":
        return sorted(q for q in path.parent.glob(path.stem + ".*") if q.is_file())
    return [path]


@dataclass
class InputFiles:
    """The input files of a run, as paths (shared) or as bytes (shipped).

    Attributes
    ----------
    paths
        Role (``stands``, ``yields``, ``dem``, ``streams``) -> client-side path.
    blobs
        Only when shipped: role -> list of (file name, bytes) (a shapefile has several).
    """

    paths: dict[str, Path]
    blobs: dict[str, list[tuple[str, bytes]]] | None = None

    @property
    def shipped(self) -> bool:
        """True when the bytes travel with the tasks."""
        return self.blobs is not None

    @staticmethod
    def collect(stands: Path, yields: Path | None, settings: Iterable[Settings]) -> InputFiles:
        """The files a set of runs reads (terrain files from any of the settings)."""
        paths: dict[str, Path] = {"stands": Path(stands)}
        if yields is not None:
            paths["yields"] = Path(yields)
        for s in settings:
            for role in ("dem", "streams"):
                v = getattr(s.terrain, role)
                if v:
                    prev = paths.get(role)
                    if prev is not None and prev != Path(v):
                        msg = (
                            f"scenarios use different terrain.{role} files ({prev}, {v}); "
                            "a comparison reads one of each"
                        )
                        raise SettingsError(msg)
                    paths[role] = Path(v)
        return InputFiles(paths)

    def total_bytes(self) -> int:
        """Size of every file that would be shipped."""
        return sum(q.stat().st_size for p in self.paths.values() for q in _with_sidecars(p))

    def ship(self, limit_mb: float = DEFAULT_SHIP_LIMIT_MB) -> InputFiles:
        """Read the files into memory to send them with the tasks.

        Raises
        ------
        InputError
            The files together exceed ``limit_mb``.
        """
        size = self.total_bytes()
        if size > limit_mb * 1e6:
            msg = (
                f"inputs total {size / 1e6:.1f} MB, above the {limit_mb:g} MB limit for "
                "shipping them with the tasks; put them on a path every worker can read "
                "and use --shared-inputs"
            )
            raise InputError(msg)
        blobs = {
            role: [(q.name, q.read_bytes()) for q in _with_sidecars(p)]
            for role, p in self.paths.items()
        }
        return InputFiles(dict(self.paths), blobs)

    def materialize(self, folder: Path) -> dict[str, Path]:
        """Paths the worker reads: the shared paths, or shipped bytes written to ``folder``."""
        if self.blobs is None:
            return dict(self.paths)
        out: dict[str, Path] = {}
        for role, files in self.blobs.items():
            d = folder / role
            d.mkdir(parents=True, exist_ok=True)
            for name, data in files:
                (d / name).write_bytes(data)
            out[role] = d / self.paths[role].name
        return out


def _visible_on_worker(sizes: dict[str, int]) -> bool:
    """Run on each worker: are the client's input files there, with the same sizes?"""
    return all(os.path.isfile(p) and os.path.getsize(p) == n for p, n in sizes.items())


def _settings_for_worker(settings: Settings, paths: Mapping[str, Path]) -> Settings:
    """Point the terrain paths at the files the worker actually reads."""
    t = settings.terrain
    dem = str(paths["dem"]) if t.dem and "dem" in paths else t.dem
    streams = str(paths["streams"]) if t.streams and "streams" in paths else t.streams
    if (dem, streams) != (t.dem, t.streams):
        settings = dataclasses.replace(
            settings, terrain=dataclasses.replace(t, dem=dem, streams=streams)
        )
    return settings


# ---------------------------------------------------------------------------------------
# tasks (run on the workers)
# ---------------------------------------------------------------------------------------
@dataclass
class ScenarioTask:
    """Everything a worker needs to plan one scenario (picklable)."""

    name: str
    settings: Settings
    files: InputFiles
    unit: str | None = None  # set for one management unit of a by-unit plan


@dataclass
class ScenarioResult:
    """What one scenario (or one merged by-unit plan) produced, or why it failed.

    Attributes
    ----------
    name
        Scenario name.
    ok
        A plan was found and written (it may still have failed verification).
    status
        Solver status (``optimal``, ``feasible``, ``time_limit``, ``interrupted``), or
        ``infeasible``, ``no_solution``, ``input_error``, ``settings_error``, ``error``.
    error, diagnosis
        Message and, for infeasible rules, the diagnosis lines.
    npv, lp_bound, cpsat_bound, gap, solve_time_s
        From :class:`spatialplan.schedule.PlanResult` (NaN when failed).
    verify_ok, verify_verdict
        Independent verification of the written plan.
    periods
        Per period: ``period``, ``volume_m3``, ``area_ha``, ``largest_opening_ha``.
    stand_ids, period
        Harvest period per stand (0 = not harvested), by position.
    files
        Output files relative to the output folder -> bytes (emptied once written).
    messages
        Notes of the run.
    wall_s, worker
        Wall time of the task and where it ran.
    """

    name: str
    ok: bool
    status: str
    error: str | None = None
    diagnosis: list[str] = field(default_factory=list)
    npv: float = float("nan")
    lp_bound: float = float("nan")
    cpsat_bound: float | None = None
    gap: float = float("nan")
    solve_time_s: float = float("nan")
    verify_ok: bool = False
    verify_verdict: str = ""
    periods: pd.DataFrame | None = None
    stand_ids: np.ndarray | None = None
    period: np.ndarray | None = None
    files: dict[str, bytes] = field(default_factory=dict)
    messages: list[str] = field(default_factory=list)
    wall_s: float = float("nan")
    worker: str = ""

    @property
    def succeeded(self) -> bool:
        """Ran, and the plan passed verification."""
        return self.ok and self.verify_ok


def _where() -> str:
    return f"{socket.gethostname()}:{os.getpid()}"


def _col(df: pd.DataFrame, *names: str) -> np.ndarray:
    for n in names:
        if n in df.columns:
            return df[n].to_numpy(dtype=float)
    return np.full(len(df), np.nan)


def _period_summary(periods: pd.DataFrame) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "period": periods["period"].to_numpy(dtype=int),
            "volume_m3": _col(periods, "volume_m3", "harvest_volume_m3"),
            "area_ha": _col(periods, "area_ha", "harvest_area_ha"),
            "largest_opening_ha": _col(periods, "largest_opening_ha", "max_opening_ha"),
        }
    )


def _failure(name: str, exc: BaseException, t0: float) -> ScenarioResult:
    status = {
        InfeasibleError: "infeasible",
        NoSolutionError: "no_solution",
        InputError: "input_error",
        SettingsError: "settings_error",
        OutputError: "output_error",
    }.get(type(exc))
    if status is None:
        status = "failed" if isinstance(exc, SpatialPlanError) else "error"
    err = str(exc) if isinstance(exc, SpatialPlanError) else f"{type(exc).__name__}: {exc}"
    res = ScenarioResult(
        name,
        False,
        status,
        error=err,
        diagnosis=list(getattr(exc, "diagnosis", []) or []),
        wall_s=time.perf_counter() - t0,
        worker=_where(),
    )
    if not isinstance(exc, SpatialPlanError):
        res.messages.append(traceback.format_exc(limit=8))
    return res


def _read_tree(folder: Path) -> dict[str, bytes]:
    return {
        str(q.relative_to(folder)): q.read_bytes() for q in sorted(folder.rglob("*")) if q.is_file()
    }


def run_scenario_task(task: ScenarioTask, files: InputFiles | None = None) -> ScenarioResult:
    """Plan one scenario exactly as ``plan`` does; never raises for a failed plan.

    Runs on a Dask worker (or in-process). Output files are written in a temporary folder
    and returned as bytes in :attr:`ScenarioResult.files`. ``files`` replaces
    ``task.files`` (Dask passes a scattered :class:`InputFiles` here).
    """
    from spatialplan.pipeline import load_inputs, run_plan

    t0 = time.perf_counter()
    try:
        with tempfile.TemporaryDirectory(prefix="spatialplan-") as td:
            tdp = Path(td)
            paths = (files or task.files).materialize(tdp / "in")
            settings = _settings_for_worker(task.settings, paths)
            out_dir = tdp / "out"
            out_dir.mkdir()
            inputs = load_inputs(paths["stands"], paths.get("yields"), settings)
            outcome = run_plan(inputs, out_dir / f"{task.name}.gpkg")
            written = _read_tree(out_dir)
        r = outcome.result
        return ScenarioResult(
            task.name,
            True,
            str(r.status),
            npv=float(r.npv),
            lp_bound=float(r.lp_bound),
            cpsat_bound=None if r.cpsat_bound is None else float(r.cpsat_bound),
            gap=float(r.gap),
            solve_time_s=float(r.solve_time_s),
            verify_ok=bool(outcome.verify.ok),
            verify_verdict=str(outcome.verify.verdict),
            periods=_period_summary(outcome.periods),
            stand_ids=inputs.inventory.stands["stand_id"].to_numpy(dtype=object),
            period=np.asarray(r.period, dtype=np.int64),
            files=written,
            messages=list(outcome.messages) + [str(w) for w in r.stats.get("warnings", [])],
            wall_s=time.perf_counter() - t0,
            worker=_where(),
        )
    except Exception as exc:  # reported per scenario; the other scenarios go on
        return _failure(task.name, exc, t0)


# ---------------------------------------------------------------------------------------
# management units
# ---------------------------------------------------------------------------------------
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


def _unit_labels(stands: pd.DataFrame) -> np.ndarray:
    u = stands["unit"] if "unit" in stands.columns else pd.Series([None] * len(stands))
    return u.astype(object).where(u.notna(), None).to_numpy(dtype=object)


def _subset_inputs(inputs: Any, mask: np.ndarray) -> Any:
    """The same inputs restricted to the stands in ``mask`` (positions renumbered)."""
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


def solve_unit_task(task: ScenarioTask, files: InputFiles | None = None) -> UnitSolve:
    """Solve and verify one management unit (``task.unit``) with its own settings.

    Runs on a Dask worker. The whole layer is read (so positions match the client's) and
    restricted to the unit's stands; flow rules, opening rules and verification apply to
    the unit alone.
    """
    from spatialplan import schedule, verify
    from spatialplan.pipeline import build_problem, load_inputs, schedule_frame

    assert task.unit is not None
    empty = np.zeros(0, dtype=np.int64)
    try:
        with tempfile.TemporaryDirectory(prefix="spatialplan-") as td:
            paths = (files or task.files).materialize(Path(td) / "in")
            settings = _settings_for_worker(task.settings, paths)
            inputs = load_inputs(paths["stands"], paths.get("yields"), settings)
        units = _unit_labels(inputs.inventory.stands)
        mask = np.array([u == task.unit for u in units], dtype=bool)
        positions = np.flatnonzero(mask)
        sub = _subset_inputs(inputs, mask)
        bundle = build_problem(sub)
        r = schedule.solve(bundle.problem, settings.solver)
        sched = schedule_frame(sub, bundle, r.period)
        rep = verify.verify_schedule(sched, settings, sub.growth)
        return UnitSolve(
            task.unit,
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
            worker=_where(),
        )
    except Exception as exc:
        err = str(exc) if isinstance(exc, SpatialPlanError) else f"{type(exc).__name__}: {exc}"
        status = (
            "infeasible"
            if isinstance(exc, InfeasibleError)
            else ("no_solution" if isinstance(exc, NoSolutionError) else "error")
        )
        return UnitSolve(
            task.unit,
            False,
            status,
            empty,
            empty,
            error=err,
            diagnosis=list(getattr(exc, "diagnosis", []) or []),
            worker=_where(),
        )


def cross_unit_edges(edges: np.ndarray, units: np.ndarray) -> np.ndarray:
    """Adjacent stand pairs whose stands belong to different units ((k, 2) positions)."""
    e = np.asarray(edges, dtype=np.int64).reshape(-1, 2)
    if not len(e):
        return e
    u = np.asarray(units, dtype=object)
    return e[u[e[:, 0]] != u[e[:, 1]]]


_STATUS_RANK = ("optimal", "feasible", "time_limit", "interrupted")


def _merge_status(statuses: list[str]) -> str:
    ranks = [
        (_STATUS_RANK.index(s) if s in _STATUS_RANK else len(_STATUS_RANK), s) for s in statuses
    ]
    return max(ranks)[1] if ranks else "optimal"


def unit_tasks(
    name: str,
    settings: Settings,
    files: InputFiles,
    units: list[str],
    unit_overrides: Mapping[str, Mapping[str, Any]] | None = None,
) -> list[ScenarioTask]:
    """One task per unit, each with the unit's own overrides applied."""
    unit_overrides = unit_overrides or {}
    tasks = []
    for u in units:
        s = settings
        ov = unit_overrides.get(u)
        if ov:
            try:
                s = apply_overrides(settings, ov)
            except SettingsError as exc:
                msg = f"[units.{u}]: {exc}"
                raise SettingsError(msg) from None
        tasks.append(ScenarioTask(name, s, files, unit=u))
    return tasks


def check_units_settings(settings: Settings, where: str = "by-unit planning") -> None:
    """Refuse forest-wide absolute per-period targets, which do not split across units."""
    bad = [k for k in _ABSOLUTE_TARGETS if getattr(settings.rules, k.split(".")[1]) is not None]
    if bad:
        msg = (
            f"{where}: {', '.join(bad)} is a forest-wide amount per period and cannot be "
            "split across units; give it per unit in [units.<name>] of a scenario file"
        )
        raise SettingsError(msg)


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
    name: str, settings: Settings, files: InputFiles, solves: list[UnitSolve], out_path: Path
) -> tuple[Any, ScenarioResult]:
    """Merge per-unit plans into one plan of the whole layer and write it.

    Builds the whole problem (adjacency included) to check for stands of different units
    that touch, then writes the output as ``plan`` does (schedule frame, verification,
    openings, period and strata tables, run table, optional views). The flow family of
    rules (flow tolerance, non-declining flow, per-period targets, ending inventory)
    belongs to each unit and was verified per unit; the merged plan is verified against
    every other rule, forest-wide (opening size and green-up across unit boundaries).

    Returns
    -------
    (PlanOutcome or None, ScenarioResult)
    """
    from spatialplan.pipeline import build_problem, load_inputs, write_plan

    t0 = time.perf_counter()
    failed = [u for u in solves if not u.ok]
    if failed:
        lines = [f"unit {u.unit}: {u.status}: {u.error}" for u in failed]
        diag = [f"unit {u.unit}: {d}" for u in failed for d in u.diagnosis]
        status = "infeasible" if any(u.status == "infeasible" for u in failed) else failed[0].status
        return None, ScenarioResult(
            name,
            False,
            status,
            error="; ".join(lines),
            diagnosis=diag,
            wall_s=time.perf_counter() - t0,
            worker=_where(),
        )
    # The inputs stay on disk until the run table (which fingerprints them) is written.
    td = tempfile.mkdtemp(prefix="spatialplan-")
    try:
        paths = files.materialize(Path(td) / "in")
        s = _settings_for_worker(settings, paths)
        inputs = load_inputs(paths["stands"], paths.get("yields"), s)
        bundle = build_problem(inputs)
        n = len(inputs.inventory.stands)
        period = np.zeros(n, dtype=np.int64)
        for u in solves:
            period[u.positions] = u.period
        units = _unit_labels(inputs.inventory.stands)
        cross = cross_unit_edges(bundle.problem.edges, units)
        messages = list(inputs.messages) + list(bundle.messages)
        if len(cross):
            ids = inputs.inventory.stands["stand_id"].to_numpy(dtype=object)
            ex = ", ".join(f"{ids[a]}-{ids[b]}" for a, b in cross[:5])
            messages.append(
                f"warning: {len(cross)} adjacent stand pair(s) lie in different units (e.g. "
                f"{ex}); the opening rule across unit boundaries is not enforced by by-unit "
                "planning, only checked by the verification of the merged plan"
            )
        npv = float(sum(u.npv for u in solves))
        lp = float(sum(u.lp_bound for u in solves))
        cps = (
            None
            if any(u.cpsat_bound is None for u in solves)
            else float(sum(u.cpsat_bound for u in solves if u.cpsat_bound is not None))
        )
        bound = (
            min(lp, cps)
            if cps is not None and math.isfinite(lp)
            else (cps if cps is not None else lp)
        )
        gap = max(0.0, (bound - npv) / max(abs(bound), 1e-9)) if math.isfinite(bound) else math.inf
        from spatialplan.schedule import PlanResult

        result = PlanResult(
            period,
            _merge_status([u.status for u in solves]),
            npv,
            cps,
            lp,
            gap,
            float(max(u.solve_time_s for u in solves)) if solves else 0.0,
            {"units": len(solves), "cross_unit_edges": len(cross), "warnings": []},
        )
        unit_info = "; ".join(
            f"{u.unit}: {u.status}, NPV {u.npv:.2f}, {u.verify_verdict}" for u in solves
        )
        # Flow rules belong to each unit (checked by each unit's own verification); the
        # merged plan is checked forest-wide for everything else, the spatial rules above all.
        outcome = write_plan(
            inputs,
            bundle,
            result,
            out_path,
            verify_settings=_without_flow_rules(s),
            messages=messages,
            run_extra={
                "planned_by_unit": "true",
                "units": unit_info,
                "cross_unit_edges": str(len(cross)),
                "verification": "flow rules per unit (each unit verified on its own); all other "
                "rules on the merged plan",
            },
        )
        rep, periods_df = outcome.verify, outcome.periods
        unit_fail = [u for u in solves if not u.verify_ok]
        for u in unit_fail:
            messages.append(f"unit {u.unit} failed its own verification: {u.verify_verdict}")
        res = ScenarioResult(
            name,
            True,
            result.status,
            npv=npv,
            lp_bound=lp,
            cpsat_bound=cps,
            gap=gap,
            solve_time_s=result.solve_time_s,
            verify_ok=bool(rep.ok) and not unit_fail,
            verify_verdict=str(rep.verdict),
            periods=_period_summary(periods_df),
            stand_ids=inputs.inventory.stands["stand_id"].to_numpy(dtype=object),
            period=period,
            messages=messages,
            wall_s=time.perf_counter() - t0,
            worker=_where(),
        )
        return outcome, res
    except Exception as exc:
        return None, _failure(name, exc, t0)
    finally:
        shutil.rmtree(td, ignore_errors=True)


def _merge_task(
    name: str, settings: Settings, files: InputFiles, *solves: UnitSolve
) -> ScenarioResult:
    """Dask task: merge the unit plans of one scenario and return the files as bytes."""
    with tempfile.TemporaryDirectory(prefix="spatialplan-") as td:
        out_dir = Path(td) / "out"
        out_dir.mkdir()
        _, res = merge_unit_plans(name, settings, files, list(solves), out_dir / f"{name}.gpkg")
        if res.ok:
            res.files = _read_tree(out_dir)
    return res


def plan_by_unit(
    stands: str | Path,
    yields: str | Path | None,
    settings: Settings,
    out_path: str | Path,
    *,
    client: Any = None,
    unit_overrides: Mapping[str, Mapping[str, Any]] | None = None,
    ship: bool = False,
    ship_limit_mb: float = DEFAULT_SHIP_LIMIT_MB,
    on_unit: Callable[[UnitSolve], None] | None = None,
) -> Any:
    """Plan each management unit as its own task and merge the plans into one output.

    Parameters
    ----------
    stands, yields
        Input files (as for ``plan``).
    settings
        Settings with ``fields.unit_field`` naming the unit attribute. Relative flow rules
        (``rules.flow_tolerance``, ``rules.non_declining``) apply within every unit;
        forest-wide absolute per-period targets are refused (give them per unit).
    out_path
        Output GeoPackage (map, report and charts beside it unless ``output.no_map``).
    client
        A ``dask.distributed.Client``; ``None`` solves the units one after another here.
    unit_overrides
        Unit value -> dotted overrides for that unit (its own targets, tolerance ...).
    ship, ship_limit_mb
        Send the input files with the tasks instead of reading shared paths.
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
        No unit field, or an absolute per-period target at forest level.
    InputError
        Stands without a unit value (ids listed).
    InfeasibleError
        A unit's rules admit no plan (the diagnosis names the unit).
    """
    if not settings.fields.unit_field:
        msg = "by-unit planning needs fields.unit_field (the attribute naming each stand's unit)"
        raise SettingsError(msg)
    check_units_settings(settings)
    _inv, units_arr = _read_units(stands, settings.fields)
    units = sorted({str(u) for u in units_arr})
    files = InputFiles.collect(Path(stands), None if yields is None else Path(yields), [settings])
    if ship:
        files = files.ship(ship_limit_mb)
    tasks = unit_tasks(Path(out_path).stem, settings, files, units, unit_overrides)
    solves: list[UnitSolve] = []
    if client is None:
        for t in tasks:
            u = solve_unit_task(t)
            if on_unit:
                on_unit(u)
            solves.append(u)
    else:
        from distributed import as_completed

        shared = client.scatter(files, broadcast=False, hash=False) if ship else files
        light = InputFiles(dict(files.paths))  # the bytes travel once, via ``shared``
        futs = [
            client.submit(
                solve_unit_task,
                dataclasses.replace(t, files=light),
                shared,
                pure=False,
                key=f"unit-{t.unit}-{os.urandom(4).hex()}",
            )
            for t in tasks
        ]
        for fut in as_completed(futs):
            u = fut.result()
            if on_unit:
                on_unit(u)
            solves.append(u)
    outcome, res = merge_unit_plans(Path(out_path).stem, settings, files, solves, Path(out_path))
    if outcome is None:
        if res.status == "infeasible":
            raise InfeasibleError(res.error or "a unit is infeasible", res.diagnosis)
        if res.status == "no_solution":
            raise NoSolutionError(res.error or "no plan found")
        raise SpatialPlanError(res.error or "by-unit planning failed")
    return outcome


# ---------------------------------------------------------------------------------------
# the cluster
# ---------------------------------------------------------------------------------------
def _cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def split_threads(
    n_tasks: int, cores: int | None = None, threads_per_task: int | None = None
) -> tuple[int, int]:
    """How many single-threaded Dask workers and how many CP-SAT threads per task.

    Each Dask worker process runs one task at a time (``threads_per_worker=1``); CP-SAT
    inside the task uses ``solver.workers`` threads. Workers x threads stay within the
    cores: with more tasks than cores every task gets one thread (most parallel); with
    fewer tasks the spare cores go to CP-SAT's portfolio.

    Parameters
    ----------
    n_tasks
        Number of tasks that can run at once.
    cores
        Cores to use (default: the cores this process may run on).
    threads_per_task
        Fixed CP-SAT threads per task (``--workers-per-scenario``).

    Returns
    -------
    (n_workers, threads_per_task)

    Examples
    --------
    >>> split_threads(8, cores=2)
    (2, 1)
    >>> split_threads(2, cores=16)
    (2, 8)
    >>> split_threads(8, cores=8, threads_per_task=4)
    (2, 4)
    """
    cores = cores or _cores()
    n_tasks = max(1, int(n_tasks))
    if threads_per_task is None:
        threads_per_task = max(1, cores // min(n_tasks, cores))
    n_workers = max(1, min(n_tasks, cores // max(1, threads_per_task)))
    return n_workers, int(threads_per_task)


def _quiet_dask() -> None:
    """Keep Dask's own INFO chatter (scheduler, nanny, worker start and stop) off the terminal.

    Dask configures levels on its child loggers, so the parent level alone is not enough.
    With ``-vv`` (root logger at DEBUG) everything stays visible.
    """
    if logging.getLogger().getEffectiveLevel() <= logging.DEBUG:
        return
    names = [n for n in logging.root.manager.loggerDict if n.split(".")[0] == "distributed"]
    for n in {"distributed", *names}:
        logging.getLogger(n).setLevel(logging.ERROR)


class dask_client:  # noqa: N801 - used like a function: ``with dask_client(...) as client``
    """Context manager: a Client on an embedded ``LocalCluster`` or on ``scheduler``.

    Parameters
    ----------
    scheduler
        ``tcp://HOST:PORT`` of a running scheduler, or ``None`` for a local cluster.
    n_workers
        Worker processes of the local cluster (one thread each).
    timeout_s
        How long to wait for the scheduler and its first worker.
    """

    def __init__(
        self, scheduler: str | None = None, n_workers: int = 1, timeout_s: float = 60.0
    ) -> None:
        self.scheduler = scheduler
        self.n_workers = n_workers
        self.timeout_s = timeout_s
        self.cluster: Any = None
        self.client: Any = None

    def __enter__(self) -> Any:
        from distributed import Client, LocalCluster

        _quiet_dask()

        if self.scheduler:
            try:
                self.client = Client(self.scheduler, timeout=f"{self.timeout_s}s")
                self.client.wait_for_workers(1, timeout=self.timeout_s)
            except (OSError, TimeoutError) as exc:
                self._close()
                msg = f"cannot use the Dask scheduler at {self.scheduler}: {exc}"
                raise SettingsError(msg) from None
        else:
            # Loopback only; the scheduler's HTTP server takes a free port (not 8787, which a
            # user's own Dask dashboard may hold).
            self.cluster = LocalCluster(
                n_workers=self.n_workers,
                threads_per_worker=1,
                processes=True,
                host="127.0.0.1",
                dashboard_address=":0",
                silence_logs=logging.ERROR,
            )
            self.client = Client(self.cluster)
        return self.client

    def _close(self) -> None:
        if self.client is not None:
            self.client.close()
        if self.cluster is not None:
            self.cluster.close()

    def __exit__(self, *exc: object) -> None:
        self._close()


# ---------------------------------------------------------------------------------------
# comparison
# ---------------------------------------------------------------------------------------
@dataclass
class ComparisonResult:
    """Outcome of :func:`run_comparison`."""

    table: pd.DataFrame
    results: dict[str, ScenarioResult]
    csv_path: Path
    chart_path: Path | None
    mode: str  # "shared" or "shipped"

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

    ``cost_spatial_rules`` is the aspatial LP bound minus the scenario's NPV (the LP
    keeps the flow rules but drops opening size, green-up and integrality, so it is the
    no-spatial-rules reference). For every rule key that differs between scenarios and
    has a known relaxed side (:data:`RELAX_DIRECTION`, or ``relaxed`` in a sweep),
    ``cost_<key>`` is the NPV of the scenario with the loosest value of that key at the
    same other settings minus this scenario's NPV, and ``ref_<key>`` names that scenario.

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
    npv = {n: results[n].npv if n in results and results[n].ok else math.nan for n in names}
    lp = {n: results[n].lp_bound if n in results and results[n].ok else math.nan for n in names}
    out["cost_spatial_rules"] = [lp[n] - npv[n] for n in names]
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
            ran = [m for m in group if math.isfinite(npv[m])]
            if len({repr(flat[m].get(k)) for m in group}) < 2 or not ran:
                cost.append(math.nan)
                ref.append("")
                continue
            best = max(ran, key=lambda m: _relax_score(flat[m].get(k), direction[k]))
            cost.append(npv[best] - npv[n])
            ref.append(best)
        if any(r for r in ref):
            out[f"cost_{k}"] = cost
            out[f"ref_{k}"] = ref
    return out


def _flat_settings(s: Settings) -> dict[str, Any]:
    """Every setting as dotted key -> value (lists kept as values)."""
    return flatten_overrides(s.to_dict())


def comparison_table(
    scen: ScenarioSet, results: Mapping[str, ScenarioResult], out_dir: Path | None = None
) -> pd.DataFrame:
    """One row per scenario: what it set, how it ran, NPV, bounds, flows, cost of rules.

    Columns: ``scenario``, ``origin``, the varied settings (``set:<key>``), ``status``,
    ``error``, ``diagnosis``, ``npv``, ``lp_bound``, ``cpsat_bound``, ``gap``,
    ``solve_time_s``, ``wall_s``, ``verify_ok``, ``verify_verdict``,
    ``area_harvested_ha``, ``volume_harvested_m3``, ``largest_opening_ha``,
    ``volume_m3_p<k>`` and ``area_ha_p<k>`` per period, the cost columns of
    :func:`rule_costs`, ``output`` and ``worker``.
    """
    varied_keys: list[str] = []
    for s in scen.scenarios:
        for k in s.varied:
            if k not in varied_keys:
                varied_keys.append(k)
    P = max((s.settings.horizon.periods for s in scen.scenarios), default=0)
    rows = []
    for s in scen.scenarios:
        r = results.get(s.name) or ScenarioResult(s.name, False, "not_run", error="not run")
        row: dict[str, Any] = {"scenario": s.name, "origin": s.origin}
        for k in varied_keys:
            v = s.overrides.get(k, "")
            row[f"set:{k}"] = "off" if isinstance(v, str) and v == OFF else v
        row.update(
            {
                "status": r.status,
                "error": r.error or "",
                "diagnosis": " | ".join(r.diagnosis),
                "npv": r.npv,
                "lp_bound": r.lp_bound,
                "cpsat_bound": math.nan if r.cpsat_bound is None else r.cpsat_bound,
                "gap": r.gap,
                "solve_time_s": r.solve_time_s,
                "wall_s": r.wall_s,
                "verify_ok": r.verify_ok if r.ok else False,
                "verify_verdict": r.verify_verdict,
            }
        )
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
        if client is None:
            ship = False
        else:
            sizes = {
                str(p): q.stat().st_size for p in files.paths.values() for q in _with_sidecars(p)
            }
            seen = client.run(_visible_on_worker, sizes)
            ship = not all(seen.values())
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
            if by_unit:
                solves = [
                    solve_unit_task(t)
                    for t in unit_tasks(s.name, s.settings, files, units, scen.unit_overrides)
                ]
                _done(_merge_task(s.name, s.settings, files, *solves))
            else:
                _done(run_scenario_task(task))
    else:
        from distributed import as_completed

        shared = client.scatter(files, broadcast=False, hash=False) if ship else files
        light = InputFiles(dict(files.paths))  # the bytes travel once, via ``shared``
        futs: dict[Any, str] = {}
        tag = os.urandom(4).hex()
        for s in scen.scenarios:
            if by_unit:
                ufuts = [
                    client.submit(
                        solve_unit_task, t, shared, pure=False, key=f"unit-{s.name}-{t.unit}-{tag}"
                    )
                    for t in unit_tasks(s.name, s.settings, light, units, scen.unit_overrides)
                ]
                f = client.submit(
                    _merge_task,
                    s.name,
                    s.settings,
                    shared,
                    *ufuts,
                    pure=False,
                    key=f"merge-{s.name}-{tag}",
                )
            else:
                f = client.submit(
                    run_scenario_task,
                    ScenarioTask(s.name, s.settings, light),
                    shared,
                    pure=False,
                    key=f"scenario-{s.name}-{tag}",
                )
            futs[f] = s.name
        try:
            for fut in as_completed(list(futs)):
                try:
                    res = fut.result()
                except Exception as exc:  # the worker died or the task could not run
                    res = _failure(futs[fut], exc, time.perf_counter())
                    res.worker = ""
                _done(res)
                fut.release()
        except KeyboardInterrupt:
            client.cancel(list(futs))
            raise

    table = comparison_table(scen, results)
    csv_path = out / "comparison.csv"
    with atomic_path(csv_path) as tmp:
        table.to_csv(tmp, index=False)
    chart_path = None
    if chart:
        from spatialplan.charts import comparison_chart

        chart_path = comparison_chart(
            table, out / "comparison.png", title=f"Scenario comparison: {scen.path.name}"
        )
    return ComparisonResult(table, results, csv_path, chart_path, mode)


def _read_units(stands: str | Path, fields: Any) -> tuple[Any, np.ndarray]:
    """Read the stand layer and its unit labels; every stand must name its unit."""
    from spatialplan.inventory import read_stands

    inv = read_stands(stands, fields)
    inv.raise_for_errors()
    units = _unit_labels(inv.stands)
    missing = [str(i) for i, v in zip(inv.stands["stand_id"], units, strict=True) if v is None]
    if missing:
        msg = (
            f"{stands}: {len(missing)} stand(s) have no value in unit field "
            f"'{fields.unit_field}': {', '.join(missing[:20])}"
        )
        raise InputError(msg)
    return inv, units


def units_for(scen: ScenarioSet) -> list[str]:
    """Unit values of the stand layer (read once on the client), checked for gaps."""

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
    _inv, u = _read_units(scen.stands, f)
    unknown = sorted(set(scen.unit_overrides) - {str(v) for v in u})
    if unknown:
        msg = f"{scen.path}: [units] names unit(s) not in the stand layer: {', '.join(unknown)}"
        raise SettingsError(msg)
    return sorted({str(v) for v in u})
