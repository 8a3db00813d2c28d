"""``spatialplan map``: re-render the map, charts and report from an output GeoPackage."""

from __future__ import annotations

import json
from pathlib import Path

import click

from spatialplan.cli._common import console

__all__ = ["command", "render_from_geopackage"]

_NEEDED = ("schedule", "openings", "periods", "strata", "run")


def render_from_geopackage(
    gpkg: str | Path,
    out_html: str | Path | None = None,
    basemap: str | None = None,
    overwrite: bool = False,
) -> dict[str, object]:
    """Read a plan GeoPackage and write its map, charts and report beside it.

    Parameters
    ----------
    gpkg
        GeoPackage written by ``spatialplan plan``.
    out_html
        Map path (default ``NAME.map.html``).
    basemap
        Tile URL template; default: the basemap recorded in the run settings, if any.
    overwrite
        Replace existing map/report/charts.

    Returns
    -------
    dict
        ``map``, ``report``, ``charts`` as written.

    Raises
    ------
    InputError
        The file is missing, not a plan GeoPackage, or lacks a layer/table.
    OutputError
        An output exists and ``overwrite`` is off.
    """
    import pyogrio

    from spatialplan.errors import InputError, OutputError, SettingsError
    from spatialplan.outputs import read_run_table
    from spatialplan.report import review_paths, write_review_files
    from spatialplan.settings import Settings, settings_from_dict

    g = Path(gpkg)
    if not g.is_file():
        msg = f"GeoPackage not found: {g}"
        raise InputError(msg)
    try:
        names = {str(n) for n in pyogrio.list_layers(g)[:, 0]}
    except Exception as exc:  # GDAL cannot open it at all
        msg = f"{g} is not a GeoPackage spatialplan can read: {exc}"
        raise InputError(msg) from exc
    missing = [n for n in _NEEDED if n not in names]
    if missing:
        msg = (
            f"{g} is not a spatialplan plan: missing layer/table(s) {', '.join(missing)} "
            "(write one with `spatialplan plan`)"
        )
        raise InputError(msg)
    frames = {n: pyogrio.read_dataframe(g, layer=n) for n in _NEEDED}
    run = read_run_table(frames["run"])
    settings: Settings
    if run.get("settings_json"):
        try:
            settings = settings_from_dict(json.loads(run["settings_json"]))
        except (ValueError, SettingsError) as exc:
            msg = f"{g}: the run table's settings_json cannot be read: {exc}"
            raise InputError(msg) from exc
    else:
        settings = Settings()
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


@click.command("map")
@click.argument("gpkg", type=click.Path(dir_okay=False))
@click.option(
    "--out-html",
    type=click.Path(dir_okay=False),
    default=None,
    help="Map file (default: NAME.map.html beside the GeoPackage).",
)
@click.option(
    "--basemap",
    default=None,
    help="Tile URL template for a background; off by default so the map works offline.",
)
@click.option("--overwrite", is_flag=True, help="Replace an existing map, report and charts.")
def command(gpkg: str, out_html: str | None, basemap: str | None, overwrite: bool) -> None:
    """Re-render the map, charts and report of a plan GeoPackage (GPKG)."""
    done = render_from_geopackage(gpkg, out_html, basemap, overwrite)
    out = console().out
    out.print(f"map     {done['map']}")
    out.print(f"report  {done['report']}")
    charts = done["charts"]
    assert isinstance(charts, list)
    folder = Path(charts[0]).parent if charts else ""
    out.print(f"charts  {folder} ({len(charts)} PNG)")
