"""The review files of a plan: map, charts and report, written beside its GeoPackage.

:func:`write_review_files` writes the bundle; ``spatialplan plan`` calls it right after
the GeoPackage. :func:`render_review_files` writes it again later from the file alone
(another basemap, a lost report, a plan copied to another machine): it reads the plan
layers, the ``harvests`` table when the plan has one (one row per harvest) and the ``run``
table, and hands them to the same writer. Plans written before the estate model (other
column and run-key names) are read too.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import pandas as pd

from spatialplan import _review as _rv
from spatialplan._review import CAUTIONS
from spatialplan.errors import InputError, OutputError

__all__ = [
    "OPTIONAL_LAYERS",
    "PLAN_LAYERS",
    "read_plan_layers",
    "render_review_files",
    "review_paths",
    "write_review_files",
]

# Layers and tables of a plan GeoPackage that the review files are drawn from.
PLAN_LAYERS = ("schedule", "openings", "periods", "strata", "run")
# Tables read when present: ``harvests`` (one row per harvest; plans before the estate
# model and plans that cut each stand at most once may lack it).
OPTIONAL_LAYERS = ("harvests",)


def read_plan_layers(
    gpkg: str | Path, names: tuple[str, ...] = ("schedule", "openings", "periods", "strata")
) -> dict[str, Any]:
    """Read layers of a plan GeoPackage, checking first that every one is there.

    Parameters
    ----------
    gpkg
        A GeoPackage written by ``spatialplan plan``.
    names
        Layers and attribute tables to read (default: all but ``run``, which
        :func:`spatialplan.runtable.read_run_table` reads). The :data:`OPTIONAL_LAYERS`
        present in the file are read too.

    Returns
    -------
    dict
        Name to GeoDataFrame (layers) or DataFrame (attribute tables); an optional table
        the file lacks is absent.

    Raises
    ------
    InputError
        The file is missing or unreadable, or lacks any of the plan layers (all named).
    """
    import pyogrio

    g = Path(gpkg)
    if not g.is_file():
        msg = f"GeoPackage not found: {g}"
        raise InputError(msg)
    try:
        present = {str(n) for n in pyogrio.list_layers(g)[:, 0]}
    except Exception as exc:  # GDAL cannot open it at all
        msg = f"{g} is not a GeoPackage spatialplan can read: {exc}"
        raise InputError(msg) from exc
    missing = [n for n in PLAN_LAYERS if n not in present]
    if missing:
        msg = (
            f"{g} is not a spatialplan plan: missing layer/table(s) {', '.join(missing)} "
            "(write one with `spatialplan plan`)"
        )
        raise InputError(msg)
    frames = {n: pyogrio.read_dataframe(g, layer=n) for n in names}
    for n in OPTIONAL_LAYERS:
        if n in present and n not in frames:
            frames[n] = pd.DataFrame(pyogrio.read_dataframe(g, layer=n, read_geometry=False))
    return frames


def render_review_files(
    gpkg: str | Path,
    out_html: str | Path | None = None,
    basemap: str | None = None,
    overwrite: bool = False,
) -> dict[str, Any]:
    """Read a plan GeoPackage and write its map, charts and report beside it.

    Parameters
    ----------
    gpkg
        GeoPackage written by ``spatialplan plan``.
    out_html
        Map path (default ``NAME.map.html`` beside the GeoPackage).
    basemap
        Tile URL template; default: the basemap recorded in the run settings, if any.
    overwrite
        Replace an existing map, report or charts.

    Returns
    -------
    dict
        ``map`` and ``report`` (paths) and ``charts`` (list of PNG paths), as written.

    Raises
    ------
    InputError
        The file is missing, not a plan GeoPackage, lacks a layer or table, or its
        recorded settings cannot be read.
    OutputError
        An output exists and ``overwrite`` is off, or the map's folder does not exist.
    """
    from spatialplan.runtable import read_run_table, recorded_settings
    from spatialplan.settings import Settings

    g = Path(gpkg)
    frames = read_plan_layers(g)
    run = read_run_table(g)
    settings = recorded_settings(run, g) or Settings()
    paths = review_paths(g, out_html)
    if not overwrite:
        exist = [str(p) for p in paths.values() if p.exists()]
        if exist:
            msg = f"output(s) exist: {', '.join(exist)}; pass --overwrite to replace them"
            raise OutputError(msg)
    if not paths["map"].resolve().parent.is_dir():
        msg = f"output folder {paths['map'].parent} does not exist"
        raise OutputError(msg)
    return write_review_files(
        g, frames["schedule"], frames["openings"], frames["periods"], frames["strata"], run,
        settings, harvests=frames.get("harvests"), out_html=paths["map"],
        basemap=basemap or settings.output.basemap, id_col=settings.fields.id_field,
    )  # fmt: skip


def review_paths(gpkg: str | Path, out_html: str | Path | None = None) -> dict[str, Path]:
    """Default paths beside ``NAME.gpkg``: ``map`` NAME.map.html, ``report``
    NAME.report.html, ``charts`` NAME_charts/ (``out_html`` overrides the map path)."""
    g = Path(gpkg)
    stem = g.with_suffix("")
    return {
        "map": Path(out_html) if out_html else stem.with_name(stem.name + ".map.html"),
        "report": stem.with_name(stem.name + ".report.html"),
        "charts": stem.with_name(stem.name + "_charts"),
    }


def write_review_files(
    gpkg: str | Path,
    schedule: Any,
    openings: Any,
    periods_df: pd.DataFrame,
    strata_df: pd.DataFrame,
    run_info: Mapping[str, Any],
    settings: Any,
    *,
    harvests: pd.DataFrame | None = None,
    out_html: str | Path | None = None,
    basemap: str | None = None,
    id_col: str = "stand_id",
    stratum_col: str = "stratum",
    reserve_col: str | None = "reserve",
    title: str | None = None,
    cautions: Sequence[str] = CAUTIONS,
) -> dict[str, Any]:
    """Write the map, the charts and the report that go with a plan GeoPackage.

    Used by ``spatialplan plan`` (after the GeoPackage is written) and ``spatialplan map``.

    Parameters
    ----------
    gpkg
        The plan GeoPackage; the review files are named after it (:func:`review_paths`).
    schedule, openings, periods_df, strata_df
        The plan's ``schedule`` and ``openings`` layers and ``periods`` and ``strata``
        tables.
    run_info
        The ``run`` table as a dict.
    settings
        Settings of the plan.
    harvests
        The ``harvests`` table, one row per harvest (``None``: one harvest per stand, as
        the schedule's ``period`` says).
    out_html
        Map path (default beside the GeoPackage).
    basemap
        Tile URL template for the map (none: no network needed).
    id_col, stratum_col, reserve_col
        Columns of the schedule.
    title
        Title of map and report.
    cautions
        Cautions shown on the map and in the report.

    Returns
    -------
    dict
        ``map``, ``report`` (paths), ``charts`` (list of PNG paths).
    """
    from spatialplan.charts import plan_charts
    from spatialplan.mapping import write_map
    from spatialplan.report import write_report

    paths = review_paths(gpkg, out_html)
    P = int(_rv.setting(settings, "horizon.periods", len(periods_df)))
    name = title or f"Harvest plan: {Path(gpkg).stem}"
    age_col = str(_rv.setting(settings, "fields.age_field", "age"))
    report_href = os.path.relpath(paths["report"].resolve(), paths["map"].resolve().parent)
    write_map(schedule, openings, paths["map"], id_col=id_col, stratum_col=stratum_col,
              reserve_col=reserve_col, periods=P, title=name, basemap=basemap,
              age_col=age_col if age_col in schedule.columns else "age", harvests=harvests,
              start_year=int(_rv.setting(settings, "horizon.start_year", 0) or 0),
              period_length_yr=float(_rv.setting(settings, "horizon.period_length_yr", 5.0)),
              report_href=Path(report_href).as_posix(), cautions=cautions)  # fmt: skip
    charts = plan_charts(periods_df, schedule, settings, paths["charts"], harvests=harvests,
                         run_info=run_info, id_col=id_col)  # fmt: skip
    href = os.path.relpath(paths["map"].resolve(), paths["report"].resolve().parent)
    info = {"title": name, **dict(run_info)}
    write_report(
        paths["report"], info, periods_df, strata_df, charts, Path(href).as_posix(), cautions,
        settings=settings, schedule=schedule, harvests=harvests, openings=openings,
        id_col=id_col,
    )  # fmt: skip
    return {"map": paths["map"], "report": paths["report"], "charts": charts}
