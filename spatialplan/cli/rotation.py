"""``spatialplan rotation``: rotation ages and land expectation value per stratum."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import click

from spatialplan.cli._common import console, settings_from_flags, settings_options

__all__ = ["command"]


@click.command("rotation")
@click.option(
    "--yields",
    "yields_path",
    type=click.Path(dir_okay=False),
    default=None,
    help="Long-format yield-table CSV (key columns, age, volume, optional diameter). "
    "May be left out when every stratum has a Chapman-Richards curve in the settings.",
)
@settings_options(["yield-keys", "discount-rate", "price"])
@click.option(
    "--regeneration-cost",
    type=float,
    default=None,
    help="Regeneration cost per ha paid at harvest. [economics.regeneration_cost_per_ha]",
)
@click.option(
    "--max-age",
    type=click.IntRange(2, 1000),
    default=300,
    show_default=True,
    help="Last age (years) of the 1-year grid searched for rotation ages.",
)
@click.option("--no-charts", is_flag=True, help="Write the CSV only.")
@click.option(
    "--out",
    "out_path",
    type=click.Path(dir_okay=False),
    required=True,
    help="Output CSV; charts go to <stem>_charts/ beside it.",
)
@click.option("--overwrite", is_flag=True, help="Replace existing outputs.")
def command(
    yields_path: str | None,
    settings_path: str | None,
    regeneration_cost: float | None,
    max_age: int,
    no_charts: bool,
    out_path: str,
    overwrite: bool,
    **flags: Any,
) -> None:
    """Rotation ages of every stratum: maximum MAI, maximum mean annual net value,
    Fisher single rotation and Faustmann, with the land expectation value (LEV).

    Ages are searched on a 1-year grid. One PNG chart per stratum shows MAI/CAI and the
    value growth rate against the discount rate.
    """
    from spatialplan.rotation import write_rotation

    settings = settings_from_flags(settings_path, dict(flags))
    if regeneration_cost is not None:
        settings = settings.with_overrides(
            {"economics.regeneration_cost_per_ha": regeneration_cost}
        )
    done = write_rotation(
        yields_path,
        settings,
        Path(out_path),
        max_age=max_age,
        charts=not no_charts,
        overwrite=overwrite,
        inputs=[settings_path],
    )
    df = done.table

    ctx = click.get_current_context()
    if (ctx.obj or {}).get("quiet"):
        return
    from rich.table import Table

    tab = Table(title=f"Rotation ages (r = {settings.economics.discount_rate:g})")
    for col in ("stratum", "mai_max_age", "value_mai_max_age", "fisher_age", "faustmann_age"):
        tab.add_column(col, justify="right")
    tab.add_column("lev_per_ha", justify="right")
    for row in df.itertuples(index=False):
        tab.add_row(
            str(row.stratum),
            *(
                f"{getattr(row, c):g}"
                for c in ("mai_max_age", "value_mai_max_age", "fisher_age", "faustmann_age")
            ),
            f"{row.lev_per_ha:,.0f}",
        )
    con = console()
    con.out.print(tab)
    con.out.print(
        f"wrote {done.csv}"
        + (f" and {len(done.charts)} chart(s) in {done.chart_dir}" if done.charts else ""),
        markup=False,
    )
