"""Reading a plan GeoPackage for verify: the schedule layer, the recorded run and harvests."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import geopandas as gpd
import pandas as pd
import pyogrio

from spatialplan.errors import InputError
from spatialplan.runtable import read_run_table, recorded_settings
from spatialplan.settings import Settings
from spatialplan.verify.yields import YieldRows, read_yield_rows

__all__ = ["read_harvests", "read_plan"]


def _layers(path: Path) -> list[str]:
    if not path.is_file():
        msg = f"plan file not found: {path}"
        raise InputError(msg)
    try:
        return [str(x) for x in pyogrio.list_layers(path)[:, 0]]
    except Exception as exc:  # pyogrio raises its own DataSourceError types
        msg = f"{path} cannot be opened as a GeoPackage: {exc}"
        raise InputError(msg) from None


def read_plan(
    gpkg_path: str | Path,
    overrides: dict[str, Any] | None = None,
    yields_path: str | Path | None = None,
    settings: Settings | None = None,
) -> tuple[gpd.GeoDataFrame, Settings | None, YieldRows | None]:
    """Read a plan GeoPackage: the ``schedule`` layer, recorded settings and yield table.

    Parameters
    ----------
    gpkg_path
        Output of ``spatialplan plan`` (or any GeoPackage with a ``schedule`` layer).
    overrides
        Dotted-key settings overrides applied to the recorded settings (CLI flags).
    yields_path
        Yield-table CSV to use instead of the table recorded in the file.
    settings
        Settings to use instead of the recorded ones (``overrides`` are not applied to
        them; e.g. from a ``--settings`` file with the flags already applied).

    Returns
    -------
    schedule
        The schedule layer.
    settings
        Recorded settings with the overrides, or ``None`` when the file records none.
    yields
        Verify's reading of ``yields_path`` or of the recorded ``yields_csv``, or ``None``
        when neither exists.

    Raises
    ------
    InputError
        Missing file or ``schedule`` layer, unreadable recorded settings or yield table.
    """
    path = Path(gpkg_path)
    layers = _layers(path)
    if "schedule" not in layers:
        msg = f"{path} has no layer 'schedule' (layers: {', '.join(layers) or 'none'})"
        raise InputError(msg)
    schedule = gpd.read_file(path, layer="schedule")
    run = read_run_table(path, missing_ok=True)
    if settings is None and run.get("settings_json"):
        settings = recorded_settings(run, path)
        if settings is not None and overrides:
            settings = settings.with_overrides(overrides)
    s = settings or Settings().with_overrides(overrides or {})
    keys, columns = s.fields.yield_keys, s.yields
    if yields_path is not None:
        return schedule, settings, read_yield_rows(yields_path, keys, columns)
    if run.get("yields_csv"):
        text, name = run["yields_csv"], f"{path}:run.yields_csv"
        return schedule, settings, read_yield_rows(text, keys, columns, name, is_text=True)
    return schedule, settings, None


def read_harvests(gpkg_path: str | Path) -> pd.DataFrame | None:
    """The ``harvests`` table of a plan that harvests stands more than once, or ``None``."""
    path = Path(gpkg_path)
    if "harvests" not in _layers(path):
        return None
    return pd.DataFrame(pyogrio.read_dataframe(path, layer="harvests", read_geometry=False))
