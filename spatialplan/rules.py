"""Harvest rules turned into arrays: green-up delay, initial openness, eligibility.

The problem builder uses these to fill :class:`~spatialplan.problem.PlanProblem`.
:mod:`spatialplan.verify` deliberately does *not* use them: it re-derives every rule with
its own code so that a mistake here cannot hide itself.

Conventions (see ``docs/architecture.md``): periods ``p = 1 .. P`` of ``L`` years; a
harvest happens at mid-period, ``t = (p - 0.5) L``. A stand harvested in period ``q`` is
open in periods ``q .. q + G - 1``; a stand young at the start is open in every period with
``age_start + (p - 0.5) L < G L``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from spatialplan.errors import SettingsError
from spatialplan.settings import Settings

__all__ = [
    "eligible_matrix",
    "green_up_periods_for_stands",
    "initially_open",
    "rule_summary",
    "rules_in_force",
]

#: ages compare with this slack (years) so 37.5 + 2.5 >= 40 holds despite rounding
AGE_EPS_YR = 1e-9
#: longest green-up searched for a height curve, in periods
_MAX_GREEN_UP_PERIODS = 200


def _height_model(settings: Settings, growth: Any) -> Any:
    if growth is not None:
        return growth
    # Heights come only from the [growth] settings, so no yield table is needed here.
    from spatialplan.growth import build_growth_model

    return build_growth_model(None, settings.growth, settings.fields.yield_keys)


def green_up_periods_for_stands(
    strata: np.ndarray, settings: Settings, growth: Any = None
) -> tuple[np.ndarray, list[str]]:
    """Green-up delay of every stand in whole periods.

    Parameters
    ----------
    strata
        (n,) stratum labels.
    settings
        Run settings; ``rules.green_up_periods``, ``rules.green_up_years`` or
        ``rules.green_up_height_m`` decide the delay.
    growth
        Object with ``height(strata, ages) -> ndarray`` (NaN where a stratum has no
        curve, or ``None`` when there are no height curves), e.g. a
        :class:`~spatialplan.growth.GrowthModel`. Built from ``settings.growth`` when
        omitted. Needed only for green-up by height.

    Returns
    -------
    periods
        (n,) int green-up delay ``G`` per stand.
    messages
        Notes for the user (rounding of years, strata that never reach the height).

    Raises
    ------
    SettingsError
        Green-up by height is asked for but some strata have no height curve (all are
        named).
    """
    strata = np.asarray(strata, dtype=object)
    n = len(strata)
    r, hz = settings.rules, settings.horizon
    length = hz.period_length_yr
    msgs: list[str] = []
    if r.green_up_height_m is not None:
        model = _height_model(settings, growth)
        labels = list(dict.fromkeys(str(s) for s in strata))
        k = np.arange(1, _MAX_GREEN_UP_PERIODS + 1)
        # Regenerated at mid-period q, the new stand is k L years old at mid-period q + k.
        heights = (
            None
            if model is None
            else model.height(
                np.repeat(np.asarray(labels, dtype=object), len(k)),
                np.tile(k * length, len(labels)),
            )
        )
        if heights is None:
            msg = (
                f"rules.green_up_height_m = {r.green_up_height_m:g} needs height curves "
                "(growth.height_by_age or growth.height_chapman_richards); none are set"
            )
            raise SettingsError(msg)
        heights = np.asarray(heights, dtype=float).reshape(len(labels), len(k))
        missing = [lab for lab, row in zip(labels, heights, strict=True) if np.isnan(row).all()]
        if missing:
            msg = (
                f"rules.green_up_height_m is set but stratum {', '.join(missing)} has no "
                "height curve (growth.height_by_age or growth.height_chapman_richards)"
            )
            raise SettingsError(msg)
        reached = heights >= r.green_up_height_m
        g_by = {}
        never = []
        for lab, row in zip(labels, reached, strict=True):
            if row.any():
                g_by[lab] = int(k[np.argmax(row)])
            else:
                g_by[lab] = hz.periods + 1  # open for the rest of the horizon
                never.append(lab)
        out = np.array([g_by[str(s)] for s in strata], dtype=np.int64) if n else np.zeros(0, int)
        msgs.append(
            f"green-up by height {r.green_up_height_m:g} m: "
            + ", ".join(f"{lab} {g_by[lab]} period(s)" for lab in labels if lab not in never)
        )
        if never:
            msgs.append(
                f"stratum {', '.join(never)} does not reach the green-up height of "
                f"{r.green_up_height_m:g} m within {_MAX_GREEN_UP_PERIODS} periods; "
                "its cuts stay open to the end of the horizon"
            )
        return out, msgs
    if r.green_up_years is not None:
        g = math.ceil(r.green_up_years / length - 1e-12)
        if abs(g * length - r.green_up_years) > 1e-9:
            msgs.append(
                f"green-up of {r.green_up_years:g} years rounded up to {g} whole period(s) "
                f"of {length:g} years ({g * length:g} years)"
            )
        else:
            msgs.append(
                f"green-up of {r.green_up_years:g} years is {g} period(s) of {length:g} years"
            )
        return np.full(n, g, dtype=np.int64), msgs
    return np.full(n, int(r.green_up_periods), dtype=np.int64), msgs


def _mid_ages(age_start_yr: np.ndarray, periods: int, period_length_yr: float) -> np.ndarray:
    p = np.arange(1, periods + 1)
    return np.asarray(age_start_yr, dtype=float)[:, None] + (p - 0.5)[None, :] * period_length_yr


def initially_open(
    age_start_yr: np.ndarray,
    green_up_periods: np.ndarray | int,
    periods: int,
    period_length_yr: float,
) -> np.ndarray:
    """Which stands are open in which periods because they are young at the start.

    Parameters
    ----------
    age_start_yr
        (n,) ages at the start of the plan.
    green_up_periods
        (n,) or scalar green-up delay ``G`` in periods.
    periods, period_length_yr
        Horizon.

    Returns
    -------
    numpy.ndarray
        (n, P) bool, True where ``age_start + (p - 0.5) L < G L``.
    """
    g = np.broadcast_to(np.asarray(green_up_periods, dtype=float), np.shape(age_start_yr))
    return _mid_ages(age_start_yr, periods, period_length_yr) < (g * period_length_yr)[:, None]


def eligible_matrix(
    age_start_yr: np.ndarray,
    reserve: np.ndarray | None,
    min_age_yr: float,
    periods: int,
    period_length_yr: float,
    operable: np.ndarray | None = None,
) -> np.ndarray:
    """Which stands may be harvested in which periods.

    Parameters
    ----------
    age_start_yr
        (n,) ages at the start.
    reserve
        (n,) bool, True for reserves (never harvested); ``None`` for none.
    min_age_yr
        Minimum age at the mid-period harvest.
    periods, period_length_yr
        Horizon.
    operable
        (n,) or (n, P) bool; ``None`` means every stand is operable.

    Returns
    -------
    numpy.ndarray
        (n, P) bool.
    """
    elig = _mid_ages(age_start_yr, periods, period_length_yr) >= min_age_yr - AGE_EPS_YR
    if reserve is not None:
        elig &= ~np.asarray(reserve, dtype=bool)[:, None]
    if operable is not None:
        op = np.asarray(operable, dtype=bool)
        elig &= op[:, None] if op.ndim == 1 else op
    return elig


def rules_in_force(settings: Settings) -> list[tuple[str, str]]:
    """The rules in force as ``(key, sentence)`` pairs, in the order a report lists them.

    Keys: ``horizon``, ``max_opening``, ``green_up``, ``unit_restriction``, ``min_age``,
    ``reserves``, ``operability`` (terrain used), ``max_harvests``, ``old_forest``,
    ``flow_tolerance``, ``non_declining``, ``period_volume_min_m3``,
    ``period_volume_max_m3``, ``period_area_min_ha``, ``period_area_max_ha``,
    ``ending_value``, ``ending_volume``, ``ending_mean_age``, ``adjacency``; a rule that is
    off is left out (the opening limit says so when off).

    Examples
    --------
    >>> s = Settings().with_overrides({"rules.max_opening_ha": 40, "rules.min_age_yr": 35})
    >>> dict(rules_in_force(s))["min_age"]
    'minimum harvest age 35 years at mid-period'
    """
    r, hz, adj = settings.rules, settings.horizon, settings.adjacency
    out: list[tuple[str, str]] = []
    span = ""
    if hz.start_year:
        span = f" ({hz.start_year}–{hz.start_year + hz.periods * hz.period_length_yr:g})"
    out.append(
        (
            "horizon",
            f"{hz.periods} periods of {hz.period_length_yr:g} years{span}; harvests at mid-period",
        )
    )
    if r.max_opening_ha is not None:
        out.append(
            ("max_opening", f"maximum opening {r.max_opening_ha:g} ha (connected open stands)")
        )
    else:
        out.append(("max_opening", "no maximum opening size"))
    if r.green_up_height_m is not None:
        g_text = f"green-up when regeneration reaches {r.green_up_height_m:g} m (per stratum)"
    elif r.green_up_years is not None:
        g = math.ceil(r.green_up_years / hz.period_length_yr - 1e-12)
        g_text = f"green-up {r.green_up_years:g} years, rounded up to {g} period(s)"
    else:
        g_text = (
            f"green-up {r.green_up_periods} period(s) "
            f"({r.green_up_periods * hz.period_length_yr:g} years)"
        )
    out.append(("green_up", g_text))
    if r.unit_restriction:
        out.append(
            ("unit_restriction", "unit restriction: no two adjacent stands open in the same period")
        )
    out.append(("min_age", f"minimum harvest age {r.min_age_yr:g} years at mid-period"))
    out.append(("reserves", "reserves are never harvested"))
    if settings.terrain.dem:
        steepest = max((c.max_slope_pct for c in settings.terrain.slope_classes), default=0.0)
        out.append(
            (
                "operability",
                "inoperable stands are never harvested (more than "
                f"{settings.terrain.max_inoperable_share:.0%} of the area steeper than "
                f"{steepest:g} % slope)",
            )
        )
    out.append(
        (
            "max_harvests",
            "at most one harvest per stand"
            if r.max_harvests == 1
            else "a stand may be harvested again once regrown to the minimum age"
            + ("" if r.max_harvests is None else f", at most {r.max_harvests} times"),
        )
    )
    if r.old_forest_age_yr is not None and r.old_forest_min_share is not None:
        out.append(
            (
                "old_forest",
                f"in every period at least {r.old_forest_min_share:.0%} of the forest is "
                f"{r.old_forest_age_yr:g} years or older",
            )
        )
    if r.flow_tolerance is not None:
        out.append(
            (
                "flow_tolerance",
                f"even flow: volume changes by at most {r.flow_tolerance:.0%} between periods",
            )
        )
    if r.non_declining:
        out.append(("non_declining", "non-declining volume from period to period"))
    for key, text, unit in (
        ("period_volume_min_m3", "volume per period at least", "m3"),
        ("period_volume_max_m3", "volume per period at most", "m3"),
        ("period_area_min_ha", "area harvested per period at least", "ha"),
        ("period_area_max_ha", "area harvested per period at most", "ha"),
    ):
        v = getattr(r, key)
        if v is not None:
            out.append((key, f"{text} {v:g} {unit}"))
    out.append(("ending_value", _ENDING_VALUE_TEXT.get(settings.economics.ending_value, "")))
    if r.ending_volume_fraction is not None:
        out.append(
            (
                "ending_volume",
                f"standing volume at the end at least {r.ending_volume_fraction:.0%} of the start",
            )
        )
    if r.ending_mean_age_yr is not None:
        out.append(
            ("ending_mean_age", f"mean age at the end at least {r.ending_mean_age_yr:g} years")
        )
    corner = "; corner contacts count" if adj.corner_adjacency else ""
    out.append(
        (
            "adjacency",
            f"stands are adjacent when they share more than {adj.min_shared_edge_m:g} m of "
            f"boundary (gaps up to {adj.digitising_tolerance_m:g} m closed){corner}",
        )
    )
    return out


#: How the forest left at the end is valued, by ``economics.ending_value``.
_ENDING_VALUE_TEXT = {
    "faustmann": "the forest left at the end is valued by Faustmann: the standing crop cut "
    "at its best future age, then Faustmann rotations on the land for ever, discounted to "
    "the start",
    "standing": "the forest left at the end is valued as the standing crop's harvest value, "
    "discounted to the start (the land itself is not valued)",
    "none": "the forest left at the end is not valued",
}


def rule_summary(settings: Settings) -> list[str]:
    """The rules in force, one plain sentence each (the sentences of :func:`rules_in_force`)."""
    return [text for _key, text in rules_in_force(settings)]
