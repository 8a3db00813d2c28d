"""Re-draw the review files of a plan from its GeoPackage alone.

``spatialplan plan`` writes the map, charts and report right after the GeoPackage; this
module writes them again later from the file (another basemap, a lost report, a plan
copied to another machine). It reads the five plan layers and the ``run`` table and hands
them to :func:`spatialplan.report.write_review_files`, the same writer ``plan`` uses.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from spatialplan.errors import InputError, OutputError

__all__ = ["PLAN_LAYERS", "read_plan_layers", "render_review_files"]

# Layers and tables of a plan GeoPackage that the review files are drawn from.
PLAN_LAYERS = ("schedule", "openings", "periods", "strata", "run")


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
        :func:`spatialplan.runtable.read_run_table` reads).

    Returns
    -------
    dict
        Name to GeoDataFrame (layers) or DataFrame (attribute tables).

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
    return {n: pyogrio.read_dataframe(g, layer=n) for n in names}


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
        settings, out_html=paths["map"], basemap=basemap or settings.output.basemap,
        id_col=settings.fields.id_field,
    )  # fmt: skip
