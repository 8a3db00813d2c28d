"""``spatialplan rotation``: rotation ages and land expectation value per stratum."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import click

from spatialplan.cli._common import (
    console,
    ensure_output_path,
    settings_from_flags,
    settings_options,
)

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
    from spatialplan._io import atomic_path
    from spatialplan.charts import rotation_chart, safe_file_stem
    from spatialplan.economics import rotation_curves, rotation_table
    from spatialplan.errors import InputError
    from spatialplan.growth import build_growth_model, load_yield_table

    flags_copy = dict(flags)
    settings = settings_from_flags(settings_path, flags_copy)
    if regeneration_cost is not None:
        settings = settings.with_overrides(
            {"economics.regeneration_cost_per_ha": regeneration_cost}
        )
    keys = settings.fields.yield_keys
    table = None
    if yields_path is not None:
        table = load_yield_table(yields_path, keys, settings.yields)
    elif not settings.growth.chapman_richards:
        msg = "give --yields (a yield-table CSV) or growth.chapman_richards curves in --settings"
        raise InputError(msg)
    growth = build_growth_model(table, settings.growth, keys)
    strata = growth.strata

    out = Path(out_path)
    inputs = [Path(p) for p in (yields_path, settings_path) if p]
    ensure_output_path(out, inputs, overwrite)
    chart_dir = out.parent / f"{out.stem}_charts"
    chart_paths: dict[str, Path] = {}
    if not no_charts:
        used: set[str] = set()
        for s in strata:
            stem = f"{out.stem}_{safe_file_stem(s)}"
            base, i = stem, 2
            while stem.lower() in used:  # labels that differ only in unsafe characters
                stem, i = f"{base}_{i}", i + 1
            used.add(stem.lower())
            chart_paths[s] = chart_dir / f"{stem}.png"
        if not overwrite:
            existing = [p for p in chart_paths.values() if p.exists()]
            if existing:
                from spatialplan.errors import OutputError

                msg = (
                    f"chart {existing[0]} exists ({len(existing)} in all); "
                    "pass --overwrite to replace"
                )
                raise OutputError(msg)

    df = rotation_table(growth, strata, settings, max_age=max_age)
    with atomic_path(out, suffix=".csv") as tmp:
        df.to_csv(tmp, index=False, lineterminator="\n", float_format="%.6g")
    if chart_paths:
        chart_dir.mkdir(exist_ok=True)
        for s, p in chart_paths.items():
            rotation_chart(rotation_curves(growth, s, settings, max_age), p)

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
        f"wrote {out}" + (f" and {len(chart_paths)} chart(s) in {chart_dir}" if chart_paths else "")
    )
