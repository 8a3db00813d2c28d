"""``spatialplan compare``: run a scenario file as Dask tasks and compare the plans."""

from __future__ import annotations

import math
import time
from collections.abc import Iterable
from typing import Any

import click

from spatialplan.cli._common import console, split_severity

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
        name = escape(r.name)
        if r.ok:
            verified = "verification passed" if r.verify_ok else "verification failed"
            progress.console.print(
                f"{name}: {escape(r.status)}, NPV {r.npv:,.0f}, LP bound {r.lp_bound:,.0f}, "
                f"gap {_gap_text(r.gap)}, {verified}, {r.wall_s:.1f} s "
                f"[dim](at {dt:.0f} s on {escape(r.worker)})[/dim]"
            )
            if not r.verify_ok:
                progress.console.print(f"[red]violation:[/red] {name}: {escape(r.verify_verdict)}")
            for m in r.messages:
                word, text = split_severity(m)
                if word == "warning":
                    progress.console.print(f"[yellow]warning:[/yellow] {name}: {escape(text)}")
        else:
            progress.console.print(
                f"[red]failed:[/red] {name}: {escape(r.status)}: {escape(r.error or '')}"
            )
            for d in r.diagnosis:
                progress.console.print(f"    diagnosis: {escape(str(d))}")
            for m in r.messages:
                word, text = split_severity(m)
                progress.console.print(f"{word}: {name}: {escape(text)}")
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


def _gap_text(gap: float) -> str:
    if math.isnan(gap):
        return "-"
    return "no bound" if math.isinf(gap) else f"{100 * gap:.2f} %"


#: Scale of a money column: (divide by, unit) when its largest value has 7+ digits.
_SCALES = ((1e9, 1e6, " M"), (1e6, 1e3, " k"))


def _scale(values: Iterable[Any]) -> tuple[float, str]:
    """One scale for a whole column, so its values line up and compare."""
    finite = [abs(float(v)) for v in values if _finite(v)]
    top = max(finite, default=0.0)
    for at, div, unit in _SCALES:
        if top >= at:
            return div, unit
    return 1.0, ""


def _finite(v: Any) -> bool:
    try:
        return math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def _money(v: Any, scale: tuple[float, str]) -> str:
    """``75,003 k`` for 75,003,123 at the scale ``(1e3, " k")``; ``-`` when missing."""
    if not _finite(v):
        return "-"
    div, unit = scale
    shown = f"{float(v) / div:,.0f}"
    return ("0" if shown in ("-0", "0") else shown) + unit


def _columns(tab: Any, labels: dict[str, str]) -> list[tuple[str, list[str], str]]:
    """The console columns after ``scenario``: (header, cells, justify)."""
    cols: list[tuple[str, list[str], str]] = [
        ("status", [str(v) for v in tab["status"]], "left"),
        ("verification", [str(v) or "-" for v in tab["verification"]], "left"),
    ]
    npv_scale = _scale(tab["npv"])
    cols.append(("NPV", [_money(v, npv_scale) for v in tab["npv"]], "right"))
    cols.append(("gap", [_gap_text(float(v)) for v in tab["gap"]], "right"))
    lo, hi = tab["cost_spatial_rules_lower"], tab["cost_spatial_rules_upper"]
    scale = _scale([*lo, *hi])
    spans = []
    for a, b in zip(lo, hi, strict=True):
        sa, sb = _money(a, scale), _money(b, scale)
        spans.append(sb if sa == sb or sa == "-" else f"{sa} – {sb}")
    cols.append(("cost of spatial rules, lower – upper", spans, "right"))
    for c in tab.columns:
        if str(c).startswith("cost_") and not str(c).startswith("cost_spatial_rules"):
            scale = _scale(tab[c])
            cols.append((labels.get(c, c), [_money(v, scale) for v in tab[c]], "right"))
    return cols


def _fit(first: int, widths: list[int], total: int) -> list[list[int]]:
    """Group the columns (by index) into tables no wider than ``total`` characters.

    Every table repeats the first column (``first`` wide); a rich table with the default
    box and padding is ``sum(widths) + 3 * columns + 1`` wide.

    Examples
    --------
    >>> _fit(10, [8, 8, 8], 40)
    [[0, 1], [2]]
    """
    groups: list[list[int]] = [[]]
    used = first + 4
    for i, w in enumerate(widths):
        if groups[-1] and used + w + 3 > total:
            groups.append([])
            used = first + 4
        groups[-1].append(i)
        used += w + 3
    return groups


def _summary(con: Any, result: Any) -> None:
    from rich.table import Table

    tab = result.table
    names = [str(s) for s in tab["scenario"]]
    cols = _columns(tab, dict(result.labels))
    # Each column as wide as its longest cell (or header word): nothing is cut, and a
    # table that would not fit the terminal continues in a second one.
    widths = [
        max([len(c) for c in cells] + [len(w) for w in header.split()]) for header, cells, _ in cols
    ]
    first = max([len(n) for n in names] + [len("scenario")])
    groups = _fit(first, widths, con.out.width)
    for g, group in enumerate(groups):
        title = "Scenario comparison" + (" (continued)" if g else "")
        t = Table(title=title)
        t.add_column("scenario", width=first)
        for i in group:
            header, _, justify = cols[i]
            t.add_column(header, width=widths[i], justify=justify)  # type: ignore[arg-type]
        for r, name in enumerate(names):
            t.add_row(name, *(cols[i][1][r] for i in group))
        con.out.print(t)
    con.out.print(
        "note: cost of spatial rules = LP bound (no spatial rules) - the optimal NPV, which "
        "lies between the plan's NPV and its best proven bound: lower = LP bound - best "
        "bound, upper = LP bound - NPV = cost of spatial rules + solver gap (upper estimate); "
        "comparison.csv: cost_spatial_rules_lower, cost_spatial_rules_upper",
        markup=False,
    )
    if any(str(c).startswith("cost_") and not str(c).startswith("cost_spatial") for c in tab):
        con.out.print(
            "note: cost of <setting> = NPV of the scenario with the loosest value of that "
            "setting at the same other settings - this NPV; comparison.csv: "
            "cost_<setting>, with ref_<setting> naming that scenario",
            markup=False,
        )
    if any(c.endswith((" k", " M")) for _, cells, _ in cols for c in cells):
        con.out.print("note: k = thousand, M = million", markup=False)
    con.out.print(f"wrote {result.csv_path}", markup=False)
    if result.chart_path:
        con.out.print(f"wrote {result.chart_path}", markup=False)
    if result.failed:
        con.err.print(
            f"failed: {len(result.failed)} of {len(names)} scenario(s) did not produce a "
            f"verified plan: {', '.join(result.failed)}",
            markup=False,
        )
