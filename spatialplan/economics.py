"""Stand economics: stumpage by tree size, discounting, harvest values, rotation rules.

Conventions (see ``docs/methods.md`` for formulas and sources):

* Discounting with annual compounding, ``(1 + r)**-t``, ``t`` in years from the start.
* A harvest in planning period ``p`` (1-based) of length ``L`` happens at mid-period,
  ``t = (p - 0.5) L``; the stand's age then is ``age_start + t`` (common practice in
  harvest-scheduling models, no single source).
* Values are per hectare. *Net stumpage value* of standing timber of age ``t`` is
  ``S(t) = (price(d(t)) - harvest_cost) V(t)``; regeneration cost ``C`` per ha is paid at
  harvest (the start of the next rotation); an annual cost ``a`` per ha is paid at the end
  of every year.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from spatialplan.errors import InputError, SettingsError
from spatialplan.growth import GrowthModel, cr_mai_culmination_age, mai
from spatialplan.settings import Economics, Settings

__all__ = [
    "HarvestValues",
    "RotationCurves",
    "discount_factor",
    "faustmann_rotation",
    "fisher_rotation",
    "harvest_cost_per_stand",
    "harvest_values",
    "lev",
    "mid_period_times",
    "npv",
    "rotation_curves",
    "rotation_table",
    "stumpage_price",
    "value_mai_rotation",
]

DEFAULT_MAX_AGE = 300


# ---------------------------------------------------------------------------------------
# discounting
# ---------------------------------------------------------------------------------------
def discount_factor(t_yr: object, rate: float) -> np.ndarray:
    """Annual-compounding discount factor ``(1 + r)**-t``.

    >>> round(float(discount_factor(10, 0.05)), 6)
    0.613913
    """
    return np.power(1.0 + rate, -np.asarray(t_yr, dtype=float))


def npv(cashflows: object, rate: float, times: object | None = None) -> np.ndarray | float:
    """Net present value ``sum_i CF_i (1 + r)**-t_i`` along the last axis.

    Parameters
    ----------
    cashflows
        Cash flows; the last axis runs over flows.
    rate
        Annual discount rate.
    times
        Years of each flow; default ``0, 1, 2, ...`` (first flow undiscounted, as in
        ``numpy_financial.npv``).

    Returns
    -------
    float or numpy.ndarray

    >>> round(npv([-40000, 5000, 8000, 12000, 30000], 0.08), 5)
    3065.22267
    """
    cf = np.asarray(cashflows, dtype=float)
    t = np.arange(cf.shape[-1], dtype=float) if times is None else np.asarray(times, float)
    res = (cf * discount_factor(t, rate)).sum(axis=-1)
    return float(res) if np.ndim(res) == 0 else res


def mid_period_times(
    periods: int | Sequence[int] | np.ndarray, period_length_yr: float
) -> np.ndarray:
    """Harvest times ``t = (p - 0.5) L`` in years.

    Parameters
    ----------
    periods
        Number of periods ``P`` (gives ``p = 1 .. P``) or an array of 1-based period numbers.
    period_length_yr
        Period length ``L``.

    >>> mid_period_times(3, 5.0).tolist()
    [2.5, 7.5, 12.5]
    """
    if np.ndim(periods) == 0:
        p = np.arange(1, int(np.asarray(periods)) + 1).astype(float)
    else:
        p = np.asarray(periods, dtype=float)
    return (p - 0.5) * float(period_length_yr)


# ---------------------------------------------------------------------------------------
# prices and costs
# ---------------------------------------------------------------------------------------
def stumpage_price(diameter_cm: object, econ: Economics) -> np.ndarray:
    """Price per m3 by product class keyed on mean diameter.

    The class used is the one with the highest ``min_diameter_cm`` not above the diameter;
    diameters below every class threshold are not merchantable (price 0). Where the schedule
    is empty or the diameter is unknown (NaN), ``economics.price_per_m3`` applies.

    Parameters
    ----------
    diameter_cm
        Mean diameters, any shape.
    econ
        ``[economics]`` settings.

    Returns
    -------
    numpy.ndarray
        Prices, same shape.

    Raises
    ------
    SettingsError
        A price is needed but ``economics.price_per_m3`` is not set and no schedule applies.
    """
    d = np.asarray(diameter_cm, dtype=float)
    fallback = econ.price_per_m3
    sched = sorted(econ.price_schedule, key=lambda c: c.min_diameter_cm)
    if not sched:
        if fallback is None:
            msg = (
                "no stumpage price: set economics.price_per_m3 (flag --price) or "
                "economics.price_schedule"
            )
            raise SettingsError(msg)
        return np.full(d.shape, float(fallback))
    mins = np.array([c.min_diameter_cm for c in sched], float)
    prices = np.array([c.price_per_m3 for c in sched], float)
    nan = np.isnan(d)
    if nan.any() and fallback is None:
        msg = (
            "economics.price_schedule is keyed on diameter but some strata have no diameter "
            "(no yield-table diameter column and no growth.diameter_by_age); set "
            "economics.price_per_m3 as the price for them"
        )
        raise SettingsError(msg)
    idx = np.searchsorted(mins, np.where(nan, 0.0, d), side="right") - 1
    out = np.where(idx >= 0, prices[np.clip(idx, 0, None)], 0.0)
    if nan.any():
        out = np.where(nan, float(fallback), out)  # type: ignore[arg-type]
    return out


def harvest_cost_per_stand(
    n: int,
    econ: Economics,
    harvest_cost_per_m3: object | None = None,
    cost_class: object | None = None,
) -> np.ndarray:
    """Harvest cost per m3 of each stand.

    Precedence: a per-stand override (e.g. from terrain; NaN entries fall through), then
    ``economics.harvest_cost_by_class[cost_class]``, then ``economics.harvest_cost_per_m3``.
    Cost classes are ignored when ``harvest_cost_by_class`` is empty; empty/None classes use
    the default cost.

    Raises
    ------
    InputError
        A stand's cost class is not in ``economics.harvest_cost_by_class``.
    """
    out = np.full(n, float(econ.harvest_cost_per_m3))
    if cost_class is not None and econ.harvest_cost_by_class:
        cls = pd.Series(np.asarray(cost_class, dtype=object)).astype(object)
        given = cls.notna() & (cls.astype(str).str.strip() != "")
        names = cls.astype(str).str.strip()
        table = {str(k).strip(): float(v) for k, v in econ.harvest_cost_by_class.items()}
        unknown = sorted(set(names[given]) - set(table))
        if unknown:
            msg = (
                f"harvest cost class {', '.join(repr(u) for u in unknown)} is not in "
                f"economics.harvest_cost_by_class; valid classes: {', '.join(sorted(table))}"
            )
            raise InputError(msg)
        mapped = names.map(table).to_numpy(dtype=float)
        out = np.where(given.to_numpy(), mapped, out)
    if harvest_cost_per_m3 is not None:
        h = np.broadcast_to(np.asarray(harvest_cost_per_m3, dtype=float), (n,))
        out = np.where(np.isnan(h), out, h)
    return out


# ---------------------------------------------------------------------------------------
# rotation rules
# ---------------------------------------------------------------------------------------
def lev(
    values: object,
    ages: object,
    rate: float,
    regeneration_cost: object = 0.0,
    annual_cost: float = 0.0,
) -> np.ndarray:
    """Faustmann land expectation value of bare land, vectorised with broadcasting.

    ``LEV(T) = (S(T) - C (1 + r)**T) / ((1 + r)**T - 1) - a / r``: the present value of an
    infinite series of identical rotations of length ``T``, each starting with the
    regeneration cost ``C`` and ending with the net harvest value ``S(T)``, minus an annual
    cost ``a`` paid forever (Faustmann 1849).

    Parameters
    ----------
    values
        Net harvest values ``S(T)`` per ha.
    ages
        Rotation lengths ``T`` (> 0).
    rate
        Discount rate ``r > 0``.
    regeneration_cost, annual_cost
        ``C`` and ``a`` per ha.

    >>> round(float(lev(1000.0, 50, 0.03)), 2)
    295.52
    """
    if not rate > 0:
        msg = f"economics.discount_rate = {rate!r}: the land expectation value needs a rate > 0"
        raise SettingsError(msg)
    s = np.asarray(values, dtype=float)
    g = np.power(1.0 + rate, np.asarray(ages, dtype=float))
    c = np.asarray(regeneration_cost, dtype=float)
    return (s - c * g) / (g - 1.0) - annual_cost / rate


def _first_argmax(x: np.ndarray) -> np.ndarray:
    x = np.where(np.isnan(x), -np.inf, x)
    return np.argmax(x, axis=-1)


def fisher_rotation(values: object, ages: object, rate: float) -> float:
    """Single-rotation age (Fisher 1930; Wicksell 1901) on a grid of ages.

    Maximises ``S(T) (1 + r)**-T`` (a regeneration cost paid at ``t = 0`` does not move the
    maximum): the age where the value growth rate ``S(T+1)/S(T) - 1`` falls to ``r``. NaN
    when the net value is never positive.
    """
    s = np.asarray(values, dtype=float)
    a = np.asarray(ages, dtype=float)
    if not np.nanmax(s) > 0:
        return math.nan
    return float(a[_first_argmax(s * discount_factor(a, rate))])


def faustmann_rotation(
    values: object,
    ages: object,
    rate: float,
    regeneration_cost: float = 0.0,
    annual_cost: float = 0.0,
) -> tuple[float, float]:
    """Faustmann rotation on a grid: the age maximising :func:`lev`, and that LEV.

    At ``r = 0`` the LEV is unbounded; the rotation returned is then the limit of the rule
    as ``r -> 0``, the maximum of ``(S(T) - C) / T`` (Samuelson 1976), with LEV NaN.
    The age is NaN when the net value is never positive.
    """
    s = np.asarray(values, dtype=float)
    a = np.asarray(ages, dtype=float)
    if not np.nanmax(s) > 0:
        if rate <= 0:
            return math.nan, math.nan
        return math.nan, float(np.nanmax(lev(s, a, rate, regeneration_cost, annual_cost)))
    if rate <= 0:
        return float(a[_first_argmax((s - regeneration_cost) / a)]), math.nan
    curve = lev(s, a, rate, regeneration_cost, annual_cost)
    i = _first_argmax(curve)
    return float(a[i]), float(curve[i])


def value_mai_rotation(values: object, ages: object, regeneration_cost: float = 0.0) -> float:
    """Age of the highest mean annual net value ``(S(T) - C) / T`` (forest-rent rule).

    This maximises the sustained undiscounted net revenue per year of a regulated forest
    (the forest-rent rotation, see Newman 2002). NaN when the net value is never positive.
    """
    s = np.asarray(values, dtype=float)
    a = np.asarray(ages, dtype=float)
    if not np.nanmax(s) > 0:
        return math.nan
    return float(a[_first_argmax((s - regeneration_cost) / a)])


@dataclass(frozen=True)
class RotationCurves:
    """Per-age curves of one stratum on a 1-year grid, and its rotation ages.

    Attributes
    ----------
    stratum
        Label.
    ages
        (G,) ages ``1 .. max_age``.
    volume, mai, cai
        m3/ha and m3/ha/yr.
    diameter, price
        Mean diameter (cm, NaN if unknown) and stumpage price per m3.
    net_value
        ``S(t)`` per ha (price minus harvest cost, times volume).
    value_growth
        ``S(t+1)/S(t) - 1``, the return on waiting one more year (NaN where undefined).
    faustmann_threshold
        ``r (1 + LEV0/S(t))``: waiting pays while ``value_growth`` exceeds it (LEV0 is the
        maximum LEV without annual costs); NaN at ``r = 0``.
    lev
        LEV per ha if the rotation were ``t`` (NaN at ``r = 0``).
    """

    stratum: str
    discount_rate: float
    ages: np.ndarray
    volume: np.ndarray
    mai: np.ndarray
    cai: np.ndarray
    diameter: np.ndarray
    price: np.ndarray
    net_value: np.ndarray
    value_growth: np.ndarray
    faustmann_threshold: np.ndarray
    lev: np.ndarray
    mai_max_age: float
    mai_max_m3_ha_yr: float
    mai_max_age_exact: float
    value_mai_max_age: float
    fisher_age: float
    faustmann_age: float
    lev_per_ha: float


def rotation_curves(
    growth: GrowthModel,
    stratum: str,
    settings: Settings,
    max_age: int = DEFAULT_MAX_AGE,
    harvest_cost_per_m3: float | None = None,
) -> RotationCurves:
    """Growth and value curves of one stratum and its rotation ages (1-year grid).

    Parameters
    ----------
    growth
        Growth model holding ``stratum``.
    stratum
        Label.
    settings
        Settings (``economics`` is used).
    max_age
        Last age of the grid.
    harvest_cost_per_m3
        Harvest cost; default ``economics.harvest_cost_per_m3``.
    """
    econ = settings.economics
    r = econ.discount_rate
    ages = np.arange(1, int(max_age) + 1, dtype=float)
    lab = np.full(ages.shape, stratum, dtype=object)
    vol = growth.volume(lab, ages)
    dia = growth.diameter(lab, ages)
    price = stumpage_price(dia, econ)
    hc = econ.harvest_cost_per_m3 if harvest_cost_per_m3 is None else harvest_cost_per_m3
    s = (price - hc) * vol
    m = mai(vol, ages)
    vol0 = np.concatenate([[0.0], vol])
    cai = np.diff(vol0)
    with np.errstate(divide="ignore", invalid="ignore"):
        growth_rate = np.where(s[:-1] > 0, s[1:] / s[:-1] - 1.0, np.nan)
    vg = np.concatenate([growth_rate, [np.nan]])
    C, a = econ.regeneration_cost_per_ha, econ.annual_cost_per_ha
    i_mai = int(_first_argmax(m))
    cr = growth.volume_cr.get(stratum)
    exact = cr_mai_culmination_age(cr.k, cr.c) if cr is not None else math.nan
    fisher = fisher_rotation(s, ages, r)
    faus_age, lev_max = faustmann_rotation(s, ages, r, C, a)
    if r > 0:
        lev_curve = lev(s, ages, r, C, a)
        lev0 = lev_max + a / r if np.isfinite(lev_max) else math.nan
        with np.errstate(divide="ignore", invalid="ignore"):
            thr = np.where(s > 0, r * (1.0 + lev0 / s), np.nan)
    else:
        lev_curve = np.full(ages.shape, np.nan)
        thr = np.full(ages.shape, np.nan)
    return RotationCurves(
        stratum=stratum,
        discount_rate=r,
        ages=ages,
        volume=vol,
        mai=m,
        cai=cai,
        diameter=dia,
        price=price,
        net_value=s,
        value_growth=vg,
        faustmann_threshold=thr,
        lev=lev_curve,
        mai_max_age=float(ages[i_mai]),
        mai_max_m3_ha_yr=float(m[i_mai]),
        mai_max_age_exact=exact,
        value_mai_max_age=value_mai_rotation(s, ages, C),
        fisher_age=fisher,
        faustmann_age=faus_age,
        lev_per_ha=lev_max,
    )


ROTATION_COLUMNS = [
    "stratum",
    "mai_max_age",
    "mai_max_m3_ha_yr",
    "mai_max_age_exact",
    "value_mai_max_age",
    "fisher_age",
    "faustmann_age",
    "lev_per_ha",
]


def rotation_table(
    growth: GrowthModel,
    strata: Sequence[str],
    settings: Settings,
    max_age: int = DEFAULT_MAX_AGE,
) -> pd.DataFrame:
    """One row per stratum: key columns, ``stratum`` and the rotation ages of every rule.

    Columns: the yield-key fields, ``stratum``, ``mai_max_age``, ``mai_max_m3_ha_yr``,
    ``mai_max_age_exact`` (Chapman-Richards strata only, else NaN), ``value_mai_max_age``,
    ``fisher_age``, ``faustmann_age``, ``lev_per_ha``. Ages are on a 1-year grid
    ``1 .. max_age``.
    """
    # A key field named "stratum" is the label column itself (single key), so not repeated.
    key_cols = [k for k in growth.key_fields if k != "stratum"]
    rows = []
    for s in strata:
        rc = rotation_curves(growth, s, settings, max_age)
        parts = s.split("/")
        if len(parts) == len(growth.key_fields):
            keys = dict(zip(growth.key_fields, parts, strict=True))
        else:  # a parametric stratum named in settings without one value per key
            keys = dict.fromkeys(growth.key_fields, "")
        row = {k: keys[k] for k in key_cols}
        row.update({c: getattr(rc, c) for c in ROTATION_COLUMNS})
        rows.append(row)
    return pd.DataFrame(rows, columns=[*key_cols, *ROTATION_COLUMNS])


# ---------------------------------------------------------------------------------------
# per-period harvest values for the scheduler
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class HarvestValues:
    """Per-hectare values of harvesting each stand in each period.

    Shapes: ``n`` stands, ``P`` periods. Column ``p - 1`` is period ``p``.

    Attributes
    ----------
    harvest_age_yr, volume_m3_ha, diameter_cm, price_per_m3
        (n, P) at mid-period harvest.
    harvest_cost_per_m3
        (n,) harvest cost used.
    gross_value_per_ha
        (n, P) volume x price, undiscounted.
    net_value_per_ha
        (n, P) gross - harvest cost x volume - regeneration cost.
    land_value_per_ha
        (n,) undiscounted value of the freshly regenerated land added at harvest when
        ``economics.include_land_value`` (``LEV0 + C``), else zeros.
    npv_per_ha
        (n, P) ``(net + land) (1 + r)**-t`` at mid-period ``t``.
    times_yr, discount
        (P,) mid-period times and discount factors.
    annual_cost_pv_per_ha
        Present value of the annual cost over the horizon (end-of-year payments); the same
        for every choice, so not in ``npv_per_ha``.
    ending_age_yr, ending_volume_m3_ha, ending_value_per_ha
        (n, P + 1) at the end of the horizon; column 0 = not harvested, column ``p`` =
        harvested in period ``p``. Value = (price - harvest cost) x volume, undiscounted.
    ending_discount
        ``(1 + r)**-(P L)``.
    """

    harvest_age_yr: np.ndarray
    volume_m3_ha: np.ndarray
    diameter_cm: np.ndarray
    price_per_m3: np.ndarray
    harvest_cost_per_m3: np.ndarray
    gross_value_per_ha: np.ndarray
    net_value_per_ha: np.ndarray
    land_value_per_ha: np.ndarray
    npv_per_ha: np.ndarray
    times_yr: np.ndarray
    discount: np.ndarray
    annual_cost_pv_per_ha: float
    ending_age_yr: np.ndarray
    ending_volume_m3_ha: np.ndarray
    ending_value_per_ha: np.ndarray
    ending_discount: float


def _land_values(
    strata: np.ndarray, hc: np.ndarray, growth: GrowthModel, econ: Economics, max_age: int
) -> np.ndarray:
    """``max_T LEV(T) + C`` without annual costs, per stand (grid per stratum and cost)."""
    r = econ.discount_rate
    if not r > 0:
        msg = "economics.include_land_value needs economics.discount_rate > 0"
        raise SettingsError(msg)
    C = econ.regeneration_cost_per_ha
    ages = np.arange(1, max_age + 1, dtype=float)
    out = np.zeros(len(strata))
    for s in pd.unique(strata):
        idx = np.flatnonzero(strata == s)
        lab = np.full(ages.shape, s, dtype=object)
        vol = growth.volume(lab, ages)
        price = stumpage_price(growth.diameter(lab, ages), econ)
        costs, inv = np.unique(hc[idx], return_inverse=True)
        sv = (price[None, :] - costs[:, None]) * vol[None, :]
        best = lev(sv, ages[None, :], r, C).max(axis=1)
        out[idx] = best[inv] + C
    return out


def harvest_values(
    strata: np.ndarray,
    age_start_yr: np.ndarray,
    growth: GrowthModel,
    settings: Settings,
    harvest_cost_per_m3: np.ndarray | None = None,
    cost_class: np.ndarray | None = None,
    max_age: int = DEFAULT_MAX_AGE,
) -> HarvestValues:
    """Volumes and values of harvesting each stand in each period (vectorised).

    Parameters
    ----------
    strata
        (n,) stratum labels.
    age_start_yr
        (n,) ages at the start of the plan.
    growth
        Growth model.
    settings
        ``horizon`` and ``economics`` are used.
    harvest_cost_per_m3
        Optional (n,) per-stand harvest cost (e.g. from terrain); NaN entries fall back.
    cost_class
        Optional (n,) cost class per stand, looked up in ``economics.harvest_cost_by_class``.
    max_age
        Grid end for the land value (Faustmann) search.

    Returns
    -------
    HarvestValues
    """
    econ = settings.economics
    P, L = settings.horizon.periods, settings.horizon.period_length_yr
    r = econ.discount_rate
    strata = np.asarray(strata, dtype=object)
    a0 = np.asarray(age_start_yr, dtype=float)
    n = len(strata)
    t = mid_period_times(P, L)
    age = a0[:, None] + t[None, :]
    vol = growth.volume(strata, age)
    dia = growth.diameter(strata, age)
    price = stumpage_price(dia, econ)
    hc = harvest_cost_per_stand(n, econ, harvest_cost_per_m3, cost_class)
    gross = vol * price
    net = gross.copy()
    if np.any(hc != 0):
        net = net - hc[:, None] * vol
    if econ.regeneration_cost_per_ha != 0:
        net = net - econ.regeneration_cost_per_ha
    disc = discount_factor(t, r)
    if econ.include_land_value:
        land = _land_values(strata, hc, growth, econ, max_age)
        npv_ = (net + land[:, None]) * disc[None, :]
    else:
        land = np.zeros(n)
        npv_ = net * disc[None, :]
    years = np.arange(1, math.floor(P * L) + 1, dtype=float)
    annual_pv = float(econ.annual_cost_per_ha * discount_factor(years, r).sum())
    end_age = np.empty((n, P + 1))
    end_age[:, 0] = a0 + P * L
    end_age[:, 1:] = (P * L - t)[None, :]
    end_vol = growth.volume(strata, end_age)
    end_price = stumpage_price(growth.diameter(strata, end_age), econ)
    end_val = (end_price - hc[:, None]) * end_vol
    return HarvestValues(
        harvest_age_yr=age,
        volume_m3_ha=vol,
        diameter_cm=dia,
        price_per_m3=price,
        harvest_cost_per_m3=hc,
        gross_value_per_ha=gross,
        net_value_per_ha=net,
        land_value_per_ha=land,
        npv_per_ha=npv_,
        times_yr=t,
        discount=disc,
        annual_cost_pv_per_ha=annual_pv,
        ending_age_yr=end_age,
        ending_volume_m3_ha=end_vol,
        ending_value_per_ha=end_val,
        ending_discount=float(discount_factor(P * L, r)),
    )
