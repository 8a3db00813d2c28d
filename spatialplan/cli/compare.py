"""``spatialplan compare``: run a scenario file as Dask tasks and compare the plans."""

from __future__ import annotations

import time
from typing import Any

import click

from spatialplan.cli._common import console

__all__ = ["command"]


@click.command("compare")
@click.argument("scenarios", type=click.Path(dir_okay=False))
@click.option(
    "--out",
    "out_dir",
    type=click.Path(file_okay=False),
    required=True,
    help="Folder for <scenario>.gpkg, comparison.csv and comparison.png (created if missing).",
)
@click.option(
    "--scheduler",
    default=None,
    metavar="tcp://HOST:PORT",
    help="Send the scenarios to this running Dask scheduler instead of starting a local cluster.",
)
@click.option(
    "--workers-per-scenario",
    type=click.IntRange(1, 256),
    default=None,
    help="CP-SAT threads per scenario (sets solver.workers). Default on the local "
    "cluster: the cores divided among the scenarios running at once; with "
    "--scheduler: 1. Without this flag a solver.workers set in the scenario "
    "file wins.",
)
@click.option(
    "--ship-inputs/--shared-inputs",
    "ship",
    default=None,
    help="Send the input files with the tasks (up to --ship-limit-mb) or let the "
    "workers read them from the same paths. Default: shared when every worker "
    "sees the files, else shipped.",
)
@click.option(
    "--ship-limit-mb",
    type=click.FloatRange(0, None, min_open=True),
    default=200.0,
    show_default=True,
    help="Largest total input size shipped with the tasks.",
)
@click.option(
    "--by-unit",
    is_flag=True,
    help="Plan every management unit (fields.unit_field) of every scenario as its "
    "own task and merge the unit plans into the scenario's GeoPackage.",
)
@click.option(
    "--maps/--no-maps",
    default=False,
    show_default=True,
    help="Also write each scenario's HTML map, report and charts.",
)
@click.option("--overwrite", is_flag=True, help="Replace earlier outputs in the folder.")
def command(
    scenarios: str,
    out_dir: str,
    scheduler: str | None,
    workers_per_scenario: int | None,
    ship: bool | None,
    ship_limit_mb: float,
    by_unit: bool,
    maps: bool,
    overwrite: bool,
) -> None:
    """Plan every scenario of SCENARIOS.toml and compare NPV and the cost of each rule.

    Each scenario runs through the same pipeline as `plan` as one Dask task (with
    --by-unit, one task per management unit plus a merge task) on an embedded local
    cluster sized to this machine, or on the cluster behind --scheduler. A failed scenario
    (infeasible rules, no plan in time, bad input) is reported with its error and the
    others still finish.

    Exit codes: 0 every scenario produced a verified plan; 1 any scenario failed (or a
    plan failed verification), or the scenario file has an error.
    """
    from spatialplan.scenarios import (
        check_outputs,
        dask_client,
        load_scenarios,
        split_threads,
        units_for,
    )

    con = console()
    extra: dict[str, Any] = {"output.no_map": not maps}
    scen = load_scenarios(scenarios, extra)
    check_outputs(scen, out_dir, overwrite)  # before starting any cluster
    n = len(scen.scenarios)
    if scheduler and not scheduler.startswith(
        ("tcp://", "tls://", "ws://", "wss://", "inproc://", "ucx://")
    ):
        raise click.BadParameter(
            f"expected tcp://HOST:PORT, got {scheduler!r}", param_hint="--scheduler"
        )
    if scheduler:
        n_workers, threads = 1, workers_per_scenario or 1
        where = f"Dask scheduler {scheduler}"
    else:
        # With --by-unit every unit of every scenario is a task that can run at once.
        n_tasks = n * len(units_for(scen)) if by_unit else n
        n_workers, threads = split_threads(n_tasks, threads_per_task=workers_per_scenario)
        where = f"local cluster: {n_workers} worker process(es) x 1 task"
    scen = _with_threads(scen, threads, force=workers_per_scenario is not None)
    con.err.print(
        f"{n} scenario(s) from {scen.path.name} on the {where}; CP-SAT threads per "
        f"scenario: {threads} (unless the scenario sets solver.workers)",
        markup=False,
    )
    with dask_client(scheduler, n_workers) as client:
        result = _run(con, scen, out_dir, client, ship, ship_limit_mb, by_unit, overwrite)
    _summary(con, result)
    if result.failed:
        raise SystemExit(1)


def _with_threads(scen: Any, threads: int, force: bool) -> Any:
    """Set solver.workers in every scenario that does not set it (every one with ``force``)."""
    import dataclasses

    from spatialplan.settings import apply_overrides

    out = []
    for s in scen.scenarios:
        if "solver.workers" in s.overrides and not force:
            out.append(s)
            continue
        ov = dict(s.overrides)
        ov["solver.workers"] = threads
        out.append(
            dataclasses.replace(
                s, overrides=ov, settings=apply_overrides(s.settings, {"solver.workers": threads})
            )
        )
    return dataclasses.replace(scen, scenarios=tuple(out))


def _run(
    con: Any,
    scen: Any,
    out_dir: str,
    client: Any,
    ship: bool | None,
    ship_limit_mb: float,
    by_unit: bool,
    overwrite: bool,
) -> Any:
    from rich.markup import escape
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

    from spatialplan.scenarios import run_comparison

    t0 = time.perf_counter()
    progress = Progress(
        TextColumn("[bold]scenarios[/bold]"),
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        TextColumn("{task.description}"),
        console=con.err,
        transient=True,
    )
    state: dict[str, Any] = {"task": None}

    def on_submit(names: list[str], mode: str) -> None:
        con.err.print(f"inputs: {mode}", markup=False)
        state["task"] = progress.add_task("running", total=len(names))

    def on_result(r: Any) -> None:
        dt = time.perf_counter() - t0
        if r.ok:
            gap = "-" if r.gap != r.gap else f"{100 * r.gap:.2f} %"
            mark = "[green]ok[/green]" if r.verify_ok else "[red]FAILED VERIFY[/red]"
            progress.console.print(
                f"{mark} {escape(r.name)}: {escape(r.status)}, NPV {r.npv:,.0f}, "
                f"LP bound {r.lp_bound:,.0f}, gap {gap}, {r.wall_s:.1f} s "
                f"[dim](at {dt:.0f} s on {escape(r.worker)})[/dim]"
            )
            if not r.verify_ok:
                progress.console.print(f"    {escape(r.verify_verdict)}")
            for m in r.messages:
                if str(m).lower().startswith("warning"):
                    progress.console.print(f"    {m}", markup=False)
        else:
            progress.console.print(
                f"[red]failed[/red] {escape(r.name)}: {escape(r.status)}: {escape(r.error or '')}"
            )
            for d in r.diagnosis:
                progress.console.print(f"    diagnosis: {escape(str(d))}")
            for m in r.messages:
                progress.console.print(f"    {escape(m)}", markup=False)
        if state["task"] is not None:
            progress.advance(state["task"])

    with progress:
        return run_comparison(
            scen,
            out_dir,
            client=client,
            ship=ship,
            ship_limit_mb=ship_limit_mb,
            by_unit=by_unit,
            overwrite=overwrite,
            on_submit=on_submit,
            on_result=on_result,
        )


def _summary(con: Any, result: Any) -> None:
    import math

    from rich.table import Table

    tab = result.table
    t = Table(title=f"Scenario comparison ({result.csv_path})")
    width = max([len(str(s)) for s in tab["scenario"]] + [8])
    t.add_column("scenario", no_wrap=True, min_width=width)
    for c in ("status", "NPV", "LP bound", "gap", "spatial rules cost", "verify"):
        t.add_column(c, justify="left" if c in ("status", "verify") else "right")

    def num(v: Any, fmt: str = "{:,.0f}") -> str:
        try:
            f = float(v)
        except (TypeError, ValueError):
            return "-"
        return "-" if math.isnan(f) else fmt.format(f)

    for _, row in tab.iterrows():
        t.add_row(
            str(row["scenario"]),
            str(row["status"]),
            num(row["npv"]),
            num(row["lp_bound"]),
            num(100 * float(row["gap"]), "{:.2f} %") if row["gap"] == row["gap"] else "-",
            num(row["cost_spatial_rules"]),
            "pass" if bool(row["verify_ok"]) else ("FAIL" if row["output"] else "-"),
        )
    con.out.print(t)
    con.out.print(f"wrote {result.csv_path}", markup=False)
    if result.chart_path:
        con.out.print(f"wrote {result.chart_path}", markup=False)
    if result.failed:
        con.err.print(
            f"{len(result.failed)} scenario(s) failed: {', '.join(result.failed)}", markup=False
        )
