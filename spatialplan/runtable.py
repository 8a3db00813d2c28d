"""The ``run`` table of a plan GeoPackage: what was run, on what, with which result.

One text ``key``/``value`` row per fact: the input files and their SHA-256, the settings
as JSON, the yield table as CSV text (so a plan can be checked without the original
files), software versions, solver status, NPV, bounds and the verdict of the independent
check. This module holds the one writer (:func:`run_table`, a DataFrame that
:func:`spatialplan.outputs.write_plan_geopackage` stores as an attribute table) and the
one reader (:func:`read_run_table`, straight from the file with :mod:`sqlite3`, which
needs no GDAL and is how any SQLite tool would read it).
"""

from __future__ import annotations

import json
import platform
import sqlite3
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pandas as pd

from spatialplan.errors import InputError, SettingsError
from spatialplan.settings import Settings

__all__ = ["RUN_TABLE", "plan_run_info", "read_run_table", "recorded_settings", "run_table"]

RUN_TABLE = "run"  # name of the table inside the GeoPackage


def run_table(info: Mapping[str, Any]) -> pd.DataFrame:
    """The ``run`` table: one text ``key``/``value`` row per entry of ``info``.

    Parameters
    ----------
    info
        Keys to values; values are stored as text (``None`` as an empty string).

    Returns
    -------
    pandas.DataFrame
        Columns ``key`` and ``value`` (both text), in the order of ``info``.

    Examples
    --------
    >>> run_table({"npv": 1.25, "bound_cpsat": None, "solver_status": "optimal"}).to_dict("list")
    {'key': ['npv', 'bound_cpsat', 'solver_status'], 'value': ['1.25', '', 'optimal']}
    """
    # str() of a numpy float is its shortest round-trip text, like str() of a float.
    vals = ["" if v is None else str(v) for v in info.values()]
    return pd.DataFrame({"key": [str(k) for k in info], "value": vals})


def read_run_table(gpkg_path: str | Path, *, missing_ok: bool = False) -> dict[str, str]:
    """Read the ``run`` table of a plan GeoPackage as ``{key: value}`` (values stay text).

    Parameters
    ----------
    gpkg_path
        A GeoPackage written by ``spatialplan plan`` (or :func:`spatialplan.write_outputs`).
    missing_ok
        Return ``{}`` when the file has no ``run`` table instead of raising (``verify``
        checks any GeoPackage with a ``schedule`` layer).

    Returns
    -------
    dict
        Keys to text values; an empty value stays ``""``.

    Raises
    ------
    InputError
        The file is missing or not a GeoPackage/SQLite file, the table is missing (unless
        ``missing_ok``) or lacks the ``key`` and ``value`` columns; the message names the file.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> from spatialplan.outputs import write_plan_geopackage
    >>> with tempfile.TemporaryDirectory() as d:
    ...     path = Path(d) / "plan.gpkg"
    ...     write_plan_geopackage(path, {"run": run_table({"npv": 1.25, "gap": None})})
    ...     read_run_table(path)
    {'npv': '1.25', 'gap': ''}
    """
    path = Path(gpkg_path)
    if not path.is_file():
        msg = f"plan GeoPackage not found: {path}"
        raise InputError(msg)
    try:
        # Read-only URI; as_uri() escapes spaces, '#' and '?' in the file name.
        con = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
    except sqlite3.Error as exc:
        msg = f"{path} cannot be opened as a GeoPackage: {exc}"
        raise InputError(msg) from None
    try:
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if RUN_TABLE not in tables:
            if missing_ok:
                return {}
            msg = (
                f"{path} has no '{RUN_TABLE}' table, so it is not a plan written by "
                "spatialplan (write one with `spatialplan plan`)"
            )
            raise InputError(msg)
        cols = [r[1] for r in con.execute(f'PRAGMA table_info("{RUN_TABLE}")')]
        if "key" not in cols or "value" not in cols:
            msg = (
                f"{path}: table '{RUN_TABLE}' needs text columns 'key' and 'value' "
                f"(has {', '.join(cols)})"
            )
            raise InputError(msg)
        rows = con.execute(f'SELECT "key", "value" FROM "{RUN_TABLE}"').fetchall()
    except sqlite3.DatabaseError as exc:
        msg = f"{path} cannot be read as a GeoPackage: {exc}"
        raise InputError(msg) from None
    finally:
        con.close()
    return {str(k): ("" if v is None else str(v)) for k, v in rows}


def recorded_settings(run: Mapping[str, str], source: str | Path) -> Settings | None:
    """The settings recorded in a run table (``settings_json``), or ``None`` when absent.

    Parameters
    ----------
    run
        From :func:`read_run_table`.
    source
        The GeoPackage, named in messages.

    Raises
    ------
    InputError
        ``settings_json`` is not JSON or not valid settings; the message names the file.

    Examples
    --------
    >>> s = Settings().with_overrides({"horizon.periods": 4})
    >>> recorded_settings({"settings_json": s.to_json()}, "plan.gpkg").horizon.periods
    4
    >>> recorded_settings({}, "plan.gpkg") is None
    True
    """
    from spatialplan.settings import settings_from_dict

    text = run.get("settings_json")
    if not text:
        return None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        msg = f"{source}: {RUN_TABLE}.settings_json is not valid JSON: {exc}"
        raise InputError(msg) from None
    try:
        return settings_from_dict(data, path=f"{source}:{RUN_TABLE}.settings_json")
    except SettingsError as exc:
        msg = f"{source}: recorded settings are not valid: {exc}"
        raise InputError(msg) from None


def _bounds(result: Any) -> dict[str, str]:
    """``best_bound`` (the tightest proven upper bound), its method, the gap and every bound."""
    import math

    from spatialplan.schedule import best_bound, best_bound_method, gap

    lp = float(result.lp_bound)
    cps = None if result.cpsat_bound is None else float(result.cpsat_bound)
    cov = getattr(result, "cover_bound", None)  # scenario results may lack it
    cov = None if cov is None else float(cov)
    best = best_bound(result)
    finite = math.isfinite(best)
    return {
        "best_bound": f"{best:.2f}" if finite else "",
        "best_bound_method": best_bound_method(result),
        # the gap to the best bound (the solver's own gap uses the same tighter bound)
        "gap": f"{gap(float(result.npv), best) if finite else result.gap:.6f}",
        "bound_aspatial_lp": f"{lp:.2f}" if math.isfinite(lp) else "",
        "bound_cover_lp": "" if cov is None or not math.isfinite(cov) else f"{cov:.2f}",
        "bound_cpsat": "" if cps is None else f"{cps:.2f}",
    }


def plan_run_info(
    inputs: Any,
    result: Any,
    verdict: str,
    extra: Mapping[str, Any] | None = None,
    *,
    ending_value_npv: float | None = None,
    sustained_yield: Any = None,
) -> dict[str, str]:
    """The rows a plan records: everything needed to reproduce and audit it.

    Parameters
    ----------
    inputs
        :class:`spatialplan.pipeline.PlanInputs` the plan was built from.
    result
        Anything with the fields of :class:`spatialplan.schedule.PlanResult`.
    verdict
        One line from the independent check.
    extra
        More rows, added last (they win over the standard ones).
    ending_value_npv
        The discounted ending value summed over the stands (part of ``npv``).
    sustained_yield
        :class:`spatialplan.economics.SustainedYield` of the net harvestable area
        (``ltsy_mai_m3_yr`` at MAI culmination, ``ltsy_rotation_m3_yr`` at the Faustmann
        rotation, m3 per year); ``None`` leaves both empty.

    Returns
    -------
    dict
        Keys to text values, ready for :func:`run_table`: ``npv``, ``best_bound``,
        ``best_bound_method``, ``gap`` (to the best bound), ``bound_aspatial_lp``,
        ``bound_cover_lp``, ``bound_cpsat``, ``ending_value_npv``, ``ltsy_mai_m3_yr``,
        ``ltsy_rotation_m3_yr``, the inputs and their SHA-256, the settings, versions,
        solver status and statistics (``stat_*``).
    """
    from importlib.metadata import version

    import geopandas
    import numpy as np
    import shapely

    from spatialplan import __version__
    from spatialplan._io import sha256_file

    s = inputs.settings
    sy = sustained_yield
    rows: dict[str, Any] = {
        "software": f"spatialplan {__version__}",
        "python": platform.python_version(),
        "versions": (
            f"ortools {version('ortools')}; highspy {version('highspy')}; "
            f"geopandas {geopandas.__version__}; shapely {shapely.__version__}; "
            f"numpy {np.__version__}; pandas {pd.__version__}"
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
        **_bounds(result),
        "ending_value_npv": "" if ending_value_npv is None else f"{ending_value_npv:.2f}",
        "ltsy_mai_m3_yr": "" if sy is None else f"{sy.mai_max_m3_yr:.2f}",
        "ltsy_rotation_m3_yr": "" if sy is None else f"{sy.faustmann_m3_yr:.2f}",
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
    return {k: "" if v is None else str(v) for k, v in rows.items()}
