"""Re-draw the review files of a plan from its GeoPackage alone.

``spatialplan plan`` writes the map, charts and report right after the GeoPackage; this
module writes them again later from the file (another basemap, a lost report, a plan
copied to another machine). It reads the plan layers, the ``harvests`` table when the plan
has one (one row per harvest) and the ``run`` table, and hands them to
:func:`spatialplan.report.write_review_files`, the same writer ``plan`` uses. Plans written
before the estate model (other column and run-key names) are read too.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from spatialplan.errors import InputError, OutputError

__all__ = ["OPTIONAL_LAYERS", "PLAN_LAYERS", "read_plan_layers", "render_review_files"]

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
    from spatialplan.report import review_paths, write_review_files
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
