"""``spatialplan map``: re-render the map, charts and report from an output GeoPackage."""

from __future__ import annotations

from pathlib import Path

import click

from spatialplan.cli._common import console

__all__ = ["command"]


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
    from spatialplan.review import render_review_files

    done = render_review_files(gpkg, out_html, basemap, overwrite)
    out = console().out
    out.print(f"map     {done['map']}", markup=False)
    out.print(f"report  {done['report']}", markup=False)
    charts = done["charts"]
    folder = Path(charts[0]).parent if charts else ""
    out.print(f"charts  {folder} ({len(charts)} PNG)", markup=False)
