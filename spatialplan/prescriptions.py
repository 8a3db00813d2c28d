"""Prescriptions (Model I): every sequence of clear-cuts a stand may follow, with its values.

Part of the growth-and-economics stage. From plain arrays (strata, start ages, the
first-harvest eligibility of :func:`spatialplan.rules.eligible_matrix`, harvest costs), the
growth model and the settings, :func:`build_prescriptions` enumerates each stand's
prescriptions and prices them into a :class:`~spatialplan.problem.Prescriptions`.

Conventions (``docs/architecture.md``): periods ``p = 1 .. P`` of ``L`` years; a harvest in
``p`` happens at mid-period ``t = (p - 0.5) L`` and is discounted by ``(1 + r)**-t``. The
first crop is ``age_start + t`` old then. After a clear-cut in ``q`` the stand regenerates as
``regeneration.stratum_map[stratum]`` (default: the same stratum) and is
``(p - q) L - delay`` old at mid-period ``p > q`` (``delay = regeneration.delay_yr``).

A prescription is legal when its first harvest falls in an eligible period (reserves,
operability, ``rules.min_age_yr`` for the first crop), every later harvest in an operable
period with the crop standing then at least ``rules.min_age_yr`` old, and it has at most
``rules.max_harvests`` harvests. Its value is the sum of its harvests' discounted net values
(regeneration cost paid at each) plus the discounted value of the forest left at the end
(:func:`spatialplan.economics.ending_value_per_ha`).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping

import numpy as np
import pandas as pd

from spatialplan.economics import (
    DEFAULT_MAX_AGE,
    discount_factor,
    ending_value_per_ha,
    mid_period_times,
    net_value_per_ha,
)
from spatialplan.errors import SettingsError
from spatialplan.growth import GrowthModel, normalize_label
from spatialplan.problem import MAX_PERIODS, Prescriptions
from spatialplan.rules import AGE_EPS_YR
from spatialplan.settings import Regeneration, Settings

__all__ = [
    "MAX_PRESCRIPTIONS",
    "build_prescriptions",
    "harvest_cap",
    "harvest_gap_periods",
    "period_sequences",
    "regenerated_strata",
    "regeneration_map",
]

#: Refuse to build more prescriptions than this (about 100 bytes each, and the scheduler
#: needs a variable per prescription).
MAX_PRESCRIPTIONS = 5_000_000
#: With ``rules.max_harvests`` unset, keep at most this many period sequences per stand by
#: lowering the number of harvests (a note says so): past several hundred choices per stand
#: the search gains little and the model grows fast (2**P sequences with no minimum age).
SEQUENCES_PER_STAND = 600


def regeneration_map(regeneration: Regeneration, growth: GrowthModel) -> dict[str, str]:
    """``regeneration.stratum_map`` with normalised labels, checked against the growth model.

    Labels are normalised like stratum labels (``DF/2.0`` -> ``DF/2``).

    Raises
    ------
    SettingsError
        A mapped key or value has no yield curve (every such entry is named).
    """
    out: dict[str, str] = {}
    problems = []
    for src, dst in regeneration.stratum_map.items():
        s, d = normalize_label(src), normalize_label(dst)
        missing = [lab for lab in (s, d) if not growth.has_stratum(lab)]
        if missing:
            problems.append(
                f"regeneration.stratum_map.{src!r} = {dst!r}: no yield curve for stratum "
                + " and ".join(repr(m) for m in dict.fromkeys(missing))
            )
        out[s] = d
    if problems:
        known = growth.strata
        listed = ", ".join(known[:20]) + (f" ... ({len(known)} in all)" if len(known) > 20 else "")
        msg = "\n".join(problems) + f"\nstrata with a yield curve: {listed}"
        raise SettingsError(msg)
    return out


def regenerated_strata(
    strata: object, regeneration: Regeneration | Mapping[str, str], growth: GrowthModel
) -> np.ndarray:
    """The stratum that grows back after a clear-cut of each entry of ``strata``.

    >>> from spatialplan.growth import build_growth_model
    >>> from spatialplan.settings import ChapmanRichards, GrowthSettings
    >>> cr = ChapmanRichards(A=500.0, k=0.03, c=3.0)
    >>> g = build_growth_model(None, GrowthSettings(chapman_richards={"N": cr, "P": cr}), ["s"])
    >>> regenerated_strata(["N", "P"], Regeneration(stratum_map={"N": "P"}), g).tolist()
    ['P', 'P']
    """
    table = (
        regeneration_map(regeneration, growth)
        if isinstance(regeneration, Regeneration)
        else dict(regeneration)
    )
    lab = np.asarray(strata, dtype=object)
    if not table:
        return lab.copy()
    return pd.Series(lab.ravel()).map(lambda s: table.get(s, s)).to_numpy(object).reshape(lab.shape)


def harvest_gap_periods(min_age_yr: float, period_length_yr: float, delay_yr: float = 0.0) -> int:
    """Fewest periods between two harvests of a stand: ``g L - delay >= min_age`` (g >= 1).

    >>> harvest_gap_periods(40, 5), harvest_gap_periods(40, 5, 2), harvest_gap_periods(0, 5)
    (8, 9, 1)
    """
    g = max(1, math.ceil((min_age_yr + delay_yr) / period_length_yr))
    while g > 1 and (g - 1) * period_length_yr - delay_yr >= min_age_yr - AGE_EPS_YR:
        g -= 1
    while g * period_length_yr - delay_yr < min_age_yr - AGE_EPS_YR:
        g += 1
    return g


def harvest_cap(settings: Settings) -> tuple[int, str | None]:
    """Most harvests per stand the prescriptions allow, and a note when it was lowered.

    ``rules.max_harvests`` when set; otherwise as many as the minimum age allows, lowered
    until a stand has at most :data:`SEQUENCES_PER_STAND` harvest sequences.

    Examples
    --------
    >>> from spatialplan.settings import Settings
    >>> s = Settings().with_overrides({"horizon.periods": 20, "rules.min_age_yr": 40})
    >>> harvest_cap(s)
    (3, None)
    >>> cap, note = harvest_cap(s.with_overrides({"rules.min_age_yr": 0}))
    >>> cap, note.split(";")[0]
    (2, 'rules.max_harvests is not set: at most 2 harvests per stand are planned')
    """
    hz, rules = settings.horizon, settings.rules
    P = hz.periods
    gap = harvest_gap_periods(rules.min_age_yr, hz.period_length_yr, settings.regeneration.delay_yr)
    most = 1 + (P - 1) // gap
    if rules.max_harvests is not None:
        return min(int(rules.max_harvests), most), None
    m = most
    while m > 1 and _count_sequences(P, gap, m) + 1 > SEQUENCES_PER_STAND:
        m -= 1
    if m == most:
        return m, None
    note = (
        f"rules.max_harvests is not set: at most {m} harvests per stand are planned; the "
        f"minimum age ({rules.min_age_yr:g} years) would allow {most} in {P} periods, "
        f"{_count_sequences(P, gap, most) + 1:,} prescriptions per stand; set --max-harvests "
        "or --min-age to choose"
    )
    return m, note


def _count_sequences(periods: int, gap: int, max_len: int) -> int:
    """Non-empty increasing sequences in ``1 .. periods``, steps >= ``gap``, length <= max_len."""
    # ways[q] = sequences of the current length ending in period q + 1 (Python ints: the
    # count can pass 2**63 before the caller refuses it)
    ways = [1] * periods
    total = periods
    for _ in range(max_len - 1):
        pre = [0, *itertools.accumulate(ways)]
        ways = [pre[q - gap + 1] if q - gap + 1 > 0 else 0 for q in range(periods)]
        total += sum(ways)
        if not any(ways):
            break
    return total


def period_sequences(periods: int, gap: int, max_len: int) -> np.ndarray:
    """Every harvest-period sequence, padded with 0, in lexicographic order.

    Row 0 is the empty sequence (no harvest); then sequences of ``1 .. max_len`` periods in
    ``1 .. periods`` whose consecutive periods are at least ``gap`` apart.

    >>> period_sequences(4, 2, 2).tolist()
    [[0, 0], [1, 0], [1, 3], [1, 4], [2, 0], [2, 4], [3, 0], [4, 0]]
    """
    width = max(int(max_len), 1)
    levels = [np.arange(1, periods + 1, dtype=np.int16)[:, None]]
    while levels[-1].shape[1] < width and len(levels[-1]):
        prev = levels[-1]
        last = prev[:, -1].astype(np.int64)
        counts = np.maximum(periods - (last + gap) + 1, 0)
        rows = np.repeat(np.arange(len(prev)), counts)
        offset = np.arange(len(rows)) - np.repeat(np.cumsum(counts) - counts, counts)
        nxt = (last[rows] + gap + offset).astype(np.int16)
        levels.append(np.column_stack([prev[rows], nxt]))
    padded = [np.zeros((1, width), dtype=np.int16)]
    for lv in levels:
        pad = np.zeros((len(lv), width), dtype=np.int16)
        pad[:, : lv.shape[1]] = lv
        padded.append(pad)
    seq = np.concatenate(padded)
    return seq[np.lexsort(seq.T[::-1])]


def _bits(flags: np.ndarray) -> np.ndarray:
    """(..., P) bool -> (...,) uint64 with bit ``p - 1`` for period ``p``."""
    weights = np.left_shift(np.uint64(1), np.arange(flags.shape[-1], dtype=np.uint64))
    return (flags.astype(np.uint64) * weights).sum(axis=-1, dtype=np.uint64)


def build_prescriptions(
    strata: object,
    age_start_yr: object,
    eligible: np.ndarray,
    growth: GrowthModel,
    settings: Settings,
    harvest_cost_per_m3: object | None = None,
    operable: np.ndarray | None = None,
    max_age: int = DEFAULT_MAX_AGE,
) -> Prescriptions:
    """Enumerate and value every stand's prescriptions (vectorised).

    Period sequences are enumerated once (:func:`period_sequences`); each stand keeps those
    legal for its pattern of eligible and operable periods, and volumes and values are
    gathered from small per-stand tables (first crop by period, regenerated crops by the
    gap since the previous harvest) with numpy indexing.

    Parameters
    ----------
    strata
        (n,) stratum labels.
    age_start_yr
        (n,) ages at the start of the plan.
    eligible
        (n, P) bool: the first harvest may fall in that period
        (:func:`spatialplan.rules.eligible_matrix` with ``rules.min_age_yr``).
    growth
        Growth model.
    settings
        ``horizon``, ``rules`` (``min_age_yr``, ``max_harvests``, ``old_forest_age_yr``),
        ``economics`` and ``regeneration``.
    harvest_cost_per_m3
        (n,) harvest cost per stand (``HarvestValues.harvest_cost_per_m3``: terrain, cost
        class, default); default ``economics.harvest_cost_per_m3``.
    operable
        (n, P) bool: a later harvest may fall in that period (reserves and operability
        without the age rule, ``eligible_matrix`` with minimum age 0). Default: every period
        of a stand with an eligible period.
    max_age
        Years searched for the Faustmann ending value.

    Returns
    -------
    Prescriptions
        Per stand the no-harvest prescription first, then the others in lexicographic
        order of their harvest periods.

    Raises
    ------
    SettingsError
        A ``regeneration.stratum_map`` entry without a yield curve; more than
        :data:`MAX_PRESCRIPTIONS` prescriptions; a Faustmann ending value at a zero
        discount rate.
    """
    hz, rules, econ = settings.horizon, settings.rules, settings.economics
    P, L = hz.periods, hz.period_length_yr
    delay = settings.regeneration.delay_yr
    lab0 = np.asarray(strata, dtype=object).reshape(-1)
    a0 = np.asarray(age_start_yr, dtype=float).reshape(-1)
    n = len(lab0)
    elig = np.asarray(eligible, dtype=bool)
    if elig.shape != (n, P):
        msg = f"eligible must have shape ({n}, {P}), got {elig.shape}"
        raise ValueError(msg)
    if P > MAX_PERIODS:
        msg = f"horizon.periods = {P}: prescriptions support at most {MAX_PERIODS} periods"
        raise SettingsError(msg)
    oper = (
        np.repeat(np.asarray(elig.any(axis=1)).reshape(n, 1), P, axis=1)
        if operable is None
        else np.asarray(operable, dtype=bool) | elig
    )
    hc = (
        np.full(n, float(econ.harvest_cost_per_m3))
        if harvest_cost_per_m3 is None
        else np.broadcast_to(np.asarray(harvest_cost_per_m3, dtype=float), (n,))
    )
    regen = regeneration_map(settings.regeneration, growth)
    if n == 0:
        none_k, none_h = np.zeros(0), np.zeros(0)
        return Prescriptions(
            stand_start=np.zeros(1, dtype=np.int64),
            harvest_start=np.zeros(1, dtype=np.int64),
            harvest_period=np.zeros(0, dtype=np.int16),
            harvest_volume_m3_ha=none_h,
            harvest_npv_per_ha=none_h.copy(),
            npv_per_ha=none_k,
            ending_value_per_ha=none_k.copy(),
            harvest_mask=np.zeros(0, dtype=np.uint64),
            old_mask=np.zeros(0, dtype=np.uint64),
            ending_volume_m3_ha=none_k.copy(),
            ending_age_yr=none_k.copy(),
        )
    gap = harvest_gap_periods(rules.min_age_yr, L, delay)
    m, _ = harvest_cap(settings)
    n_seq = _count_sequences(P, gap, m)
    if n_seq + 1 > MAX_PRESCRIPTIONS:
        msg = (
            f"up to {n_seq + 1:,} prescriptions per stand ({P} periods, a harvest as often as "
            f"every {gap} period(s) at rules.min_age_yr = {rules.min_age_yr:g}, up to {m} "
            f"harvests) is more than the limit of {MAX_PRESCRIPTIONS:,}; set "
            "rules.max_harvests (--max-harvests) or raise rules.min_age_yr (--min-age)"
        )
        raise SettingsError(msg)

    # ---- sequences, once for all stands --------------------------------------------
    seq = period_sequences(P, gap, m)  # (T, m) int16, row 0 empty
    T = len(seq)
    nh = (seq > 0).sum(axis=1)
    first = seq[:, 0].astype(np.int64)
    last = seq[np.arange(T), np.maximum(nh - 1, 0)].astype(np.int64)
    hits = np.zeros((T, P + 1), dtype=bool)
    hits[np.repeat(np.arange(T), m), seq.ravel()] = True
    hits = hits[:, 1:]  # (T, P): harvested in period p
    t_mask = _bits(hits)
    first_bit = np.where(
        first > 0,
        np.left_shift(np.uint64(1), np.maximum(first - 1, 0).astype(np.uint64)),
        np.uint64(0),
    )
    t_start = np.concatenate([[0], np.cumsum(nh)])
    live = seq > 0
    # Harvests of every sequence in order (row-major), small integer types: these are
    # gathered once per harvest of every stand.
    f_period = seq[live]
    f_crop = np.broadcast_to(np.arange(m, dtype=np.int16), seq.shape)[live]
    prev = np.concatenate([np.zeros((T, 1), np.int16), seq[:, :-1]], axis=1)
    f_gap = (seq - prev)[live]  # periods since the previous harvest

    # ---- which sequences each stand may follow (one pass per distinct pattern) -------
    e_bits, o_bits = _bits(elig), _bits(oper)
    patterns, pat_of = np.unique(np.column_stack([e_bits, o_bits]), axis=0, return_inverse=True)
    pat_of = pat_of.reshape(-1)
    later = t_mask & ~first_bit
    allowed = []
    for e, o in patterns:
        ok = (nh == 0) | (((first_bit & e) != 0) & ((later & ~o) == 0))
        allowed.append(np.flatnonzero(ok))
    per_stand = np.array([len(allowed[u]) for u in pat_of], dtype=np.int64)
    stand_start = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(per_stand, out=stand_start[1:])
    K = int(stand_start[-1])
    if K > MAX_PRESCRIPTIONS:
        msg = (
            f"{K:,} prescriptions for {n} stands exceed the limit of {MAX_PRESCRIPTIONS:,}; "
            "set rules.max_harvests (--max-harvests) or raise rules.min_age_yr (--min-age)"
        )
        raise SettingsError(msg)
    tmpl = np.empty(K, dtype=np.int32)
    stand_order = np.argsort(pat_of, kind="stable")
    bounds = np.searchsorted(pat_of[stand_order], np.arange(len(patterns) + 1))
    for u, allowed_u in enumerate(allowed):
        members = stand_order[bounds[u] : bounds[u + 1]]
        idx = stand_start[members][:, None] + np.arange(len(allowed_u))[None, :]
        tmpl[idx] = allowed_u[None, :]
    stand = np.repeat(np.arange(n, dtype=np.int32), per_stand)

    # ---- per-stand tables: crop strata, volumes and net values ----------------------
    crops = [lab0]  # crops[k]: stratum of the crop standing after k harvests
    for _ in range(m + 1):
        crops.append(regenerated_strata(crops[-1], regen, growth))
    t = mid_period_times(P, L)
    disc = discount_factor(t, econ.discount_rate)
    vol_tab = np.zeros((n, m, P))  # crop 0 by harvest period, crop k >= 1 by gap
    net_tab = np.zeros((n, m, P))
    age1 = a0[:, None] + t[None, :]
    vol_tab[:, 0] = growth.volume(lab0, age1)
    net_tab[:, 0] = net_value_per_ha(lab0, age1, growth, econ, hc)
    regrown = np.maximum(np.arange(P) * L - delay, 0.0)  # crop age at a gap of d periods
    for k in range(1, m):
        ages_k = np.broadcast_to(regrown, (n, P))
        vol_tab[:, k] = growth.volume(crops[k], ages_k)
        net_tab[:, k] = net_value_per_ha(crops[k], ages_k, growth, econ, hc)

    # ---- harvests: gather from the tables ----------------------------------------
    # Cell of each sequence entry in a stand's (m, P) table: crop 0 by the harvest period,
    # a regenerated crop by the gap since the previous harvest.
    f_cell = f_crop.astype(np.int64) * P + np.where(f_crop == 0, f_period - 1, f_gap)
    n_h = nh[tmpl]
    harvest_start = np.zeros(K + 1, dtype=np.int64)
    np.cumsum(n_h, out=harvest_start[1:])
    H = int(harvest_start[-1])
    fidx = np.repeat(t_start[tmpl] - harvest_start[:-1], n_h) + np.arange(H)
    h_period = f_period[fidx]
    cell = np.repeat(stand.astype(np.int64) * (m * P), n_h) + f_cell[fidx]
    del fidx
    h_vol = vol_tab.ravel()[cell]
    h_npv = net_tab.ravel()[cell] * disc[h_period - 1]
    del cell
    cut = n_h > 0
    rx_npv = np.zeros(K)
    if H:
        rx_npv[cut] = np.add.reduceat(h_npv, harvest_start[:-1][cut])

    # ---- the forest left at the end ----------------------------------------------
    # Without a harvest: the first crop, age_start + P L. After c >= 1 harvests, the last
    # in q: crop c, aged P L - t_q - delay, which depends on the stand only through its
    # crop sequence and harvest cost (its class).
    end_disc = float(discount_factor(P * L, econ.discount_rate))
    age_end0 = a0 + P * L
    ev0 = ending_value_per_ha(
        lab0, age_end0, growth, settings, hc, next_strata=crops[1], max_age=max_age
    )
    vol0 = growth.volume(lab0, age_end0)
    lab_code = pd.factorize(lab0, use_na_sentinel=False)[0].astype(np.int64)
    hc_code = pd.factorize(hc, use_na_sentinel=False)[0].astype(np.int64)
    cls_of = pd.factorize(lab_code * (n + 1) + hc_code)[0]
    rep = np.unique(cls_of, return_index=True)[1]  # one stand per class
    since = P * L - t - delay  # (P,) crop age at the end after a harvest in period q
    shape = (len(rep), m, P)
    end_lab = np.broadcast_to(
        np.stack([c[rep] for c in crops[1 : m + 1]], axis=1)[..., None], shape
    )
    next_lab = np.broadcast_to(
        np.stack([c[rep] for c in crops[2 : m + 2]], axis=1)[..., None], shape
    )
    end_age = np.broadcast_to(since, shape)
    ev1 = ending_value_per_ha(
        end_lab.ravel(),
        end_age.ravel(),
        growth,
        settings,
        np.broadcast_to(hc[rep][:, None, None], shape).ravel(),
        next_strata=next_lab.ravel(),
        max_age=max_age,
    ).reshape(len(rep), m * P)
    vol1 = growth.volume(end_lab.ravel(), np.maximum(end_age, 0.0).ravel()).reshape(len(rep), -1)
    e_col = np.where(nh == 0, 0, (nh - 1) * P + last - 1)[tmpl]
    e_cls = cls_of[stand]
    ending_value = np.where(cut, ev1[e_cls, e_col], ev0[stand]) * end_disc
    ending_volume = np.where(cut, vol1[e_cls, e_col], vol0[stand])
    ending_age = np.maximum(
        np.where(cut, since[np.maximum(last - 1, 0)][tmpl], age_end0[stand]), 0.0
    )

    # ---- old-forest masks ----------------------------------------------------------
    old_age = rules.old_forest_age_yr
    if old_age is None:
        old_mask = np.zeros(K, dtype=np.uint64)
    else:
        p_idx = np.arange(1, P + 1)
        pre_old = _bits(a0[:, None] + ((p_idx - 0.5) * L)[None, :] >= old_age - 1e-9)
        latest = np.maximum.accumulate(np.where(hits, p_idx[None, :], 0), axis=1)
        after_age = (p_idx[None, :] - latest) * L - delay
        post_old = _bits((latest > 0) & (after_age >= old_age - 1e-9))
        full = np.uint64(0xFFFFFFFFFFFFFFFF) >> np.uint64(MAX_PERIODS - P)
        # bits of the periods before the first harvest (all of them without a harvest)
        before_first = np.where(first > 0, np.maximum(first_bit, np.uint64(1)) - np.uint64(1), full)
        old_mask = (pre_old[stand] & before_first[tmpl]) | post_old[tmpl]

    return Prescriptions(
        stand_start=stand_start,
        harvest_start=harvest_start,
        harvest_period=h_period,
        harvest_volume_m3_ha=h_vol,
        harvest_npv_per_ha=h_npv,
        npv_per_ha=rx_npv + ending_value,
        ending_value_per_ha=ending_value,
        harvest_mask=t_mask[tmpl],
        old_mask=old_mask,
        ending_volume_m3_ha=ending_volume,
        ending_age_yr=ending_age,
    )
