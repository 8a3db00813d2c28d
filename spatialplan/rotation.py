"""Rotation ages and land expectation value per stratum, as a table, a CSV and charts.

The ages themselves come from :mod:`spatialplan.economics` (maximum MAI, maximum mean
annual net value, Fisher, Faustmann with LEV, on a 1-year grid); this module reads the
growth inputs, checks the output paths before any work and writes the CSV and one chart
per stratum. ``spatialplan rotation`` and :func:`spatialplan.rotation_table` call it.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from spatialplan.errors import InputError, OutputError
from spatialplan.settings import Settings

__all__ = [
    "DEFAULT_MAX_AGE",
    "RotationOutputs",
    "rotation_chart_paths",
    "rotation_growth",
    "rotation_table",
    "write_rotation",
]

DEFAULT_MAX_AGE = 300  # last age (years) of the grid searched


@dataclass(frozen=True)
class RotationOutputs:
    """What :func:`write_rotation` wrote.

    Attributes
    ----------
    table
        One row per stratum (see :func:`spatialplan.economics.rotation_table`).
    csv
        The CSV file.
    charts
        Stratum label to its PNG chart (empty without charts).
    chart_dir
        The folder ``<stem>_charts`` beside the CSV.
    """

    table: pd.DataFrame
    csv: Path
    charts: dict[str, Path] = field(default_factory=dict)
    chart_dir: Path | None = None


def rotation_growth(yields: str | Path | Any | None, settings: Settings) -> Any:
    """The growth model the rotation ages are computed from.

    Parameters
    ----------
    yields
        Yield-table CSV path, a validated :class:`spatialplan.growth.YieldTable`, or
        ``None`` when every stratum has a Chapman-Richards curve in ``[growth]``.
    settings
        ``fields.yield_keys``, ``yields`` (column names) and ``growth`` are used.

    Returns
    -------
    spatialplan.growth.GrowthModel

    Raises
    ------
    InputError
        No yield table and no curves, or a bad yield table (naming file, key and line).
    """
    from spatialplan.growth import YieldTable, build_growth_model, load_yield_table

    keys = settings.fields.yield_keys
    table = None
    if isinstance(yields, YieldTable):
        table = yields
    elif yields is not None:
        table = load_yield_table(yields, keys, settings.yields)
    elif not settings.growth.chapman_richards:
        msg = "give --yields (a yield-table CSV) or growth.chapman_richards curves in --settings"
        raise InputError(msg)
    return build_growth_model(table, settings.growth, keys)


def rotation_table(
    yields: str | Path | Any | None,
    settings: Settings,
    max_age: int = DEFAULT_MAX_AGE,
) -> pd.DataFrame:
    """Rotation ages and LEV of every stratum of the yield table and ``[growth]`` curves.

    Parameters
    ----------
    yields, settings
        As for :func:`rotation_growth`; ``economics`` gives prices, costs and the rate.
    max_age
        Last age of the 1-year grid.

    Returns
    -------
    pandas.DataFrame
        Key columns, ``stratum``, ``mai_max_age``, ``mai_max_m3_ha_yr``,
        ``mai_max_age_exact``, ``value_mai_max_age``, ``fisher_age``, ``faustmann_age``,
        ``lev_per_ha``.
    """
    from spatialplan import economics

    growth = rotation_growth(yields, settings)
    return economics.rotation_table(growth, growth.strata, settings, max_age=max_age)


def rotation_chart_paths(out: str | Path, strata: Iterable[str]) -> dict[str, Path]:
    """Chart file of each stratum: ``<stem>_charts/<stem>_<stratum>.png`` beside ``out``.

    Labels that differ only in characters unsafe in file names get ``_2``, ``_3`` ...
    (compared without case, for case-insensitive file systems).

    Examples
    --------
    >>> paths = rotation_chart_paths("rot.csv", ["DF/II", "DF_II", "HW"])
    >>> [p.as_posix() for p in paths.values()]
    ['rot_charts/rot_DF_II.png', 'rot_charts/rot_DF_II_2.png', 'rot_charts/rot_HW.png']
    """
    from spatialplan.charts import safe_file_stem

    out = Path(out)
    chart_dir = out.parent / f"{out.stem}_charts"
    paths: dict[str, Path] = {}
    used: set[str] = set()
    for s in strata:
        stem = f"{out.stem}_{safe_file_stem(s)}"
        base, i = stem, 2
        while stem.lower() in used:
            stem, i = f"{base}_{i}", i + 1
        used.add(stem.lower())
        paths[s] = chart_dir / f"{stem}.png"
    return paths


def write_rotation(
    yields: str | Path | Any | None,
    settings: Settings,
    out: str | Path,
    *,
    max_age: int = DEFAULT_MAX_AGE,
    charts: bool = True,
    overwrite: bool = False,
    inputs: Iterable[str | Path | None] = (),
) -> RotationOutputs:
    """Compute the rotation table and write it as CSV, with one PNG chart per stratum.

    Every output path is checked before anything is computed: the CSV must not be an
    input nor exist without ``overwrite``, and neither may any chart.

    Parameters
    ----------
    yields, settings, max_age
        As for :func:`rotation_table`.
    out
        The CSV file; charts go to ``<stem>_charts/`` beside it.
    charts
        Also write the charts (MAI/CAI and value growth against the discount rate).
    overwrite
        Replace existing outputs.
    inputs
        Further input files the outputs must not replace (e.g. the settings file).

    Returns
    -------
    RotationOutputs

    Raises
    ------
    InputError
        Bad growth inputs.
    OutputError
        An output is an input, exists without ``overwrite``, or cannot be written.
    """
    from spatialplan import economics
    from spatialplan._io import atomic_path
    from spatialplan.charts import rotation_chart
    from spatialplan.output_paths import check_output_path

    growth = rotation_growth(yields, settings)
    out = Path(out)
    yields_file = None if yields is None or not isinstance(yields, (str, Path)) else yields
    check_output_path(out, [yields_file, *inputs], overwrite)
    chart_paths = rotation_chart_paths(out, growth.strata) if charts else {}
    if not overwrite:
        existing = [p for p in chart_paths.values() if p.exists()]
        if existing:
            msg = (
                f"chart {existing[0]} exists ({len(existing)} in all); pass --overwrite to replace"
            )
            raise OutputError(msg)
    df = economics.rotation_table(growth, growth.strata, settings, max_age=max_age)
    with atomic_path(out, suffix=".csv") as tmp:
        df.to_csv(tmp, index=False, lineterminator="\n", float_format="%.6g")
    chart_dir = out.parent / f"{out.stem}_charts"
    if chart_paths:
        chart_dir.mkdir(exist_ok=True)
        for s, p in chart_paths.items():
            rotation_chart(economics.rotation_curves(growth, s, settings, max_age), p)
    return RotationOutputs(df, out, chart_paths, chart_dir if chart_paths else None)
