"""Scenario files: read, resolve and validate every scenario before anything runs.

A *scenario file* (TOML) names the inputs, a base block of settings overrides, named
scenarios, compact sweeps (one key over several values, or the cartesian product of
several keys) and optional per-unit overrides. :func:`load_scenarios` resolves every
scenario's :class:`~spatialplan.settings.Settings` on the client, so a typo in a key stops
the comparison at once with the key named. :class:`InputFiles` names the files a set of
runs reads and carries them to the workers, as shared paths or as shipped bytes.
"""

from __future__ import annotations

import dataclasses
import difflib
import itertools
import os
import re
import tomllib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from spatialplan.errors import InputError, SettingsError
from spatialplan.scenarios.units import check_unit_overrides
from spatialplan.settings import (
    OFF,
    Settings,
    apply_overrides,
    check_refused,
    flatten_overrides,
    load_settings,
    resolve_override_paths,
)

__all__ = [
    "DEFAULT_SHIP_LIMIT_MB",
    "InputFiles",
    "Scenario",
    "ScenarioSet",
    "load_scenarios",
]

#: Inputs larger than this (sum of all files, MB) are not shipped with the tasks.
DEFAULT_SHIP_LIMIT_MB = 200.0

_SECTIONS = ("inputs", "base", "scenarios", "sweep", "units")
_SWEEP_KEYS = ("name", "vary", "labels", "set", "relaxed")
_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")
# Settings a comparison cannot honour: they write files beside inputs or to one fixed path.
_REFUSED = {
    "output.write_back": "a comparison would modify the input layer once per scenario",
    "output.raster_out": "every scenario of a comparison would write the same raster; "
    "use plan for rasters",
}


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
    """A parsed scenario file.

    Attributes
    ----------
    path, stands, yields, settings_path
        The scenario file and the files it names (absolute).
    base
        The ``[base]`` overrides (plus command-line choices).
    scenarios
        Every resolved scenario, in file order.
    unit_overrides
        Unit value -> dotted overrides of ``[units.<name>]`` (for ``--by-unit``).
    relaxed
        Key -> relaxed side (+1 higher, -1 lower) from the sweeps' ``relaxed`` tables.
    """

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

    base = resolve_override_paths(flatten_overrides(_table(data, "base", p)), here)
    base.update(extra_base or {})
    check_refused(base, _REFUSED, f"{p} [base]")
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
            layer = resolve_override_paths(layer, here)
            check_refused(layer, _REFUSED, f"{p} scenario '{name}'")
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
        str(u): resolve_override_paths(flatten_overrides(t), here)
        for u, t in units_raw.items()
        if isinstance(t, dict)
    }
    check_unit_overrides(base_settings, unit_overrides, str(p))
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
# input files: shared paths or shipped bytes
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

    def sizes(self) -> dict[str, int]:
        """Client-side path -> size in bytes of every file (side files included)."""
        return {str(q): q.stat().st_size for p in self.paths.values() for q in _with_sidecars(p)}

    @staticmethod
    def present(sizes: Mapping[str, int]) -> bool:
        """Run on a worker: are the client's files there, with the sizes of :meth:`sizes`?"""
        return all(os.path.isfile(p) and os.path.getsize(p) == n for p, n in sizes.items())

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

    def for_worker(self, folder: Path, settings: Settings) -> tuple[dict[str, Path], Settings]:
        """:meth:`materialize`, and the settings with the terrain paths pointed at those files."""
        paths = self.materialize(folder)
        t = settings.terrain
        dem = str(paths["dem"]) if t.dem and "dem" in paths else t.dem
        streams = str(paths["streams"]) if t.streams and "streams" in paths else t.streams
        if (dem, streams) != (t.dem, t.streams):
            terrain = dataclasses.replace(t, dem=dem, streams=streams)
            settings = dataclasses.replace(settings, terrain=terrain)
        return paths, settings
