"""``spatialplan demo``: run the whole pipeline on the bundled Brennick Hollow demo forest."""

from __future__ import annotations

from importlib import resources
from pathlib import Path
from typing import Any

import click

from spatialplan.cli._common import console
from spatialplan.cli.plan import output_options, output_overrides, run_and_report


def demo_files() -> dict[str, Path]:
    """Paths of the bundled demo inputs (invented data)."""
    root = Path(str(resources.files("spatialplan.demo_gis")))
    files = {
        "stands": root / "brennick_stands.gpkg",
        "yields": root / "brennick_yields.csv",
        "settings": root / "brennick_plan.toml",
        "dem": root / "brennick_dem.tif",
        "streams": root / "brennick_streams.gpkg",
        "scenarios": root / "brennick_scenarios.toml",
    }
    return files


@click.command("demo")
@click.option(
    "--out",
    "out_dir",
    type=click.Path(file_okay=False),
    default="spatialplan-demo",
    show_default=True,
    help="Folder to write the demo plan into (created if missing).",
)
@click.option("--time-limit", type=float, default=None, help="Solver time limit in seconds.")
@click.option("--overwrite", is_flag=True, help="Replace an earlier demo plan in the folder.")
@output_options
def command(out_dir: str, time_limit: float | None, overwrite: bool, **kwargs: Any) -> None:
    """Plan the invented Brennick Hollow Forest (660 stands) end to end.

    Writes brennick_plan.gpkg, its map, report and charts into the folder.
    """
    from spatialplan.settings import load_settings

    files = demo_files()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    overrides = output_overrides(kwargs)
    overrides["solver.time_limit_s"] = time_limit
    settings = load_settings(files["settings"], overrides)
    con = console()
    con.out.print(f"Brennick Hollow Forest demo (invented data) -> {out.resolve()}", markup=False)
    code = run_and_report(
        files["stands"], files["yields"], out / "brennick_plan.gpkg", overwrite, settings
    )
    con.out.print(
        f"Open {out / 'brennick_plan.map.html'} in a browser to review the plan.", markup=False
    )
    if code:
        raise SystemExit(code)
