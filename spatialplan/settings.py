"""Run settings: one frozen dataclass tree, loaded from TOML and overridden by CLI flags.

The tree mirrors the TOML sections::

    [fields]      which stand attributes hold id, age, yield keys, reserve flag ...
    [yields]      column names of the yield-table CSV
    [horizon]     number and length of planning periods
    [rules]       opening size, green-up, minimum age, flow, ending inventory ...
    [adjacency]   how stands are judged to touch
    [economics]   discount rate, prices, costs, value of the forest left at the end
    [regeneration] what grows back after a clear-cut, and when
    [growth]      optional parametric curves and diameter/height by age per stratum
    [terrain]     DEM, stream layer, slope classes
    [solver]      time limit, workers, seed, stopping gap
    [output]      map, raster and chart options

Every value is validated once, at load, with a message naming the TOML key (and its line
in the file when it came from one) and the allowed range. Dotted keys such as
``rules.max_opening_ha`` address a value for overrides (CLI flags, scenario files).

A key renamed in a later version (:data:`RENAMED_KEYS`) is read under its new name wherever
it appears: a settings file, a scenario file, a dotted override, or the settings recorded
in an older plan. Each translation, and a single price that replaces a price schedule
(:meth:`Settings.with_overrides`), is reported as a :class:`SettingsNote` warning, which
the command line prints as ``note: ...``.
"""

from __future__ import annotations

import dataclasses
import difflib
import json
import math
import re
import tomllib
import types
import typing
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from spatialplan.errors import SettingsError

__all__ = [
    "OFF",
    "RENAMED_KEYS",
    "AdjacencySettings",
    "ChapmanRichards",
    "Economics",
    "FieldMap",
    "GrowthSettings",
    "Horizon",
    "OutputSettings",
    "PriceClass",
    "Regeneration",
    "Rules",
    "Settings",
    "SettingsNote",
    "SlopeClass",
    "SolverSettings",
    "StratumCurve",
    "TerrainSettings",
    "YieldColumns",
    "apply_overrides",
    "check_refused",
    "flatten_overrides",
    "load_settings",
    "resolve_override_paths",
    "settings_from_dict",
]


def _rng(lo: float | None = None, hi: float | None = None, *, lo_open: bool = False) -> dict:
    return {"min": lo, "max": hi, "lo_open": lo_open}


@dataclass(frozen=True)
class FieldMap:
    """Which attributes of the stand layer hold what."""

    id_field: str = "stand_id"
    age_field: str = "age"
    yield_keys: tuple[str, ...] = ("stratum",)
    reserve_field: str | None = None
    cost_class_field: str | None = None
    unit_field: str | None = None
    layer: str | None = None
    crs: str | None = None  # assigned when the layer has none, e.g. "EPSG:26910"
    skip_unmatched: bool = False


@dataclass(frozen=True)
class YieldColumns:
    """Column names of the long-format yield-table CSV (key columns match ``yield_keys``)."""

    age_column: str = "age"
    volume_column: str = "volume"
    diameter_column: str = "diameter"  # optional in the file; used when present


@dataclass(frozen=True)
class Horizon:
    """Planning periods: ``periods`` periods of ``period_length_yr`` years each."""

    periods: int = field(default=10, metadata=_rng(1, 200))
    period_length_yr: float = field(default=5.0, metadata=_rng(0, 100, lo_open=True))
    # Calendar year of the plan start; 0 reports harvest years as years from the start.
    start_year: int = field(default=0, metadata=_rng(0, 3000))


@dataclass(frozen=True)
class Rules:
    """Harvest rules. ``None`` switches an optional rule off."""

    max_opening_ha: float | None = field(default=40.0, metadata=_rng(0, None, lo_open=True))
    # At least 1: a fresh clearcut is an opening in the period it is cut.
    green_up_periods: int = field(default=2, metadata=_rng(1, 100))
    green_up_years: float | None = field(default=None, metadata=_rng(0, None, lo_open=True))
    green_up_height_m: float | None = field(default=None, metadata=_rng(0, None, lo_open=True))
    unit_restriction: bool = False
    min_age_yr: float = field(default=0.0, metadata=_rng(0, 1000))
    flow_tolerance: float | None = field(default=0.10, metadata=_rng(0, 1))
    non_declining: bool = False
    period_volume_min_m3: float | None = field(default=None, metadata=_rng(0, None))
    period_volume_max_m3: float | None = field(default=None, metadata=_rng(0, None))
    period_area_min_ha: float | None = field(default=None, metadata=_rng(0, None))
    period_area_max_ha: float | None = field(default=None, metadata=_rng(0, None))
    ending_volume_fraction: float | None = field(default=None, metadata=_rng(0, 10))
    ending_mean_age_yr: float | None = field(default=None, metadata=_rng(0, 1000))
    # Harvests per stand over the horizon; None = as many as rules.min_age_yr allows.
    max_harvests: int | None = field(default=None, metadata=_rng(1, None))
    # Old-forest retention (both or neither): in every period at least this share of the
    # forest (of each management unit when fields.unit_field is set) is this old.
    old_forest_age_yr: float | None = field(default=None, metadata=_rng(0, 1000, lo_open=True))
    old_forest_min_share: float | None = field(default=None, metadata=_rng(0, 1))


@dataclass(frozen=True)
class AdjacencySettings:
    """When two stands count as neighbours."""

    min_shared_edge_m: float = field(default=1.0, metadata=_rng(0, None))
    # Largest digitising gap (m) between two polygons that is bridged as shared boundary.
    digitising_tolerance_m: float = field(default=0.5, metadata=_rng(0, 1000))
    corner_adjacency: bool = False


@dataclass(frozen=True)
class PriceClass:
    """One product class of a stumpage price schedule keyed on mean diameter."""

    product: str = "sawlog"
    min_diameter_cm: float = field(default=0.0, metadata=_rng(0, 500))
    price_per_m3: float = 0.0


@dataclass(frozen=True)
class Economics:
    """Prices, costs and the discount rate. All costs default to 0."""

    discount_rate: float = field(default=0.04, metadata=_rng(0, 1))
    price_per_m3: float | None = None
    price_schedule: tuple[PriceClass, ...] = ()
    harvest_cost_per_m3: float = field(default=0.0, metadata=_rng(0, None))
    harvest_cost_by_class: dict[str, float] = field(default_factory=dict)
    regeneration_cost_per_ha: float = field(default=0.0, metadata=_rng(0, None))
    annual_cost_per_ha: float = field(default=0.0, metadata=_rng(0, None))
    # Value of the forest left at the end of the horizon: one of ENDING_VALUES.
    ending_value: str = "faustmann"


#: Allowed values of ``economics.ending_value``.
ENDING_VALUES = ("faustmann", "standing", "none")


@dataclass(frozen=True)
class Regeneration:
    """What grows back after a clear-cut.

    ``stratum_map`` maps a harvested stratum label (yield-key values joined by ``/``) to
    the stratum that regenerates after it; strata not listed regenerate as themselves.
    The new crop is age 0 ``delay_yr`` years after the mid-period harvest.
    """

    delay_yr: float = field(default=0.0, metadata=_rng(0, 1000))
    stratum_map: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class ChapmanRichards:
    """Chapman-Richards curve ``y(t) = A (1 - exp(-k t))**c``."""

    A: float = field(default=0.0, metadata=_rng(0, None, lo_open=True))
    k: float = field(default=0.0, metadata=_rng(0, None, lo_open=True))
    c: float = field(default=1.0, metadata=_rng(0, None, lo_open=True))


@dataclass(frozen=True)
class StratumCurve:
    """A tabulated curve of some quantity against age (diameter in cm, height in m)."""

    ages: tuple[float, ...] = ()
    values: tuple[float, ...] = ()


@dataclass(frozen=True)
class GrowthSettings:
    """Optional per-stratum curves; strata are named by their yield-key values joined by '/'."""

    chapman_richards: dict[str, ChapmanRichards] = field(default_factory=dict)
    diameter_by_age: dict[str, StratumCurve] = field(default_factory=dict)
    height_by_age: dict[str, StratumCurve] = field(default_factory=dict)
    height_chapman_richards: dict[str, ChapmanRichards] = field(default_factory=dict)


@dataclass(frozen=True)
class SlopeClass:
    """A harvest system used up to ``max_slope_pct`` with its own harvest cost.

    ``harvest_cost_per_m3 = None`` (not given) keeps the cost from ``[economics]``.
    """

    system: str = "ground"
    max_slope_pct: float = field(default=35.0, metadata=_rng(0, 10000))
    harvest_cost_per_m3: float | None = field(default=None, metadata=_rng(0, None))


@dataclass(frozen=True)
class TerrainSettings:
    """Terrain and net-area inputs (all optional)."""

    dem: str | None = None
    streams: str | None = None
    streams_layer: str | None = None
    # Buffer distance on each side of a stream line, metres (common practice, local rules differ).
    stream_buffer_m: float = field(default=15.0, metadata=_rng(0, 10000))
    stream_buffer_field: str | None = None
    stream_buffer_by_class: dict[str, float] = field(default_factory=dict)
    # Common practice, local rules differ: ground-based to ~35 %, cable to ~80 %.
    slope_classes: tuple[SlopeClass, ...] = (
        SlopeClass("ground", 35.0),
        SlopeClass("cable", 80.0),
    )
    steep_threshold_pct: float = field(default=35.0, metadata=_rng(0, 10000))
    max_inoperable_share: float = field(default=0.5, metadata=_rng(0, 1))
    # The harvest system is the lowest class covering at least this share of the stand's area
    # (design choice of spatialplan, adjustable).
    system_cover_share: float = field(default=0.8, metadata=_rng(0, 1, lo_open=True))
    # Metres per DEM elevation unit (0.3048 when elevations are in feet).
    elevation_unit_m: float = field(default=1.0, metadata=_rng(0, None, lo_open=True))


@dataclass(frozen=True)
class SolverSettings:
    """CP-SAT controls."""

    time_limit_s: float = field(default=60.0, metadata=_rng(0, None, lo_open=True))
    workers: int = field(default=8, metadata=_rng(1, 256))
    seed: int = field(default=0, metadata=_rng(0, 2**31 - 1))
    # Stop when the relative gap of the best plan to the best proven bound is this small.
    stop_gap: float = field(default=0.001, metadata=_rng(0, 1))
    # Share of the time limit the cover LP bound may use (0 = do not compute it).
    cover_bound_share: float = field(default=0.05, metadata=_rng(0, 1))


@dataclass(frozen=True)
class OutputSettings:
    """Extra outputs."""

    no_map: bool = False
    basemap: str | None = None
    raster_out: str | None = None
    raster_cell_m: float = field(default=10.0, metadata=_rng(0, None, lo_open=True))
    write_back: bool = False
    # Width of the age classes in the charts, the report and `check` (years; 10 is the
    # usual class width for age-class tables, common practice, no source).
    age_class_width_yr: float = field(default=10.0, metadata=_rng(0, 200, lo_open=True))


@dataclass(frozen=True)
class Settings:
    """All settings of one run."""

    fields: FieldMap = field(default_factory=FieldMap)
    yields: YieldColumns = field(default_factory=YieldColumns)
    horizon: Horizon = field(default_factory=Horizon)
    rules: Rules = field(default_factory=Rules)
    adjacency: AdjacencySettings = field(default_factory=AdjacencySettings)
    economics: Economics = field(default_factory=Economics)
    regeneration: Regeneration = field(default_factory=Regeneration)
    growth: GrowthSettings = field(default_factory=GrowthSettings)
    terrain: TerrainSettings = field(default_factory=TerrainSettings)
    solver: SolverSettings = field(default_factory=SolverSettings)
    output: OutputSettings = field(default_factory=OutputSettings)

    # ---- derived values used by several stages -------------------------------------
    @property
    def green_up_periods_effective(self) -> int:
        """Green-up delay in whole periods (years are rounded up to whole periods)."""
        gy = self.rules.green_up_years
        if gy is not None:
            return int(-(-gy // self.horizon.period_length_yr))
        return self.rules.green_up_periods

    def to_dict(self) -> dict[str, Any]:
        """Plain nested dict (JSON/TOML friendly) of every setting."""
        return _to_plain(self)

    def to_json(self) -> str:
        """Settings as a JSON string, as recorded in the output GeoPackage."""
        return json.dumps(self.to_dict(), sort_keys=True)

    def with_overrides(self, overrides: Mapping[str, Any]) -> Settings:
        """Return a copy with dotted keys (``"rules.max_opening_ha"``) replaced.

        Values are validated like values read from a file. ``None`` values are skipped
        so CLI flags that were not given leave the setting alone. Old names of renamed keys
        (:data:`RENAMED_KEYS`) are read as the new ones, with a :class:`SettingsNote`.

        A single price ``economics.price_per_m3`` given here (flag ``--price``, a scenario)
        replaces the price schedule: every diameter then sells at that price, and a
        :class:`SettingsNote` says so. Giving ``economics.price_schedule`` in the same
        overrides keeps the schedule, with the single price as its fallback for strata
        without a diameter (as in a settings file).

        Examples
        --------
        >>> s = Settings(economics=Economics(price_schedule=(PriceClass("saw", 20, 70.0),)))
        >>> import warnings
        >>> with warnings.catch_warnings(record=True) as notes:
        ...     warnings.simplefilter("always")
        ...     t = s.with_overrides({"economics.price_per_m3": 50.0, "solver.gap": 0.0})
        >>> t.economics.price_per_m3, t.economics.price_schedule, t.solver.stop_gap
        (50.0, (), 0.0)
        >>> [str(n.message).split(";")[0] for n in notes]  # doctest: +NORMALIZE_WHITESPACE
        ["setting 'solver.gap' is now called 'solver.stop_gap'",
         'economics.price_per_m3 = 50 replaces the price schedule (1 product class)']
        """
        overrides = _rename_flat(overrides)
        data = self.to_dict()
        price = overrides.get("economics.price_per_m3")
        schedule = data["economics"]["price_schedule"]
        if price is not None and schedule and overrides.get("economics.price_schedule") is None:
            data["economics"]["price_schedule"] = []
            n = len(schedule)
            _note(
                f"economics.price_per_m3 = {_show(price)} replaces the price schedule "
                f"({n} product class{'es' if n != 1 else ''}); every diameter sells at "
                f"{_show(price)} per m3 (a single price given as a flag or an override wins; "
                "give economics.price_schedule with it to keep the schedule)"
            )
        for key, value in overrides.items():
            if value is None:
                continue
            parts = key.split(".")
            node = data
            for p in parts[:-1]:
                if p not in node or not isinstance(node[p], dict):
                    _unknown_key(key, _all_keys())
                node = node[p]
            if parts[-1] not in node and not _is_dict_field(parts):
                _unknown_key(key, _all_keys())
            node[parts[-1]] = value
        return settings_from_dict(data)


def _is_dict_field(parts: list[str]) -> bool:
    """True when ``parts[:-1]`` names a ``dict[str, X]`` setting (free keys)."""
    cls: Any = Settings
    for p in parts[:-1]:
        hints = typing.get_type_hints(cls)
        if p not in hints:
            return False
        tp = hints[p]
        if dataclasses.is_dataclass(tp):
            cls = tp
        else:
            return typing.get_origin(tp) is dict
    return False


def _to_plain(obj: Any) -> Any:
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: _to_plain(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, tuple | list):
        return [_to_plain(v) for v in obj]
    if isinstance(obj, dict):
        return {k: _to_plain(v) for k, v in obj.items()}
    return obj


def _all_keys(cls: Any = None, prefix: str = "") -> list[str]:
    cls = cls or Settings
    keys = []
    for name, tp in typing.get_type_hints(cls).items():
        full = f"{prefix}{name}"
        if dataclasses.is_dataclass(tp):
            keys.extend(_all_keys(tp, full + "."))
        else:
            keys.append(full)
    return keys


# Keys of earlier versions and what replaces them (named in the error instead of a guess).
_RETIRED = {
    "rules.reharvest": (
        "stands are now harvested as often as rules.min_age_yr allows; cap it with "
        "rules.max_harvests (1 = at most one harvest per stand, flag --max-harvests)"
    ),
    "economics.include_ending_value": (
        'use economics.ending_value = "standing" for true or "none" for false; the '
        'default is now "faustmann" (flag --ending-value)'
    ),
    "economics.include_land_value": (
        "the land value after a harvest is now part of the Faustmann ending value "
        '(economics.ending_value = "faustmann", the default), which values the land once, '
        "after each stand's last harvest; remove the key"
    ),
}


#: Keys renamed in a later version: old dotted key -> new dotted key. Wherever the old
#: key appears (a settings file, a scenario file, a dotted override, the settings recorded
#: in an older plan) it is read as the new one, with a :class:`SettingsNote`.
RENAMED_KEYS: dict[str, str] = {
    "solver.gap": "solver.stop_gap",
    "adjacency.gap_tolerance_m": "adjacency.digitising_tolerance_m",
}


class SettingsNote(UserWarning):
    """How a setting was read, worth telling the planner (a renamed key, a replaced schedule).

    The settings are valid as read; the command line prints these as ``note: ...``.
    """


def _note(message: str) -> None:
    warnings.warn(message, SettingsNote, stacklevel=3)


def _show(value: Any) -> str:
    return f"{value:g}" if isinstance(value, float) else repr(value)


def _renamed_note(old: str, new: str, value: Any, where: str) -> None:
    _note(f"setting '{old}'{where} is now called '{new}'; read as {new} = {_show(value)}")


def _both_given(old: str, new: str, where: str) -> typing.NoReturn:
    msg = (
        f"setting '{old}'{where} is the old name of '{new}', which is given too; keep only '{new}'"
    )
    raise SettingsError(msg)


def _rename_nested(data: dict[str, Any], ctx: _Ctx) -> dict[str, Any]:
    """``data`` (nested sections) with old names of renamed keys replaced by the new ones."""
    for old, new in RENAMED_KEYS.items():
        section, leaf = old.split(".")
        table = data.get(section)
        if not isinstance(table, dict) or leaf not in table:
            continue
        new_leaf = new.split(".")[-1]
        where = ctx.where(old) or (f" (in {ctx.path})" if ctx.path else "")
        if new_leaf in table:
            _both_given(old, new, where)
        table = {(new_leaf if k == leaf else k): v for k, v in table.items()}
        data = {**data, section: table}
        _renamed_note(old, new, table[new_leaf], where)
    return data


def _rename_flat(overrides: Mapping[str, Any]) -> dict[str, Any]:
    """Dotted ``overrides`` with old names of renamed keys replaced by the new ones."""
    out = dict(overrides)
    for old, new in RENAMED_KEYS.items():
        if old not in out:
            continue
        if new in out:
            _both_given(old, new, "")
        value = out.pop(old)
        out[new] = value
        _renamed_note(old, new, value, "")
    return out


def _unknown_key(key: str, valid: list[str], where: str = "") -> typing.NoReturn:
    if key in _RETIRED:
        msg = f"setting '{key}'{where} was removed: {_RETIRED[key]}"
        raise SettingsError(msg)
    short = key.split(".")[-1]
    pool = {k.split(".")[-1]: k for k in valid}
    near = difflib.get_close_matches(key, valid, n=1, cutoff=0.6) or [
        pool[m] for m in difflib.get_close_matches(short, list(pool), n=1, cutoff=0.6)
    ]
    hint = f"; did you mean '{near[0]}'?" if near else ""
    msg = f"unknown setting '{key}'{where}{hint}"
    raise SettingsError(msg)


class _Ctx:
    """Where a value came from, to put the TOML line into messages."""

    def __init__(self, text: str | None, path: str | None) -> None:
        self.text = text
        self.path = path

    def where(self, key: str) -> str:
        if self.text is None:
            return ""
        line = _find_line(self.text, key)
        old = {v: k for k, v in RENAMED_KEYS.items()}.get(key)
        if line is None and old is not None:  # the file holds the key under its old name
            line = _find_line(self.text, old)
        loc = f"{self.path}" if self.path else "settings"
        return f" ({loc}, line {line})" if line else f" ({loc})"


def _find_line(text: str, dotted: str) -> int | None:
    """Best-effort line number of ``dotted`` key in TOML ``text``."""
    parts = dotted.split(".")
    leaf = parts[-1]
    section = ".".join(parts[:-1])
    current = ""
    pat_sec = re.compile(r"^\s*\[\[?\s*([^\]]+?)\s*\]\]?\s*$")
    pat_key = re.compile(r"^\s*(\"?[\w\-/ .]+\"?)\s*=")
    fallback = None
    for i, line in enumerate(text.splitlines(), start=1):
        m = pat_sec.match(line)
        if m:
            current = m.group(1).replace('"', "")
            if current == dotted:  # the key names a whole section, e.g. [rulez]
                return i
            continue
        m = pat_key.match(line)
        if m:
            k = m.group(1).strip().strip('"')
            full = f"{current}.{k}" if current else k
            if full == dotted or (current == section and k == leaf):
                return i
            if k == leaf and fallback is None:
                fallback = i
    return fallback


def _is_off(value: Any) -> bool:
    """``"off"`` (any case): an optional rule switched off (TOML has no null)."""
    return isinstance(value, str) and value.strip().lower() == OFF


def _convert(tp: Any, value: Any, key: str, ctx: _Ctx, meta: dict | None = None) -> Any:
    origin = typing.get_origin(tp)
    args = typing.get_args(tp)
    if origin in (types.UnionType, typing.Union):
        inner = [a for a in args if a is not type(None)]
        # "off" switches an optional numeric rule off in a settings file or a flag, as in
        # scenario files (TOML has no null); text settings keep "off" as text.
        if value is None or (_is_off(value) and str not in inner):
            return None
        return _convert(inner[0], value, key, ctx, meta)
    if dataclasses.is_dataclass(tp):
        if not isinstance(value, dict):
            _type_error(key, value, "a table", ctx)
        return _build(tp, value, key + ".", ctx)
    if origin is tuple:
        if isinstance(value, str) and args and args[0] is str:
            value = [v.strip() for v in value.split(",") if v.strip()]
        if not isinstance(value, list | tuple):
            _type_error(key, value, "a list", ctx)
        return tuple(_convert(args[0], v, f"{key}[{i}]", ctx) for i, v in enumerate(value))
    if origin is dict:
        if not isinstance(value, dict):
            _type_error(key, value, "a table", ctx)
        return {str(k): _convert(args[1], v, f"{key}.{k}", ctx) for k, v in value.items()}
    if tp is bool:
        if not isinstance(value, bool):
            _type_error(key, value, "true or false", ctx)
        return value
    if tp is int:
        if isinstance(value, bool) or not (
            isinstance(value, int) or (isinstance(value, float) and value.is_integer())
        ):
            _type_error(key, value, "a whole number", ctx)
        value = int(value)
    elif tp is float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            _type_error(key, value, "a number", ctx)
        value = float(value)
        if not math.isfinite(value):  # NaN or inf would poison the model's arithmetic
            _type_error(key, value, "a finite number", ctx)
    elif tp is str:
        if not isinstance(value, str):
            _type_error(key, value, "a text string", ctx)
        return value
    if meta and isinstance(value, int | float):
        lo, hi, lo_open = meta.get("min"), meta.get("max"), meta.get("lo_open", False)
        bad = (lo is not None and (value < lo or (lo_open and value == lo))) or (
            hi is not None and value > hi
        )
        if bad:
            lo_s = "-inf" if lo is None else f"{lo:g}"
            hi_s = "inf" if hi is None else f"{hi:g}"
            bracket = "(" if lo_open else "["
            msg = (
                f"setting '{key}' = {value!r} is out of range{ctx.where(key)}; "
                f"allowed {bracket}{lo_s}, {hi_s}]"
            )
            raise SettingsError(msg)
    return value


def _type_error(key: str, value: Any, expected: str, ctx: _Ctx) -> typing.NoReturn:
    msg = f"setting '{key}' must be {expected}, got {value!r}{ctx.where(key)}"
    raise SettingsError(msg)


def _build(cls: Any, data: dict, prefix: str, ctx: _Ctx) -> Any:
    hints = typing.get_type_hints(cls)
    flds = {f.name: f for f in dataclasses.fields(cls)}
    kwargs = {}
    for key, value in data.items():
        if key not in hints:
            valid = [prefix + k for k in hints]
            _unknown_key(prefix + key, valid + _all_keys(), ctx.where(prefix + key))
        kwargs[key] = _convert(hints[key], value, prefix + key, ctx, dict(flds[key].metadata))
    return cls(**kwargs)


def settings_from_dict(
    data: dict[str, Any], *, text: str | None = None, path: str | None = None
) -> Settings:
    """Build and validate :class:`Settings` from a nested dict (as parsed from TOML).

    Parameters
    ----------
    data
        Nested mapping of sections to keys.
    text, path
        The TOML source and its file name, used only to name lines in messages.

    Returns
    -------
    Settings
        The validated settings.
    """
    ctx = _Ctx(text, path)
    data = _rename_nested(data, ctx)
    if text is None:
        data = _upgrade_recorded(data)
    s = _build(Settings, data, "", ctx)
    _check_consistency(s, ctx)
    return s


def _upgrade_recorded(data: dict[str, Any]) -> dict[str, Any]:
    """Translate retired keys of settings recorded by an earlier version (a plan's run table).

    Only for dicts that did not come from a settings file: a file with a retired key gets
    the message of ``_RETIRED`` instead. ``include_ending_value`` false/true becomes
    ``ending_value`` "none"/"standing", ``include_land_value = true`` (the land's value added
    at the harvest) becomes "faustmann"; ``reharvest = false`` becomes ``max_harvests = 1``.
    A retired key holding a value that never worked is left for the error.
    """
    econ, rules = data.get("economics"), data.get("rules")
    if not isinstance(econ, dict) and not isinstance(rules, dict):
        return data
    data = dict(data)
    if isinstance(econ, dict) and ({"include_ending_value", "include_land_value"} & set(econ)):
        econ = dict(econ)
        ending = econ.pop("include_ending_value", None)
        land = econ.pop("include_land_value", None)
        if "ending_value" not in econ and (ending is not None or land is not None):
            econ["ending_value"] = "faustmann" if land is True else "standing" if ending else "none"
        data["economics"] = econ
    if isinstance(rules, dict) and rules.get("reharvest") is False:
        rules = {k: v for k, v in rules.items() if k != "reharvest"}
        rules.setdefault("max_harvests", 1)
        data["rules"] = rules
    return data


def _check_consistency(s: Settings, ctx: _Ctx) -> None:
    r = s.rules
    problems = []
    pairs = [
        ("period_volume_min_m3", "period_volume_max_m3"),
        ("period_area_min_ha", "period_area_max_ha"),
    ]
    for lo, hi in pairs:
        a, b = getattr(r, lo), getattr(r, hi)
        if a is not None and b is not None and a > b:
            problems.append(
                f"contradictory rules: rules.{lo} = {a:g} is above rules.{hi} = {b:g}"
                f"{ctx.where('rules.' + lo)}"
            )
    if r.green_up_years is not None and r.green_up_height_m is not None:
        problems.append(
            "contradictory rules: give either rules.green_up_years or rules.green_up_height_m"
            f", not both{ctx.where('rules.green_up_height_m')}"
        )
    if (r.old_forest_age_yr is None) != (r.old_forest_min_share is None):
        given, missing = (
            ("old_forest_age_yr", "old_forest_min_share")
            if r.old_forest_min_share is None
            else ("old_forest_min_share", "old_forest_age_yr")
        )
        problems.append(
            f"rules.{given} is set but rules.{missing} is not{ctx.where('rules.' + given)}; "
            "the old-forest rule needs both (the age that counts as old and the least share "
            "of the forest that old)"
        )
    ev = s.economics.ending_value
    if ev not in ENDING_VALUES:
        problems.append(
            f"setting 'economics.ending_value' = {ev!r} is not allowed"
            f"{ctx.where('economics.ending_value')}; choose one of "
            + ", ".join(f'"{v}"' for v in ENDING_VALUES)
        )
    for src, dst in s.regeneration.stratum_map.items():
        if not str(src).strip() or not str(dst).strip():
            problems.append(
                f"setting 'regeneration.stratum_map' maps {src!r} to {dst!r}: both must be "
                "stratum labels (yield-key values joined by '/')"
                f"{ctx.where('regeneration.stratum_map')}"
            )
    ms = [c.max_slope_pct for c in s.terrain.slope_classes]
    if ms != sorted(ms):
        problems.append(
            "terrain.slope_classes must be ordered by increasing max_slope_pct"
            f"{ctx.where('terrain.slope_classes')}"
        )
    if problems:
        raise SettingsError("\n".join(problems))


#: Settings that hold file paths: relative paths are taken from the folder of the file
#: that names them (a settings file, or a scenario file for its overrides).
_PATH_KEYS = ("terrain.dem", "terrain.streams")


def _resolve_paths(s: Settings, base: Path) -> Settings:
    """Make file paths given in a settings file relative to that file's folder."""
    for dotted in _PATH_KEYS:
        section, key = dotted.split(".")
        sub = getattr(s, section)
        value = getattr(sub, key)
        if value and not Path(value).is_absolute():
            sub = dataclasses.replace(sub, **{key: str((base / value).resolve())})
            s = dataclasses.replace(s, **{section: sub})
    return s


def load_settings(
    path: str | Path | None = None, overrides: dict[str, Any] | None = None
) -> Settings:
    """Read settings from a TOML file (or defaults) and apply dotted-key overrides.

    Parameters
    ----------
    path
        A TOML settings file, or ``None`` for the defaults.
    overrides
        Dotted keys to values; ``None`` values are ignored (flags that were not given).

    Returns
    -------
    Settings

    Raises
    ------
    SettingsError
        Unknown key (with the nearest valid key), wrong type or out-of-range value,
        naming the key and its line in the file.
    """
    if path is None:
        s = Settings()
    else:
        p = Path(path)
        if not p.is_file():
            msg = f"settings file not found: {p}"
            raise SettingsError(msg)
        try:
            text = p.read_text(encoding="utf-8")
        except UnicodeDecodeError as exc:
            line = p.read_bytes()[: exc.start].count(b"\n") + 1
            msg = f"settings file {p} is not UTF-8 text (line {line}); save it as UTF-8"
            raise SettingsError(msg) from None
        except OSError as exc:
            msg = f"cannot read settings file {p}: {exc.strerror or exc}"
            raise SettingsError(msg) from None
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            msg = f"settings file {p} is not valid TOML: {exc}"
            raise SettingsError(msg) from None
        s = settings_from_dict(data, text=text, path=str(p))
        s = _resolve_paths(s, p.parent)
    if overrides:
        s = s.with_overrides(overrides)
    return s


# ---------------------------------------------------------------------------------------
# overrides as written in files (scenario files): nested tables, "off", relative paths
# ---------------------------------------------------------------------------------------
#: Value that switches an optional rule off in an override (TOML has no null).
OFF = "off"


def flatten_overrides(table: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    """Flatten nested TOML tables into dotted keys; lists stay values.

    Parameters
    ----------
    table
        Parsed TOML table.
    prefix
        Prefix of the keys (used in recursion).

    Returns
    -------
    dict
        Dotted key -> value.

    Examples
    --------
    A nested table and a quoted dotted key give the same override:

    >>> flatten_overrides({"rules": {"max_opening_ha": 40}, "solver.seed": 1})
    {'rules.max_opening_ha': 40, 'solver.seed': 1}

    The old name of a renamed key comes out as the new one (with a :class:`SettingsNote`):

    >>> import warnings
    >>> with warnings.catch_warnings():
    ...     warnings.simplefilter("ignore", SettingsNote)
    ...     flatten_overrides({"adjacency": {"gap_tolerance_m": 1.0}})
    {'adjacency.digitising_tolerance_m': 1.0}
    """
    out: dict[str, Any] = {}
    for k, v in table.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict):
            out.update(flatten_overrides(v, key + "."))
        else:
            out[key] = v
    return _rename_flat(out) if not prefix else out


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

    Examples
    --------
    >>> s = apply_overrides(Settings(), {"rules.flow_tolerance": "off", "rules.min_age_yr": 30})
    >>> s.rules.flow_tolerance is None, s.rules.min_age_yr
    (True, 30.0)
    """
    overrides = _rename_flat(overrides)
    on = {k: v for k, v in overrides.items() if not _is_off(v)}
    off = [k for k, v in overrides.items() if _is_off(v)]
    s = settings.with_overrides(on) if on else settings
    if not off:
        return s
    data = s.to_dict()
    for key in off:
        parts = key.split(".")
        node: Any = data
        for p in parts[:-1]:
            node = node.get(p) if isinstance(node, dict) else None
        if not isinstance(node, dict) or parts[-1] not in node:
            _unknown_key(key, _all_keys())
        node[parts[-1]] = None
    try:
        return settings_from_dict(data)
    except SettingsError as exc:
        msg = f"{exc} ('{OFF}' only switches off optional rules)"
        raise SettingsError(msg) from None


def resolve_override_paths(overrides: Mapping[str, Any], base_dir: Path) -> dict[str, Any]:
    """Make relative file paths among ``overrides`` relative to ``base_dir``.

    Only the path settings (``terrain.dem``, ``terrain.streams``) are touched; ``"off"``
    stays ``"off"``.

    Examples
    --------
    >>> resolve_override_paths({"terrain.dem": "/data/dem.tif", "rules.min_age_yr": 30}, Path("."))
    {'terrain.dem': '/data/dem.tif', 'rules.min_age_yr': 30}
    """
    out = dict(overrides)
    for k in _PATH_KEYS:
        v = out.get(k)
        if isinstance(v, str) and not _is_off(v) and not Path(v).is_absolute():
            out[k] = str((base_dir / v).resolve())
    return out


def check_refused(overrides: Mapping[str, Any], refused: Mapping[str, str], where: str) -> None:
    """Refuse overrides that turn on a setting the caller cannot honour.

    Parameters
    ----------
    overrides
        Dotted key -> value.
    refused
        Dotted key -> why it is refused. A key set to ``None``, ``False`` or ``"off"`` is
        accepted (the setting stays off).
    where
        Start of the message (file and table).

    Raises
    ------
    SettingsError
        The first refused key that is set, with the reason.
    """
    for k, why in refused.items():
        v = overrides.get(k)
        if not (v is None or v is False or _is_off(v)):
            msg = f"{where}: setting '{k}' is refused: {why}"
            raise SettingsError(msg)
