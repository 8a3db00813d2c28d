"""Shared CLI pieces: settings flags, error handling, console output."""

from __future__ import annotations

import contextlib
import functools
import logging
import re
import sys
import warnings
from collections.abc import Callable, Iterator
from typing import Any

import click

from spatialplan.errors import InfeasibleError, SettingsError, SpatialPlanError
from spatialplan.settings import ENDING_VALUES, Settings, SettingsNote, load_settings

__all__ = [
    "RENAMED_FLAGS",
    "SETTINGS_FLAGS",
    "SEVERITY_PREFIX",
    "console",
    "flag_overrides",
    "handle_errors",
    "prefixed",
    "run_cli",
    "settings_from_flags",
    "settings_options",
    "split_severity",
    "yields_option",
]

log = logging.getLogger("spatialplan")


def _csv(value: str | None) -> tuple[str, ...] | None:
    if value is None:
        return None
    return tuple(v.strip() for v in value.split(",") if v.strip())


class _FloatOrOff(click.ParamType):
    """A number, or ``off`` to switch an optional rule off (kept as text for the settings)."""

    name = "number|off"

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> Any:
        if isinstance(value, str) and value.strip().lower() == "off":
            return "off"
        try:
            return float(value)
        except (TypeError, ValueError):
            self.fail(f"{value!r} is not a number or 'off'", param, ctx)


FLOAT_OR_OFF = _FloatOrOff()

# flag name -> (dotted settings key, click type, help). Flags win over the TOML file.
SETTINGS_FLAGS: dict[str, tuple[str, Any, str]] = {
    "layer": ("fields.layer", str, "Layer name inside a multi-layer file (GeoPackage)."),
    "id-field": ("fields.id_field", str, "Attribute holding the stand id."),
    "age-field": ("fields.age_field", str, "Attribute holding stand age (years) at the start."),
    "yield-keys": (
        "fields.yield_keys",
        str,
        "Comma-separated attributes that select the yield table.",
    ),
    "reserve-field": (
        "fields.reserve_field",
        str,
        "Attribute flagging reserve stands (never harvested).",
    ),
    "cost-class-field": (
        "fields.cost_class_field",
        str,
        "Attribute holding the harvest-cost class.",
    ),
    "unit-field": (
        "fields.unit_field",
        str,
        "Attribute holding the management unit (with --by-unit).",
    ),
    "crs": ("fields.crs", str, "CRS to assume when the layer has none, e.g. EPSG:32610."),
    "periods": ("horizon.periods", int, "Number of planning periods."),
    "period-length": ("horizon.period_length_yr", float, "Length of one period in years."),
    "max-opening": (
        "rules.max_opening_ha",
        FLOAT_OR_OFF,
        "Maximum opening (clearcut) size in ha, or 'off' for no opening rule.",
    ),
    "green-up": ("rules.green_up_periods", int, "Green-up delay in periods."),
    "min-age": ("rules.min_age_yr", float, "Minimum age at harvest (years, at mid-period)."),
    "max-harvests": (
        "rules.max_harvests",
        int,
        "Most clear-cuts per stand over the horizon (1 = one harvest, no re-entry).",
    ),
    "flow-tolerance": (
        "rules.flow_tolerance",
        FLOAT_OR_OFF,
        "Allowed change of volume between periods (fraction), or 'off' for no even-flow band.",
    ),
    "discount-rate": ("economics.discount_rate", float, "Annual discount rate (fraction)."),
    "price": (
        "economics.price_per_m3",
        float,
        "Single stumpage price per m3 for every diameter; replaces a price schedule of the "
        "settings file (with a note).",
    ),
    "ending-value": (
        "economics.ending_value",
        click.Choice(ENDING_VALUES),
        "Value of the forest left at the end: Faustmann (standing trees and land), "
        "standing (trees only) or none.",
    ),
    "digitising-tolerance": (
        "adjacency.digitising_tolerance_m",
        float,
        "Largest digitising gap (m) between two stand polygons bridged as shared boundary.",
    ),
    "min-shared-edge": (
        "adjacency.min_shared_edge_m",
        float,
        "Shared boundary (m) that makes stands adjacent.",
    ),
    "time-limit": ("solver.time_limit_s", float, "Solver time limit in seconds."),
    "workers": ("solver.workers", int, "CP-SAT search workers."),
    "seed": ("solver.seed", int, "Random seed of the solver."),
    "stop-gap": (
        "solver.stop_gap",
        float,
        "Stop solving when the relative gap to the best proven bound is below this (fraction).",
    ),
    "dem": ("terrain.dem", str, "Digital elevation model (GeoTIFF) for slope and operability."),
    "streams": ("terrain.streams", str, "Stream line layer; a buffer along it is netted out."),
    "stream-buffer": ("terrain.stream_buffer_m", float, "Stream buffer width in metres."),
}

#: Flags of earlier versions -> their new names. They still work (hidden from --help) and
#: print a note naming the new flag, like the old keys in a settings file.
RENAMED_FLAGS: dict[str, str] = {"gap": "stop-gap", "gap-tolerance": "digitising-tolerance"}

_BOOL_FLAGS: dict[str, tuple[str, str]] = {
    "skip-unmatched": ("fields.skip_unmatched", "Exclude stands whose yield keys have no table."),
    "corner-adjacency": (
        "adjacency.corner_adjacency",
        "Stands touching only at a corner are adjacent.",
    ),
    "unit-restriction": (
        "rules.unit_restriction",
        "No two adjacent stands open in the same period.",
    ),
    "non-declining": (
        "rules.non_declining",
        "Harvest volume may not fall from one period to the next.",
    ),
}


def settings_options(names: list[str]) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """Decorator adding ``--settings`` and the named settings flags to a command.

    A renamed flag (:data:`RENAMED_FLAGS`) is added, hidden, beside its new name.
    """

    def deco(f: Callable[..., Any]) -> Callable[..., Any]:
        for name in reversed(names):
            for old, new in RENAMED_FLAGS.items():
                if new == name:
                    key, tp, _h = SETTINGS_FLAGS[name]
                    f = click.option(f"--{old}", type=tp, default=None, hidden=True)(f)
            if name in SETTINGS_FLAGS:
                key, tp, hlp = SETTINGS_FLAGS[name]
                f = click.option(f"--{name}", type=tp, default=None, help=f"{hlp} [{key}]")(f)
            elif name in _BOOL_FLAGS:
                key, hlp = _BOOL_FLAGS[name]
                f = click.option(f"--{name}", is_flag=True, default=None, help=f"{hlp} [{key}]")(f)
            else:  # pragma: no cover - programming error
                raise KeyError(name)
        return click.option(
            "--settings",
            "settings_path",
            type=click.Path(dir_okay=False),
            default=None,
            help="TOML settings file; flags override its values.",
        )(f)

    return deco


def flag_overrides(kwargs: dict[str, Any]) -> dict[str, Any]:
    """Dotted settings keys for the settings flags in ``kwargs`` (consumed from it).

    Flags that were not given map to ``None``, which ``Settings.with_overrides`` skips.
    A renamed flag that was given counts as its new name, with a note.
    """
    for old, new in RENAMED_FLAGS.items():
        old_py, new_py = old.replace("-", "_"), new.replace("-", "_")
        value = kwargs.pop(old_py, None)
        if value is None:
            continue
        if kwargs.get(new_py) is not None:
            msg = f"--{old} is the old name of --{new}; give only --{new}"
            raise click.UsageError(msg)
        kwargs[new_py] = value
        click.echo(prefixed("note", f"flag --{old} is now called --{new}"), err=True)
    overrides: dict[str, Any] = {}
    for name, (key, _tp, _h) in SETTINGS_FLAGS.items():
        py = name.replace("-", "_")
        if py in kwargs:
            val = kwargs.pop(py)
            if name == "yield-keys":
                val = _csv(val)
            overrides[key] = val
    for name, (key, _h) in _BOOL_FLAGS.items():
        py = name.replace("-", "_")
        if py in kwargs:
            val = kwargs.pop(py)
            overrides[key] = True if val else None
    return overrides


def settings_from_flags(settings_path: str | None, kwargs: dict[str, Any]) -> Settings:
    """Load settings from ``--settings`` and apply the flags found in ``kwargs``.

    Consumed keys are removed from ``kwargs``.
    """
    overrides = flag_overrides(kwargs)
    try:
        return load_settings(settings_path, overrides)
    except SettingsError as exc:
        # A bad flag value: name the flag as typed, not only the settings key.
        flags = {key: name for name, (key, *_r) in {**SETTINGS_FLAGS, **_BOOL_FLAGS}.items()}
        for key, val in overrides.items():
            if val is not None and f"'{key}'" in str(exc) and key in flags:
                msg = f"{exc} (given as --{flags[key]})"
                raise SettingsError(msg) from None
        raise


class _Console:
    """Thin wrapper over rich so commands print tables and progress consistently."""

    def __init__(self) -> None:
        from rich.console import Console

        self.out = Console(highlight=False, soft_wrap=True)
        self.err = Console(stderr=True, highlight=False, soft_wrap=True)


@functools.cache
def console() -> _Console:
    """The process-wide console."""
    return _Console()


#: Message prefixes, one per severity, used by every command (console and report).
SEVERITY_PREFIX = {"error": "error:", "warning": "warning:", "info": "note:", "note": "note:"}


def prefixed(severity: str, text: str) -> str:
    """``text`` behind the prefix of ``severity`` (``info`` is printed as ``note:``).

    Examples
    --------
    >>> prefixed("info", "3 stands have no neighbours")
    'note: 3 stands have no neighbours'
    """
    return f"{SEVERITY_PREFIX.get(severity, severity + ':')} {text}"


_OWN_PREFIX = re.compile(r"^\s*(warning|note)\b[\s:-]*", re.IGNORECASE)


def split_severity(message: str) -> tuple[str, str]:
    """``("warning", text)`` for a message that starts with its own ``warning``, else
    ``("note", text)``; ``text`` is the message without that word (the console adds it).

    Examples
    --------
    >>> split_severity("Warning: 2 adjacent stand pairs lie in different units")
    ('warning', '2 adjacent stand pairs lie in different units')
    >>> split_severity("3 stand(s) reserved")
    ('note', '3 stand(s) reserved')
    """
    m = _OWN_PREFIX.match(str(message))
    word = "warning" if m is not None and m.group(1).lower() == "warning" else "note"
    return word, _OWN_PREFIX.sub("", str(message), count=1).strip()


@contextlib.contextmanager
def _settings_notes() -> Iterator[None]:
    """Print each :class:`~spatialplan.settings.SettingsNote` once, as ``note: ...``."""
    shown: set[str] = set()
    with warnings.catch_warnings():
        original = warnings.showwarning

        def show(message: Any, category: Any, *args: Any, **kwargs: Any) -> None:
            if isinstance(category, type) and issubclass(category, SettingsNote):
                text = str(message)
                if text not in shown:
                    shown.add(text)
                    click.echo(prefixed("note", text), err=True)
                return
            original(message, category, *args, **kwargs)

        warnings.simplefilter("always", SettingsNote)
        warnings.showwarning = show
        yield


def _show_usage_error(exc: click.UsageError) -> None:
    """Click's usage message with the project's ``error:`` prefix."""
    c = exc.ctx
    if c is not None:
        hint = ""
        if c.command.get_help_option(c) is not None:
            hint = f"Try '{c.command_path} {c.help_option_names[0]}' for help.\n"
        click.echo(f"{c.get_usage()}\n{hint}", err=True, color=c.color)
    click.echo(f"error: {exc.format_message()}", err=True)


@contextlib.contextmanager
def handle_errors(ctx: click.Context) -> Iterator[None]:
    """Turn errors into one clear message and an exit code (tracebacks only with --debug).

    Messages start with ``error:`` (and notes about the settings with ``note:``), as every
    message of every command does.
    """
    debug = bool((ctx.obj or {}).get("debug")) or "--debug" in sys.argv[1:]
    try:
        with _settings_notes():
            yield
    except SpatialPlanError as exc:
        if debug:
            raise
        click.echo(f"error: {exc}", err=True)
        if isinstance(exc, InfeasibleError):
            for line in exc.diagnosis:
                click.echo(f"  diagnosis: {line}", err=True)
            if not exc.diagnosis:
                click.echo(
                    "  relax the volume/area flow, minimum-age or ending-inventory rules "
                    "and try again",
                    err=True,
                )
        if exc.exit_code in (2, 3):
            click.echo("  no plan was written", err=True)
        ctx.exit(exc.exit_code)
    except KeyboardInterrupt:
        click.echo("warning: interrupted (Ctrl-C); nothing further written", err=True)
        ctx.exit(130)
    except click.UsageError as exc:
        # Bad flags are bad input (exit 1); exit 2 is kept for "the rules admit no plan".
        _show_usage_error(exc)
        ctx.exit(1)
    except (click.exceptions.Exit, click.ClickException, click.Abort, SystemExit):
        raise
    except OSError as exc:  # disk full, permission denied ...: the system's word, not a bug
        if debug:
            raise
        where = f" {exc.filename}" if exc.filename else ""
        click.echo(f"error: cannot read or write{where}: {exc.strerror or exc}", err=True)
        ctx.exit(1)
    except Exception as exc:  # a bug, not a user mistake: say so plainly
        if debug:
            raise
        click.echo(
            f"error: internal error: {type(exc).__name__}: {exc}\n"
            "  this is a bug in spatialplan; run again with --debug for the traceback",
            err=True,
        )
        ctx.exit(70)


def run_cli(group: click.Group, argv: list[str] | None = None) -> Any:
    """Run ``group`` as the console script."""
    return group.main(args=argv, prog_name="spatialplan")


#: ``--yields``: the yield-table CSV of a command that reads stands and yields (``check``,
#: ``plan``); one definition so the option reads the same everywhere.
yields_option = click.option(
    "--yields",
    "yields_path",
    type=click.Path(dir_okay=False),
    default=None,
    help="Yield-table CSV (long format: key columns, age, volume).",
)
