"""``spatialplan check``: validate inputs and print a summary."""

from __future__ import annotations

from typing import Any

import click

from spatialplan.cli._common import (
    console,
    prefixed,
    settings_from_flags,
    settings_options,
    yields_option,
)

CHECK_FLAGS = [
    "layer",
    "id-field",
    "age-field",
    "yield-keys",
    "reserve-field",
    "cost-class-field",
    "crs",
    "skip-unmatched",
    "periods",
    "period-length",
    "dem",
    "streams",
    "stream-buffer",
]


@click.command("check")
@click.argument("stands", type=click.Path(dir_okay=False))
@yields_option
@settings_options(CHECK_FLAGS)
def command(stands: str, yields_path: str | None, settings_path: str | None, **kwargs: Any) -> None:
    """Validate a stand layer (and yield table, DEM, streams) and summarise it.

    Lists every problem (error:, warning:, note:) and ends with "passed: ..." when the
    inputs are usable for planning (exit 0) or "failed: ..." (exit 1).
    """
    from rich.markup import escape
    from rich.table import Table

    from spatialplan.pipeline import load_inputs
    from spatialplan.summary import summarise_inputs

    settings = settings_from_flags(settings_path, kwargs)
    sm = summarise_inputs(load_inputs(stands, yields_path, settings, strict=False))
    out = console().out
    summary = Table(
        title=escape(
            f"Stand layer {sm.stands_path.name}" + (f" (layer {sm.layer})" if sm.layer else "")
        )
    )
    summary.add_column("item")
    summary.add_column("value", justify="right")
    summary.add_row("stands", f"{sm.n_stands}")
    summary.add_row("total area (ha)", f"{sm.total_area_ha:,.1f}")
    summary.add_row("reserve stands", f"{sm.reserve_stands}")
    if sm.inoperable_stands is not None:
        summary.add_row("inoperable stands (slope)", f"{sm.inoperable_stands}")
    summary.add_row("net harvestable area (ha)", f"{sm.harvestable_net_area_ha:,.1f}")
    summary.add_row("CRS (input / working)", f"{sm.source_crs} / {sm.working_crs}")
    out.print(summary)
    if sm.n_stands:
        width = settings.output.age_class_width_yr
        t = Table(title=f"Area by age class ({width:g}-year classes)")
        t.add_column("age class (yr)")
        t.add_column("area (ha)", justify="right")
        for r in sm.age_classes.itertuples(index=False):
            t.add_row(str(r.age_class), f"{r.area_ha:,.1f}")
        out.print(t)
        t = Table(title="Area by stratum")
        t.add_column("stratum")
        t.add_column("stands", justify="right")
        t.add_column("area (ha)", justify="right")
        for r in sm.strata.itertuples(index=False):
            t.add_row(escape(str(r.stratum)), f"{r.stands}", f"{r.area_ha:,.1f}")
        out.print(t)
    if sm.harvest_systems is not None:
        t = Table(title="Terrain (estimates from the DEM)")
        t.add_column("harvest system")
        t.add_column("stands", justify="right")
        t.add_column("area (ha)", justify="right")
        t.add_column("mean slope (%)", justify="right")
        for r in sm.harvest_systems.itertuples(index=False):
            t.add_row(
                escape(str(r.harvest_system)),
                f"{r.stands}",
                f"{r.area_ha:,.1f}",
                f"{r.mean_slope_pct:.1f}",
            )
        out.print(t)
    if sm.stream_buffer_ha is not None:
        net = sm.total_area_ha - sm.stream_buffer_ha
        out.print(f"Stream buffers remove {sm.stream_buffer_ha:,.1f} ha; net area {net:,.1f} ha")
    for p in sm.problems:
        style = {"error": "bold red", "warning": "yellow", "info": "dim"}[p.severity]
        out.print(f"[{style}]{escape(prefixed(p.severity, p.text()))}[/{style}]")
    for m in sm.messages:
        out.print(prefixed("note", m), markup=False)
    if not sm.usable:
        out.print(
            f"[bold red]failed: {len(sm.errors)} problem(s) must be fixed before planning"
            "[/bold red]"
        )
        raise SystemExit(1)
    out.print("[green]passed: the inputs are usable for planning[/green]")
