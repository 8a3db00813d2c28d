"""The rule checks of verify, each on plain arrays.

How an over-size opening is named
---------------------------------
Only openings that contain a stand cut *in that period* can be a breach of the plan: an
opening without a new cut is a subset of an opening of the period before (stands only
green up as time passes), which was judged there.

* ``max_opening``: the stands cut in the period form, on their own, a connected group
  larger than the limit.
* ``green_up``: the stands cut in the period are within the limit on their own, but the
  opening exceeds it together with earlier cuts (or stands young at the start) that have
  not yet greened up.
* pre-existing condition: in period 1, an opening over the limit made only of stands that
  were young at the start, with no harvest of the plan in it. Reported, not a breach.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pandas as pd

from spatialplan.settings import Rules
from spatialplan.verify.report import Violation

__all__ = [
    "AGE_EPS_YR",
    "AREA_EPS_HA",
    "RECORD_ATOL",
    "REL_EPS",
    "ending_checks",
    "flow_checks",
    "harvest_checks",
    "old_forest_checks",
    "opening_checks",
    "record_checks",
    "unit_restriction_checks",
]

#: slack on areas (ha) so an opening of exactly the limit passes despite float sums
AREA_EPS_HA = 1e-6
#: relative slack on volume comparisons (rounding of values written to files)
REL_EPS = 1e-6
#: slack on ages (years)
AGE_EPS_YR = 1e-9
#: absolute slack (years, m3, currency) when comparing a recorded harvest figure
RECORD_ATOL = 1e-6


def _slack(a: float, b: float) -> float:
    return REL_EPS * max(abs(a), abs(b)) + 1e-9


def harvest_checks(
    stand_ids: np.ndarray,
    period: np.ndarray,
    age_yr: np.ndarray,
    previous: np.ndarray,
    barred: dict[str, tuple[np.ndarray, str]],
    rules: Rules,
) -> list[Violation]:
    """Rules on single harvests: minimum age, barred stands, harvests per stand.

    Parameters
    ----------
    stand_ids, period, age_yr, previous
        (e,) stand id, period, age of the crop cut (mid-period) and the period of the
        stand's harvest before (0: none) of every harvest.
    barred
        Rule name (``reserve``, ``inoperable``) -> ((e,) True where that harvest is of a
        stand the rule bars from harvest, the message).
    rules
        ``min_age_yr`` and ``max_harvests`` are used.
    """
    out = [
        Violation(
            "min_age",
            int(period[k]),
            (str(stand_ids[k]),),
            float(age_yr[k]),
            rules.min_age_yr,
            f"harvested at age {age_yr[k]:g} years (mid-period), below the minimum of "
            f"{rules.min_age_yr:g}",
        )
        for k in np.flatnonzero(age_yr < rules.min_age_yr - AGE_EPS_YR)
    ]
    for rule, (hit, message) in barred.items():
        out += [
            Violation(rule, int(period[k]), (str(stand_ids[k]),), None, None, message)
            for k in np.flatnonzero(hit)
        ]
    # Harvest number of every event: events come sorted by stand, then period.
    e = len(stand_ids)
    first = np.ones(e, dtype=bool)
    first[1:] = np.asarray(stand_ids[1:]) != np.asarray(stand_ids[:-1])
    number = np.arange(e) - np.maximum.accumulate(np.where(first, np.arange(e), 0)) + 1
    cap = rules.max_harvests
    over_cap = number > cap if cap is not None else np.zeros(e, dtype=bool)
    again = (previous > 0) & ((previous == period) | over_cap)
    for k in np.flatnonzero(again):
        why = (
            "harvested twice in one period"
            if previous[k] == period[k]
            else f"harvest number {number[k]} is more than rules.max_harvests = {cap}"
        )
        out.append(
            Violation(
                "reharvest",
                int(period[k]),
                (str(stand_ids[k]),),
                float(number[k]),
                None if cap is None else float(cap),
                f"{why} (harvest before in period {previous[k]})",
            )
        )
    return out


def opening_checks(
    ids: np.ndarray,
    edges: np.ndarray,
    gross_ha: np.ndarray,
    is_open: np.ndarray,
    opened_by: np.ndarray,
    max_opening_ha: float | None,
) -> tuple[list[Violation], list[Violation], pd.DataFrame]:
    """Openings of every period (networkx connected components) against the size limit.

    Parameters
    ----------
    ids
        (n,) stand ids.
    edges
        (m, 2) adjacent stand positions.
    gross_ha
        (n,) stand areas.
    is_open
        (n, P) True where a stand is open in a period.
    opened_by
        (n, P) period of the harvest that keeps a stand open (0: young at the start or
        not open); equal to the period itself for a stand cut then.
    max_opening_ha
        The limit, or ``None``.

    Returns
    -------
    violations, preexisting
        ``max_opening`` and ``green_up`` breaches; pre-existing conditions.
    openings
        One row per opening: ``period``, ``opening``, ``stand_count``, ``gross_area_ha``,
        ``new_harvest_gross_ha``, ``stand_ids``, ``positions``.
    """
    graph = nx.Graph()
    graph.add_nodes_from(range(len(ids)))
    graph.add_edges_from(map(tuple, edges.tolist()))
    violations: list[Violation] = []
    preexisting: list[Violation] = []
    rows = []
    limit = max_opening_ha
    for p in range(1, is_open.shape[1] + 1):
        new = opened_by[:, p - 1] == p
        groups = nx.connected_components(graph.subgraph(np.flatnonzero(is_open[:, p - 1]).tolist()))
        for o, comp in enumerate(sorted(groups, key=min)):
            members = np.array(sorted(comp), dtype=np.int64)
            area = float(gross_ha[members].sum())
            cut_now = members[new[members]]
            rows.append(
                {
                    "period": p,
                    "opening": o + 1,
                    "stand_count": len(members),
                    "gross_area_ha": area,
                    "new_harvest_gross_ha": float(gross_ha[cut_now].sum()),
                    "stand_ids": ",".join(str(ids[m]) for m in members),
                    "positions": members,
                }
            )
            if limit is None or area <= limit + AREA_EPS_HA:
                continue
            member_ids = tuple(str(ids[m]) for m in members)
            if len(cut_now) == 0:
                if p == 1:
                    preexisting.append(
                        Violation(
                            "max_opening",
                            p,
                            member_ids,
                            area,
                            limit,
                            f"opening of {area:.2f} ha of stands young at the start is over "
                            f"the {limit:g} ha limit with no harvest of the plan in it "
                            "(pre-existing condition)",
                        )
                    )
                continue  # later periods: part of an opening judged in an earlier period
            alone = graph.subgraph(cut_now.tolist())
            largest_new = max(
                float(gross_ha[list(c)].sum()) for c in nx.connected_components(alone)
            )
            if largest_new > limit + AREA_EPS_HA:
                violations.append(
                    Violation(
                        "max_opening",
                        p,
                        member_ids,
                        area,
                        limit,
                        f"opening of {area:.2f} ha exceeds {limit:g} ha; stands cut in "
                        f"period {p} alone form {largest_new:.2f} ha",
                    )
                )
                continue
            older = members[~new[members]]
            earlier = sorted({int(q) for q in opened_by[older, p - 1] if q > 0})
            why = []
            if earlier:
                why.append(f"stands cut in period(s) {', '.join(map(str, earlier))}")
            if (opened_by[older, p - 1] == 0).any():
                why.append("stands young at the start")
            violations.append(
                Violation(
                    "green_up",
                    p,
                    member_ids,
                    area,
                    limit,
                    f"opening of {area:.2f} ha exceeds {limit:g} ha: stands cut in period {p} "
                    f"({float(gross_ha[cut_now].sum()):.2f} ha) join {' and '.join(why)} that "
                    "have not greened up",
                )
            )
    cols = ["period", "opening", "stand_count", "gross_area_ha", "new_harvest_gross_ha",
            "stand_ids", "positions"]  # fmt: skip
    return violations, preexisting, pd.DataFrame(rows, columns=cols)


def unit_restriction_checks(
    ids: np.ndarray, edges: np.ndarray, is_open: np.ndarray, opened_by: np.ndarray
) -> tuple[list[Violation], list[Violation]]:
    """Adjacent stands open in the same period (the unit restriction).

    A pair is a breach when one of the two is cut in that period; two stands young at
    the start that touch in period 1 are a pre-existing condition.
    """
    violations: list[Violation] = []
    preexisting: list[Violation] = []
    for p in range(1, is_open.shape[1] + 1):
        both = is_open[edges[:, 0], p - 1] & is_open[edges[:, 1], p - 1]
        for i, j in edges[both]:
            pair = (str(ids[i]), str(ids[j]))
            if opened_by[i, p - 1] == p or opened_by[j, p - 1] == p:
                violations.append(
                    Violation(
                        "unit_restriction",
                        p,
                        pair,
                        None,
                        None,
                        "adjacent stands are open in the same period",
                    )
                )
            elif p == 1 and opened_by[i, 0] == 0 and opened_by[j, 0] == 0:
                preexisting.append(
                    Violation(
                        "unit_restriction",
                        p,
                        pair,
                        None,
                        None,
                        "adjacent stands are both young at the start (pre-existing condition)",
                    )
                )
    return violations, preexisting


def flow_checks(
    volume_m3: np.ndarray, area_ha: np.ndarray, rules: Rules
) -> tuple[list[Violation], list[str]]:
    """Even flow, non-declining flow and the per-period volume and area bounds.

    Even flow is ``|V[p+1] - V[p]| <= tol V[p]``; every comparison allows a relative
    slack of :data:`REL_EPS` for values rounded in files.
    """
    out: list[Violation] = []
    checked: list[str] = []
    P = len(volume_m3)
    if rules.flow_tolerance is not None:
        checked.append("even_flow")
        tol = rules.flow_tolerance
        for p in range(1, P):
            a, b = volume_m3[p - 1], volume_m3[p]
            if abs(b - a) > tol * a + _slack(a, b):
                change = f"{(b - a) / a:+.1%}" if a > 0 else "from 0"
                out.append(
                    Violation(
                        "even_flow",
                        p + 1,
                        (),
                        float(b),
                        float(a),
                        f"volume {b:,.0f} m3 changes {change} from period {p} ({a:,.0f} m3); "
                        f"allowed +-{tol:.0%}",
                    )
                )
    if rules.non_declining:
        checked.append("non_declining")
        for p in range(1, P):
            a, b = volume_m3[p - 1], volume_m3[p]
            if b < a - _slack(a, b):
                out.append(
                    Violation(
                        "non_declining",
                        p + 1,
                        (),
                        float(b),
                        float(a),
                        f"volume falls to {b:,.0f} m3 from {a:,.0f} m3 in period {p}",
                    )
                )
    bounds = (
        ("volume_min", rules.period_volume_min_m3, volume_m3, "volume", "m3", False),
        ("volume_max", rules.period_volume_max_m3, volume_m3, "volume", "m3", True),
        ("area_min", rules.period_area_min_ha, area_ha, "harvest area", "ha", False),
        ("area_max", rules.period_area_max_ha, area_ha, "harvest area", "ha", True),
    )
    for rule, lim, values, what, unit, upper in bounds:
        if lim is None:
            continue
        checked.append(rule)
        for p in range(1, P + 1):
            x = values[p - 1]
            if (x > lim + _slack(x, lim)) if upper else (x < lim - _slack(x, lim)):
                word = "above the maximum" if upper else "below the minimum"
                out.append(
                    Violation(
                        rule,
                        p,
                        (),
                        float(x),
                        float(lim),
                        f"{what} {x:,.2f} {unit} is {word} of {lim:,.2f} {unit}",
                    )
                )
    return out, checked


def record_checks(
    rule: str,
    ids: np.ndarray,
    period: np.ndarray,
    recorded: np.ndarray,
    recomputed: np.ndarray,
) -> list[Violation]:
    """Figures in the plan file that differ from verify's own, one line per period.

    Parameters
    ----------
    rule
        ``recorded_age``, ``recorded_volume``, ``recorded_value`` (per harvest),
        ``recorded_ending_value`` or ``recorded_npv`` (per stand).
    ids, period
        (e,) stand id and period of every harvest (0 for a per-stand figure: the
        violation then names no period).
    recorded, recomputed
        (e,) the plan's figure and verify's; harvests where either is NaN are skipped.
        They differ when apart by more than :data:`REL_EPS` of verify's figure plus
        :data:`RECORD_ATOL`.
    """
    what = {
        "recorded_age": "age at harvest",
        "recorded_volume": "volume (m3)",
        "recorded_ending_value": "discounted ending value",
        "recorded_npv": "NPV",
    }.get(rule, "value")
    unit = "stand(s)" if rule in ("recorded_ending_value", "recorded_npv") else "harvest(s)"
    both = np.isfinite(recorded) & np.isfinite(recomputed)
    gap = np.abs(recorded - recomputed)
    off = both & (gap > REL_EPS * np.abs(recomputed) + RECORD_ATOL)
    out = []
    for p in np.unique(period[off]):
        rows = np.flatnonzero(off & (period == p))
        worst = rows[np.argmax(gap[rows])]
        out.append(
            Violation(
                rule,
                int(p) if p > 0 else None,
                tuple(str(ids[k]) for k in rows),
                float(recorded[worst]),
                float(recomputed[worst]),
                f"recorded {what} of {len(rows)} {unit} differs from verify's own; "
                f"stand {ids[worst]}: recorded {recorded[worst]:,.4g}, recomputed "
                f"{recomputed[worst]:,.4g}",
            )
        )
    return out


def old_forest_checks(
    unit: np.ndarray,
    gross_ha: np.ndarray,
    old: np.ndarray,
    old_age_yr: float,
    min_share: float,
    unit_field: str | None = None,
) -> list[Violation]:
    """Old-forest retention: in every period the gross area at least ``old_age_yr`` old at
    mid-period is at least ``min_share`` of the gross area (of each unit).

    Parameters
    ----------
    unit
        (n,) management unit of each stand (one value: the whole forest).
    gross_ha
        (n,) gross stand areas.
    old
        (n, P) True where a stand is old at mid-period.
    old_age_yr, min_share
        ``rules.old_forest_age_yr`` and ``rules.old_forest_min_share``.
    unit_field
        Name of the unit field, for messages (``None``: the whole forest).
    """
    out: list[Violation] = []
    for u in pd.unique(unit):
        members = unit == u
        total = float(gross_ha[members].sum())
        need = min_share * total
        where = "the forest" if unit_field is None else f"unit {u} ({unit_field})"
        for p in range(1, old.shape[1] + 1):
            have = float(gross_ha[members & old[:, p - 1]].sum())
            if have < need - _slack(have, need) - AREA_EPS_HA:
                out.append(
                    Violation(
                        "old_forest",
                        p,
                        (),
                        have,
                        need,
                        f"old forest (at least {old_age_yr:g} years at mid-period) covers "
                        f"{have:,.2f} ha of {where}, below {min_share:.0%} of its "
                        f"{total:,.2f} ha",
                    )
                )
    return out


def ending_checks(
    start_m3: float, end_m3: float | None, mean_age_yr: float, rules: Rules
) -> tuple[list[Violation], list[str]]:
    """Standing volume and area-weighted mean age at the end of the horizon."""
    out: list[Violation] = []
    checked: list[str] = []
    if rules.ending_volume_fraction is not None and end_m3 is not None:
        checked.append("ending_volume")
        need = rules.ending_volume_fraction * start_m3
        if end_m3 < need - _slack(end_m3, need):
            out.append(
                Violation(
                    "ending_volume",
                    None,
                    (),
                    end_m3,
                    need,
                    f"standing volume at the end {end_m3:,.0f} m3 is below "
                    f"{rules.ending_volume_fraction:.0%} of the start ({start_m3:,.0f} m3)",
                )
            )
    if rules.ending_mean_age_yr is not None:
        checked.append("ending_age")
        if mean_age_yr < rules.ending_mean_age_yr - AGE_EPS_YR:
            out.append(
                Violation(
                    "ending_age",
                    None,
                    (),
                    mean_age_yr,
                    rules.ending_mean_age_yr,
                    f"area-weighted mean age at the end {mean_age_yr:.1f} years is below "
                    f"{rules.ending_mean_age_yr:g}",
                )
            )
    return out, checked
