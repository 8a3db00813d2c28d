"""``spatialplan check``: validate inputs and print a summary."""

from __future__ import annotations

from typing import Any

import click

from spatialplan.cli._common import console, settings_from_flags, settings_options

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
@click.option(
    "--yields",
    "yields_path",
    type=click.Path(dir_okay=False),
    default=None,
    help="Yield-table CSV (long format: key columns, age, volume).",
)
@settings_options(CHECK_FLAGS)
def command(stands: str, yields_path: str | None, settings_path: str | None, **kwargs: Any) -> None:
    """Validate a stand layer (and yield table, DEM, streams) and summarise it.

    Exits 0 when the inputs are usable for planning, 1 otherwise.
    """
    from rich.markup import escape
    from rich.table import Table

    from spatialplan.inventory import age_class_table
    from spatialplan.pipeline import load_inputs

    settings = settings_from_flags(settings_path, kwargs)
    inputs = load_inputs(stands, yields_path, settings, strict=False)
    inv = inputs.inventory
    st = inv.stands
    out = console().out
    net = None
    if inputs.net is not None:
        net = inputs.net.stands["net_area_ha"].to_numpy()
    total = float(st["area_ha"].sum()) if len(st) else 0.0
    n_res = int(st["reserve"].sum()) if len(st) else 0
    summary = Table(
        title=f"Stand layer {inv.path.name}" + (f" (layer {inv.layer})" if inv.layer else "")
    )
    summary.add_column("item")
    summary.add_column("value", justify="right")
    summary.add_row("stands", f"{len(st)}")
    summary.add_row("total area (ha)", f"{total:,.1f}")
    summary.add_row("reserve stands", f"{n_res}")
    summary.add_row(
        "net harvestable area (ha)",
        f"{(net.sum() if net is not None else total) - (st.loc[st['reserve'], 'area_ha'].sum() if len(st) else 0):,.1f}",
    )
    summary.add_row(
        "CRS (input / working)", f"{inv.source_crs.to_string()} / {inv.working_crs.to_string()}"
    )
    out.print(summary)
    if len(st):
        ac = age_class_table(st)
        t = Table(title="Area by age class")
        t.add_column("age class (yr)")
        t.add_column("area (ha)", justify="right")
        for _, r in ac.iterrows():
            t.add_row(str(r["age_class"]), f"{r['area_ha']:,.1f}")
        out.print(t)
        by = st.groupby("stratum")["area_ha"].agg(["count", "sum"]).reset_index()
        t = Table(title="Area by stratum")
        t.add_column("stratum")
        t.add_column("stands", justify="right")
        t.add_column("area (ha)", justify="right")
        for _, r in by.iterrows():
            t.add_row(str(r["stratum"]), f"{int(r['count'])}", f"{r['sum']:,.1f}")
        out.print(t)
    if inputs.terrain is not None:
        tf = inputs.terrain.stands
        t = Table(title="Terrain (estimates from the DEM)")
        t.add_column("harvest system")
        t.add_column("stands", justify="right")
        t.add_column("area (ha)", justify="right")
        t.add_column("mean slope (%)", justify="right")
        g = tf.assign(area_ha=st["area_ha"].to_numpy()).groupby("harvest_system")
        for name, grp in g:
            t.add_row(
                str(name),
                f"{len(grp)}",
                f"{grp['area_ha'].sum():,.1f}",
                f"{grp['slope_pct_mean'].mean():.1f}",
            )
        out.print(t)
    if net is not None:
        out.print(
            f"Stream buffers remove {total - float(net.sum()):,.1f} ha; net area {float(net.sum()):,.1f} ha"
        )
    for p in inv.problems:
        style = {"error": "bold red", "warning": "yellow", "info": "dim"}[p.severity]
        out.print(f"[{style}]{p.severity.upper()}[/{style}] {escape(p.text())}")
    for m in inputs.messages:
        out.print(f"NOTE {escape(m)}")
    if inv.errors:
        out.print(
            f"[bold red]Not usable: {len(inv.errors)} problem(s) must be fixed first.[/bold red]"
        )
        raise SystemExit(1)
    out.print("[green]Inputs are usable for planning.[/green]")
