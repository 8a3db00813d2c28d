"""``spatialplan verify OUT.gpkg``: check a plan against every rule, independently."""

from __future__ import annotations

from typing import Any

import click

from spatialplan.cli._common import flag_overrides, settings_options

_FLAGS = [
    "id-field",
    "age-field",
    "yield-keys",
    "reserve-field",
    "periods",
    "period-length",
    "max-opening",
    "green-up",
    "min-age",
    "flow-tolerance",
    "digitising-tolerance",
    "min-shared-edge",
    "corner-adjacency",
    "unit-restriction",
    "non-declining",
]


@click.command("verify")
@click.argument("plan_path", metavar="OUT.gpkg", type=click.Path(dir_okay=False))
@click.option(
    "--yields",
    "yields_path",
    type=click.Path(dir_okay=False),
    default=None,
    help="Yield-table CSV to use instead of the table recorded in the plan.",
)
@settings_options(_FLAGS)
@click.pass_context
def command(
    ctx: click.Context,
    plan_path: str,
    yields_path: str | None,
    settings_path: str | None,
    **kwargs: Any,
) -> None:
    """Check every rule of a harvest plan, trusting nothing the solver recorded.

    Reads the `schedule` layer (and a `harvests` table when the plan has one) and the
    recorded settings and yield table of OUT.gpkg, measures adjacency and openings from
    the geometry with its own code, recomputes ages, volumes and values, and prints each
    broken rule (rule, period, stand ids, size) and a one-line verdict. The rules are the
    recorded ones; --settings replaces them and flags override single values. The last
    line is the verdict, "passed: ..." or "failed: ...". Exits 0 when every rule holds and 1
    when any is broken.
    """
    from spatialplan.settings import load_settings
    from spatialplan.verify import read_harvests, read_plan, verify_schedule

    overrides = flag_overrides(kwargs)
    given = load_settings(settings_path, overrides) if settings_path is not None else None
    schedule, settings, table = read_plan(plan_path, overrides, yields_path, settings=given)
    if settings is None:
        click.echo(f"note: {plan_path} records no settings; defaults and flags are used", err=True)
        settings = load_settings(None, overrides)
    report = verify_schedule(schedule, settings, table, harvests=read_harvests(plan_path))
    for note in report.notes:
        click.echo(f"note: {note}", err=True)
    for v in report.preexisting:
        click.echo(f"note: pre-existing {v.line()}")
    for v in report.violations:
        click.echo(f"violation: {v.line()}")
    click.echo(report.verdict)
    ctx.exit(0 if report.ok else 1)
