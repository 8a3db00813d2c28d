"""The harvests of a plan as a list of events, and the crops they cut and leave behind.

A plan may harvest a stand more than once. Verify works on a list of *harvest events*
``(stand, period)``, read from the ``harvests`` table of the plan when there is one, else
from the schedule layer's period column (at most one harvest per stand).

Regrowth (``docs/architecture.md``): a harvest in period ``q`` happens at mid-period; the
stand regenerates then at age 0, so at mid-period ``p > q`` the new crop is
``(p - q) L - delay`` years old (``regeneration.delay_yr``, 0 when the setting does not
exist); its stratum is ``regeneration.stratum_map[old stratum]`` when that mapping exists
and names the old stratum, else the old stratum. A harvest opens the stand in periods
``q .. q + G - 1``; a stand young at the start is open while
``age_start + (p - 0.5) L < G L``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from spatialplan.errors import InputError, SettingsError
from spatialplan.settings import Settings
from spatialplan.verify.report import Violation
from spatialplan.verify.yields import Curves, key_text, label_text

__all__ = [
    "FROM_TABLE",
    "Crops",
    "Harvests",
    "ages_by_period",
    "crops",
    "green_up_periods",
    "harvests_from_period",
    "harvests_from_table",
    "openness",
    "regeneration",
]

#: ``Harvests.source`` of harvests read from a ``harvests`` table
FROM_TABLE = "harvests table"
#: longest green-up looked for on a height curve, in periods
_MAX_GREEN_UP_PERIODS = 1000
#: what a plan file records about each harvest, and the columns it may be in (the first
#: found wins; the later names are those of plans written before the estate model)
_RECORDED = {
    "age_yr": ("age_at_harvest_yr", "age_at_harvest"),
    "volume_m3": ("volume_m3",),
    "npv": ("npv",),
}


@dataclass(frozen=True, eq=False)
class Harvests:
    """Every harvest of a plan, sorted by stand position and period.

    Attributes
    ----------
    stand, period
        (e,) stand position and harvest period (1-based) of each event.
    recorded
        (e,) what the plan file says about each harvest: ``age_yr`` (age of the crop
        cut), ``volume_m3`` and ``npv`` (its discounted net value); NaN where not
        recorded.
    source
        ``"harvests table"`` or ``"schedule column <name>"``.
    """

    stand: np.ndarray
    period: np.ndarray
    recorded: pd.DataFrame
    source: str


def _whole_periods(raw: pd.Series, periods: int) -> tuple[np.ndarray, np.ndarray]:
    """Harvest periods as integers (0 = none) and where a value is not one of 1 .. P."""
    num = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
    text = raw.astype(str).str.strip()
    blank = raw.isna().to_numpy() | text.isin(["", "nan", "None", "<NA>"]).to_numpy()
    given = ~np.isnan(num)
    bad = (~given & ~blank) | (given & ((num != np.round(num)) | (num < 0) | (num > periods)))
    return np.where(bad | np.isnan(num), 0, num).astype(np.int64), bad


def _recorded(frame: pd.DataFrame, columns: dict[str, tuple[str, ...]]) -> pd.DataFrame:
    out = pd.DataFrame(index=range(len(frame)))
    for name, candidates in columns.items():
        col = next((c for c in candidates if c in frame.columns), None)
        values = frame[col] if col is not None else pd.Series(np.nan, index=frame.index)
        out[name] = pd.to_numeric(values, errors="coerce").to_numpy(dtype=float)
    return out


def _numbers(frame: pd.DataFrame, column: str) -> np.ndarray:
    return pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=float)


def harvests_from_period(
    frame: pd.DataFrame, ids: np.ndarray, column: str, periods: int
) -> tuple[Harvests, list[Violation]]:
    """One harvest per stand from the schedule layer's period column (empty or 0: none)."""
    raw = frame[column]
    period, bad = _whole_periods(raw, periods)
    problems = [
        Violation(
            "period_range",
            None,
            (str(ids[k]),),
            None,
            float(periods),
            f"harvest period {raw.iloc[k]!r} is not a whole number in 1..{periods} "
            "(empty or 0 = not harvested)",
        )
        for k in np.flatnonzero(bad)
    ]
    if (
        "harvest_count" in frame.columns
        and (np.nan_to_num(_numbers(frame, "harvest_count")) > 1).any()
    ):
        more = np.flatnonzero(np.nan_to_num(_numbers(frame, "harvest_count")) > 1)
        listed = ", ".join(str(ids[k]) for k in more[:10])
        msg = (
            f"the schedule records stands harvested more than once ({listed}; column "
            "harvest_count) but no harvests table was given: verify the plan GeoPackage, "
            "which holds it, or pass the harvests table"
        )
        raise InputError(msg)
    cut = np.flatnonzero(period > 0)
    rows = frame.iloc[cut]
    recorded = _recorded(rows, {k: v for k, v in _RECORDED.items() if k != "npv"})
    # The harvest's value: `value` in plans written before the estate model; since then
    # the stand's `npv` holds its ending value too, which is taken off.
    if "value" in rows.columns:
        recorded["npv"] = _numbers(rows, "value")
    elif "npv" in rows.columns and "ending_value_npv" in rows.columns:
        recorded["npv"] = _numbers(rows, "npv") - _numbers(rows, "ending_value_npv")
    else:
        recorded["npv"] = np.nan
    return Harvests(cut, period[cut], recorded, f"schedule column {column}"), problems


def harvests_from_table(
    table: pd.DataFrame, ids: np.ndarray, id_field: str, periods: int
) -> tuple[Harvests, list[Violation]]:
    """Harvest events from a ``harvests`` table (stand id, ``harvest``, ``period`` ...).

    Raises
    ------
    InputError
        The table lacks the id or period column, or names stands the schedule lacks.
    """
    missing = [c for c in (id_field, "period") if c not in table.columns]
    if missing:
        msg = (
            f"harvests table lacks column(s) {', '.join(missing)} (has {', '.join(table.columns)})"
        )
        raise InputError(msg)
    position = {str(v): k for k, v in enumerate(ids)}
    stand_text = table[id_field].map(key_text)
    unknown = sorted(set(stand_text) - set(position))
    if unknown:
        msg = f"harvests table names stands not in the schedule layer: {', '.join(unknown[:20])}"
        raise InputError(msg)
    stand = stand_text.map(position).to_numpy(dtype=np.int64)
    period, bad = _whole_periods(table["period"], periods)
    problems = [
        Violation(
            "period_range",
            None,
            (stand_text.iloc[k],),
            None,
            float(periods),
            f"harvest period {table['period'].iloc[k]!r} is not a whole number in 1..{periods}",
        )
        for k in np.flatnonzero(bad | (period == 0))
    ]
    keep = np.flatnonzero(period > 0)
    order = keep[np.lexsort((period[keep], stand[keep]))]
    recorded = _recorded(table.iloc[order], _RECORDED)
    return Harvests(stand[order], period[order], recorded, FROM_TABLE), problems


def regeneration(settings: Settings) -> tuple[float, dict[str, str]]:
    """Regeneration delay (years) and stratum mapping (``[regeneration]``)."""
    regen = settings.regeneration
    return float(regen.delay_yr), {
        label_text(k): label_text(v) for k, v in dict(regen.stratum_map).items()
    }


@dataclass(frozen=True, eq=False)
class Crops:
    """The crop each harvest cuts and the crop standing at the end of the horizon.

    Attributes
    ----------
    age_at_harvest, stratum_cut
        (e,) age (years, at mid-period) and stratum of the crop each harvest cuts.
    stratum_after
        (e,) stratum regenerated after each harvest.
    previous
        (e,) period of the stand's harvest before this one (0 for the first).
    end_age, end_stratum
        (n,) age and stratum of every stand at the end of the horizon (``P L``).
    """

    age_at_harvest: np.ndarray
    stratum_cut: np.ndarray
    stratum_after: np.ndarray
    previous: np.ndarray
    end_age: np.ndarray
    end_stratum: np.ndarray


def crops(
    harvests: Harvests, age_start: np.ndarray, strata: np.ndarray, settings: Settings
) -> Crops:
    """Ages and strata of the crops cut by every harvest (regrowth as in the module docstring)."""
    P, L = settings.horizon.periods, settings.horizon.period_length_yr
    delay, mapping = regeneration(settings)
    stand, period = harvests.stand, harvests.period
    e = len(stand)
    first = np.ones(e, dtype=bool)
    first[1:] = stand[1:] != stand[:-1]
    previous = np.where(first, 0, np.concatenate([[0], period[:-1]]))
    cut = np.asarray(strata, dtype=object)[stand].copy()
    after = np.empty(e, dtype=object)
    for k in range(e):  # a stand's crops follow one another, so one pass in order
        if not first[k]:
            cut[k] = after[k - 1]
        after[k] = mapping.get(str(cut[k]), cut[k])
    age = np.where(first, age_start[stand] + (period - 0.5) * L, (period - previous) * L - delay)
    end_age = np.asarray(age_start, dtype=float) + P * L
    end_stratum = np.asarray(strata, dtype=object).copy()
    last = np.ones(e, dtype=bool)
    last[:-1] = stand[:-1] != stand[1:]
    end_age[stand[last]] = (P - period[last] + 0.5) * L - delay
    end_stratum[stand[last]] = after[last]
    return Crops(age, cut, after, previous, end_age, end_stratum)


def green_up_periods(
    strata: np.ndarray, settings: Settings, curves: Curves, delay_yr: float, notes: list[str]
) -> np.ndarray:
    """Green-up delay ``G`` in whole periods for a crop of each stratum regenerated at age 0.

    By height: the first ``k >= 1`` with height ``(k L - delay) >= rules.green_up_height_m``
    (never reached: ``P + 1``); by years: ``ceil(green_up_years / L)``; else
    ``rules.green_up_periods``.

    Raises
    ------
    SettingsError
        Green-up by height is set but a stratum has no height curve.
    """
    r, L = settings.rules, settings.horizon.period_length_yr
    strata = np.asarray(strata, dtype=object)
    if r.green_up_height_m is not None:
        out = np.zeros(len(strata), dtype=np.int64)
        k = np.arange(1, _MAX_GREEN_UP_PERIODS + 1)
        for lab in pd.unique(strata):
            height = curves.height(np.full(len(k), lab, dtype=object), k * L - delay_yr)
            if np.isnan(height).all():
                msg = f"green-up by height: stratum {lab} has no height curve"
                raise SettingsError(msg)
            reached = np.flatnonzero(height >= r.green_up_height_m)
            out[strata == lab] = k[reached[0]] if len(reached) else settings.horizon.periods + 1
        return out
    if r.green_up_years is not None:
        g = math.ceil(r.green_up_years / L - 1e-9)  # smallest whole number of periods
        notes.append(f"green-up of {r.green_up_years:g} years checked as {g} period(s)")
        return np.full(len(strata), g, dtype=np.int64)
    return np.full(len(strata), int(r.green_up_periods), dtype=np.int64)


def openness(
    harvests: Harvests,
    green_after: np.ndarray,
    age_start: np.ndarray,
    green_start: np.ndarray,
    settings: Settings,
) -> tuple[np.ndarray, np.ndarray]:
    """Which stands are open in which period, and which harvest keeps them open.

    Parameters
    ----------
    harvests
        The harvest events.
    green_after
        (e,) green-up delay in periods of the crop regenerated after each harvest.
    age_start, green_start
        (n,) age at the start and green-up delay of the crop standing then.
    settings
        ``horizon`` is used.

    Returns
    -------
    is_open
        (n, P) True where a stand is open.
    opened_by
        (n, P) period of the latest harvest that keeps the stand open (0: none).
    """
    P, L = settings.horizon.periods, settings.horizon.period_length_yr
    p = np.arange(1, P + 1)
    opened_by = np.zeros((len(age_start), P), dtype=np.int64)
    for i, q, g in zip(harvests.stand, harvests.period, green_after, strict=True):
        span = (p >= q) & (p <= q + g - 1)
        opened_by[i, span] = np.maximum(opened_by[i, span], q)
    young = age_start[:, None] + (p[None, :] - 0.5) * L < green_start[:, None] * L
    return (opened_by > 0) | young, opened_by


def ages_by_period(harvests: Harvests, age_start: np.ndarray, settings: Settings) -> np.ndarray:
    """(n, P) age of the crop standing at every mid-period (regrowth of the module docstring).

    Before a stand's first harvest ``age_start + (p - 0.5) L``; from a harvest in ``q`` on,
    ``(p - q) L - delay`` (negative until the new crop starts; ``-delay`` in the period of
    the cut itself).
    """
    P, L = settings.horizon.periods, settings.horizon.period_length_yr
    delay, _ = regeneration(settings)
    p = np.arange(1, P + 1)
    age = np.asarray(age_start, dtype=float)[:, None] + (p - 0.5)[None, :] * L
    for i, q in zip(harvests.stand, harvests.period, strict=True):  # events in period order
        age[i, q - 1 :] = (p[q - 1 :] - q) * L - delay
    return age
