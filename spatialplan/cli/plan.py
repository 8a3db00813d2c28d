"""``spatialplan plan``: build, solve, verify and write a harvest schedule."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import click

from spatialplan.cli._common import (
    console,
    prefixed,
    settings_from_flags,
    settings_options,
    split_severity,
    yields_option,
)

PLAN_FLAGS = [
    "layer",
    "id-field",
    "age-field",
    "yield-keys",
    "reserve-field",
    "cost-class-field",
    "crs",
    "unit-field",
    "skip-unmatched",
    "periods",
    "period-length",
    "max-opening",
    "green-up",
    "min-age",
    "max-harvests",
    "flow-tolerance",
    "non-declining",
    "unit-restriction",
    "discount-rate",
    "price",
    "ending-value",
    "digitising-tolerance",
    "min-shared-edge",
    "corner-adjacency",
    "time-limit",
    "workers",
    "seed",
    "stop-gap",
    "dem",
    "streams",
    "stream-buffer",
]


def output_options(f: Any) -> Any:
    """Options shared by ``plan`` and ``demo`` for the extra outputs."""
    f = click.option(
        "--write-back",
        is_flag=True,
        default=None,
        help="Also add the result layers (prefixed plan_) to the input GeoPackage.",
    )(f)
    f = click.option(
        "--raster-out",
        type=click.Path(dir_okay=False),
        default=None,
        help="Also write a GeoTIFF of harvest period.",
    )(f)
    f = click.option(
        "--raster-cell", type=float, default=None, help="Cell size (m) of --raster-out."
    )(f)
    f = click.option(
        "--basemap",
        default=None,
        help="Tile URL template for a map background (off by default: maps work offline).",
    )(f)
    f = click.option(
        "--no-map", is_flag=True, default=None, help="Skip the HTML map, report and charts."
    )(f)
    return f


def output_overrides(kwargs: dict[str, Any]) -> dict[str, Any]:
    """Dotted settings keys for the output flags (consumed from ``kwargs``)."""
    return {
        "output.no_map": kwargs.pop("no_map") or None,
        "output.basemap": kwargs.pop("basemap"),
        "output.raster_out": kwargs.pop("raster_out"),
        "output.raster_cell_m": kwargs.pop("raster_cell"),
        "output.write_back": kwargs.pop("write_back") or None,
    }


@click.command("plan")
@click.argument("stands", type=click.Path(dir_okay=False))
@yields_option
@click.option(
    "--out",
    "out",
    type=click.Path(dir_okay=False),
    required=True,
    help="Output GeoPackage (map, report and charts are written beside it).",
)
@click.option("--overwrite", is_flag=True, help="Replace an existing output.")
@click.option(
    "--by-unit",
    is_flag=True,
    help="Plan each management unit (--unit-field) on its own, with its own flow "
    "rules, and merge the plans.",
)
@output_options
@settings_options(PLAN_FLAGS)
def command(
    stands: str,
    yields_path: str | None,
    out: str,
    overwrite: bool,
    by_unit: bool,
    settings_path: str | None,
    **kwargs: Any,
) -> None:
    """Plan which stands to clear-cut in each period to maximise NPV under the rules.

    Exit codes: 0 verified plan written; 1 bad input or a plan that failed verification;
    2 the rules are infeasible (with a diagnosis); 3 no plan found within the time limit.
    """
    outs = output_overrides(kwargs)
    settings = settings_from_flags(settings_path, kwargs)
    settings = settings.with_overrides(outs)
    if by_unit and not settings.fields.unit_field:
        msg = "--by-unit needs the attribute holding the management unit: --unit-field NAME"
        raise click.UsageError(msg)
    code = run_and_report(stands, yields_path, Path(out), overwrite, settings, by_unit=by_unit)
    if code:
        raise SystemExit(code)


def run_and_report(
    stands: str | Path,
    yields_path: str | Path | None,
    out: Path,
    overwrite: bool,
    settings: Any,
    *,
    by_unit: bool = False,
) -> int:
    """Run the plan pipeline with a live progress display; print the summary."""
    from rich.live import Live

    from spatialplan.output_paths import check_plan_outputs, plan_input_paths
    from spatialplan.pipeline import load_inputs, run_plan

    con = console()
    check_plan_outputs(out, plan_input_paths(stands, yields_path, settings), settings, overwrite)
    inputs = load_inputs(stands, yields_path, settings)
    for p in inputs.inventory.warnings:
        con.err.print(prefixed(p.severity, p.text()), markup=False)

    state: dict[str, Any] = {"stage": "reading", "p": None}

    def render() -> str:
        p = state["p"]
        if p is None:
            return f"[bold]{state['stage']}[/bold]"
        best = "-" if p.best_npv is None else f"{p.best_npv:,.0f}"
        bound = "-" if p.bound is None else f"{p.bound:,.0f}"
        gap = "-" if p.gap is None else f"{100 * p.gap:.2f} %"
        return (
            f"[bold]{state['stage']}[/bold]  elapsed {p.elapsed_s:6.1f} s  best NPV {best}  "
            f"best proven bound {bound}  gap {gap}"
        )

    live = Live(render(), console=con.err, refresh_per_second=4, transient=True)

    def on_stage(name: str) -> None:
        state["stage"] = name
        live.update(render())

    def on_progress(p: Any) -> None:
        state["p"] = p
        live.update(render())

    with live:
        if by_unit:
            from spatialplan.scenarios import plan_by_unit

            on_stage("solving each management unit")
            outcome = plan_by_unit(inputs, out)  # the inputs read above, cut per unit
        else:
            outcome = run_plan(inputs, out, on_progress=on_progress, on_stage=on_stage)
    r = outcome.result
    for m in outcome.messages:
        con.err.print(prefixed(*split_severity(m)), markup=False)
    con.out.print(_summary_table(r, outcome, out))
    con.out.print(_harvest_table(outcome.periods, settings))
    for f in outcome.extra_files:
        con.out.print(f"wrote {f}", markup=False)
    con.out.print(outcome.verify.verdict, markup=False)
    if not outcome.verify.ok:
        for v in outcome.verify.violations[:50]:
            con.err.print(prefixed("violation", v.line()), markup=False)
        con.err.print(
            "[bold red]error: the plan failed independent verification; do not use it[/bold red]"
        )
        return 1
    if r.status == "interrupted":
        con.err.print(
            f"warning: interrupted: {out} holds the best plan found before Ctrl-C "
            "(solver_status = interrupted in its run table); run again to finish",
            markup=False,
        )
        return 130  # 128 + SIGINT, the shell convention for a run stopped by Ctrl-C
    return 0


def _cell_width(cells: list[str]) -> int:
    return max((len(c) for c in cells), default=1)


def _summary_table(result: Any, outcome: Any, out: Path) -> Any:
    """The plan's key numbers: status, NPV, every proven upper bound, the gap.

    The best proven upper bound is the smallest bound, never below the NPV (see
    :func:`spatialplan.schedule.best_bound`); each bound is listed with its method in the
    ``detail`` column.
    """
    from rich.table import Table

    from spatialplan.schedule import best_bound, best_bound_method, proven_bounds

    r = result
    so_far = "best plan so far" if r.status in ("interrupted", "time_limit") else ""
    rows: list[tuple[str, str, str]] = [
        ("solver status", r.status, so_far),
        ("NPV", f"{r.npv:,.0f}", ""),
    ]
    bounds = proven_bounds(r)
    for method, bound in bounds.items():
        rows.append(("upper bound", f"{bound:,.0f}", method))
    best = best_bound(r)
    if bounds and math.isfinite(best):
        rows.append(("best proven upper bound", f"{best:,.0f}", best_bound_method(r)))
        rows.append(("gap to the best proven bound", f"{100 * r.gap:.2f} %", ""))
    else:
        rows.append(("best proven upper bound", "none", ""))
    harvested = int((outcome.schedule["period"].fillna(0) > 0).sum())
    rows.append(("stands harvested", f"{harvested}", ""))
    rows.append(("solve time", f"{r.solve_time_s:.1f} s", ""))
    verdict = "passed" if outcome.verify.ok else "failed"
    rows.append(("independent verification", verdict, "verdict below"))
    t = Table(title=f"Plan written to {out}", title_justify="left")
    t.add_column("item")
    # Values never wrap or get cut: the column is as wide as its longest value.
    t.add_column(
        "value", justify="right", no_wrap=True, min_width=_cell_width([v for _, v, _ in rows])
    )
    t.add_column("detail")
    for row in rows:
        t.add_row(*row)
    return t


def _years(p: int, start_year: int, length_yr: float) -> str:
    """Calendar years of period ``p``: ``start_year + (p - 1) L`` to ``start_year + p L``.

    Examples
    --------
    >>> _years(2, 2025, 5.0), _years(1, 0, 2.5)
    ('2030-2035', '0-2.5')
    """
    return f"{start_year + (p - 1) * length_yr:g}-{start_year + p * length_yr:g}"


def _values(pdf: Any, *names: str) -> Any:
    """The first of ``names`` that ``pdf`` has (a column's current name, then its older one)."""
    for n in names:
        if n in pdf.columns:
            return pdf[n]
    msg = f"periods table has none of the columns {', '.join(names)}"
    raise KeyError(msg)


def _harvest_table(periods: Any, settings: Any) -> Any:
    """Harvest by period with calendar years; net harvest area, gross opening sizes."""
    from rich.table import Table

    h = settings.horizon
    per = [int(p) for p in periods["period"]]
    columns = {
        "period": [f"{p}" for p in per],
        "years": [_years(p, h.start_year, h.period_length_yr) for p in per],
        "harvest area (net, ha)": [
            f"{v:,.1f}" for v in _values(periods, "harvest_net_area_ha", "harvest_area_ha")
        ],
        "volume (m3)": [f"{v:,.0f}" for v in periods["harvest_volume_m3"]],
        "NPV": [f"{v:,.0f}" for v in _values(periods, "npv", "discounted_value")],
        "largest opening (gross, ha)": [f"{v:,.1f}" for v in periods["largest_opening_ha"]],
    }
    t = Table(title="Harvest by period", title_justify="left")
    for header, cells in columns.items():
        t.add_column(header, justify="right", no_wrap=False, min_width=_cell_width(cells))
    for row in zip(*columns.values(), strict=True):
        t.add_row(*row)
    return t
