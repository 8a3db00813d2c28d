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
* After a clear-cut the new crop is age 0 ``d`` years later (``regeneration.delay_yr``), so a
  rotation whose crop is cut at age ``T`` lasts ``T + d`` years.
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
    "SustainedYield",
    "discount_factor",
    "ending_value_per_ha",
    "faustmann_rotation",
    "fisher_rotation",
    "harvest_cost_per_stand",
    "harvest_values",
    "land_expectation_values",
    "lev",
    "long_term_sustained_yield",
    "mid_period_times",
    "net_value_per_ha",
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
    npv_per_ha
        (n, P) ``net (1 + r)**-t`` at mid-period ``t``.
    times_yr, discount
        (P,) mid-period times and discount factors.
    annual_cost_pv_per_ha
        Present value of the annual cost over the horizon (end-of-year payments); the same
        for every choice, so not in ``npv_per_ha``.
    ending_age_yr, ending_volume_m3_ha, ending_value_per_ha
        (n, P + 1) at the end of the horizon; column 0 = not harvested, column ``p`` =
        harvested in period ``p`` (same stratum, no regeneration delay: the single-harvest
        view). Value = (price - harvest cost) x volume, undiscounted (the "standing" ending
        value; :mod:`spatialplan.prescriptions` computes the one the settings ask for).
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
    npv_per_ha: np.ndarray
    times_yr: np.ndarray
    discount: np.ndarray
    annual_cost_pv_per_ha: float
    ending_age_yr: np.ndarray
    ending_volume_m3_ha: np.ndarray
    ending_value_per_ha: np.ndarray
    ending_discount: float


def _timber(
    strata: np.ndarray, ages: np.ndarray, growth: GrowthModel, econ: Economics, hc: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Volume, diameter, price, gross value and net stumpage ``(price - h) V`` per ha.

    ``strata`` and ``hc`` are (n,) and broadcast over the trailing axes of ``ages``. One
    code path for :func:`harvest_values` and :func:`net_value_per_ha`, so both give the
    same numbers to the last bit.
    """
    vol = growth.volume(strata, ages)
    dia = growth.diameter(strata, ages)
    price = stumpage_price(dia, econ)
    gross = vol * price
    net = gross.copy()
    if np.any(hc != 0):
        net = net - hc.reshape(hc.shape + (1,) * (vol.ndim - hc.ndim)) * vol
    return vol, dia, price, gross, net


def net_value_per_ha(
    strata: object,
    ages_yr: object,
    growth: GrowthModel,
    econ: Economics,
    harvest_cost_per_m3: object | None = None,
    *,
    regeneration_cost: bool = True,
) -> np.ndarray:
    """Net value per ha of clear-cutting at arbitrary (stratum, age) pairs, undiscounted.

    ``(price(d(a)) - h) V(a) - C``: the price by mean diameter, the harvest cost per m3 and
    the regeneration cost ``C`` paid at the harvest, exactly as in :func:`harvest_values`.

    Parameters
    ----------
    strata
        (n,) stratum labels.
    ages_yr
        (n,) or (n, m) ages; negative ages (not yet regenerated) count as 0.
    growth
        Growth model.
    econ
        ``[economics]`` settings.
    harvest_cost_per_m3
        (n,) harvest cost per m3 of each row (e.g. from :func:`harvest_cost_per_stand`);
        default ``economics.harvest_cost_per_m3``.
    regeneration_cost
        Subtract ``C``; ``False`` gives the net stumpage value ``S(a)`` of the trees alone.

    Returns
    -------
    numpy.ndarray
        Same shape as ``ages_yr``.
    """
    lab = np.asarray(strata, dtype=object)
    ages = np.maximum(np.asarray(ages_yr, dtype=float), 0.0)
    hc = (
        np.full(lab.shape, float(econ.harvest_cost_per_m3))
        if harvest_cost_per_m3 is None
        else np.broadcast_to(np.asarray(harvest_cost_per_m3, dtype=float), lab.shape)
    )
    if ages.size == 0:
        return np.zeros(ages.shape)
    net = _timber(lab, ages, growth, econ, hc)[4]
    if regeneration_cost and econ.regeneration_cost_per_ha != 0:
        net = net - econ.regeneration_cost_per_ha
    return net


def _unique_rows(*cols: np.ndarray) -> tuple[list[np.ndarray], np.ndarray]:
    """Unique rows of aligned 1-D columns and the inverse (rows in order of first sight).

    Each column is factorised and the codes are combined pairwise (mixed radix, then
    factorised again, so the key never overflows): much faster than ``np.unique(axis=0)``.
    """
    key = np.zeros(len(cols[0]), dtype=np.int64)
    for c in cols:
        codes, uniq = pd.factorize(c, use_na_sentinel=False)
        key = pd.factorize(key * len(uniq) + codes, use_na_sentinel=False)[0]
    first = np.unique(key, return_index=True)[1]  # key codes 0, 1, ... in order of sight
    return [c[first] for c in cols], key.astype(np.int64)


def land_expectation_values(
    strata: object,
    growth: GrowthModel,
    econ: Economics,
    harvest_cost_per_m3: object | None = None,
    delay_yr: float = 0.0,
    max_age: int = DEFAULT_MAX_AGE,
) -> tuple[np.ndarray, np.ndarray]:
    """Faustmann LEV of bare land and its rotation age, per row (stratum and harvest cost).

    The maximum over crop ages ``T = 1 .. max_age`` of :func:`lev` with rotation length
    ``T + delay_yr`` (the land lies bare ``delay_yr`` years after each clear-cut), the
    regeneration cost ``C`` at the start of every rotation and no annual cost (it is paid
    whatever the plan). The grid is evaluated once per distinct (stratum, cost).

    Parameters
    ----------
    strata
        (n,) stratum labels.
    growth, econ
        Growth model and ``[economics]`` settings (``discount_rate > 0``).
    harvest_cost_per_m3
        (n,) harvest cost per row; default ``economics.harvest_cost_per_m3``.
    delay_yr
        Regeneration delay ``d``.
    max_age
        Last crop age of the grid.

    Returns
    -------
    lev_per_ha
        (n,) ``max_T LEV`` (bare land, before paying ``C``).
    rotation_age_yr
        (n,) crop age ``T`` at the maximum (first on ties), NaN where the net value is never
        positive.

    Raises
    ------
    SettingsError
        ``economics.discount_rate`` is 0 (the LEV is unbounded).
    """
    r = econ.discount_rate
    if not r > 0:
        msg = (
            f"economics.discount_rate = {r!r}: the Faustmann land expectation value needs a "
            "rate > 0"
        )
        raise SettingsError(msg)
    lab = np.asarray(strata, dtype=object).reshape(-1)
    hc = (
        np.full(lab.shape, float(econ.harvest_cost_per_m3))
        if harvest_cost_per_m3 is None
        else np.broadcast_to(np.asarray(harvest_cost_per_m3, dtype=float), lab.shape)
    )
    (u_lab, u_hc), inv = _unique_rows(lab, np.asarray(hc, dtype=float))
    ages = np.arange(1, int(max_age) + 1, dtype=float)
    sv = net_value_per_ha(
        u_lab,
        np.broadcast_to(ages, (len(u_lab), len(ages))),
        growth,
        econ,
        u_hc,
        regeneration_cost=False,
    )
    u_lev, u_age = np.empty(len(u_lab)), np.empty(len(u_lab))
    for k in range(len(u_lab)):  # a few (stratum, cost) pairs: the tested 1-D rule
        length, u_lev[k] = faustmann_rotation(
            sv[k], ages + float(delay_yr), r, econ.regeneration_cost_per_ha
        )
        # back to the whole-year grid (NaN: the net value is never positive)
        u_age[k] = round(length - float(delay_yr)) if math.isfinite(length) else math.nan
    return u_lev[inv], u_age[inv]


#: Rows of the (rows x future ages) grid evaluated at once by :func:`ending_value_per_ha`.
_CHUNK_ROWS = 512


def ending_value_per_ha(
    strata: object,
    age_end_yr: object,
    growth: GrowthModel,
    settings: Settings,
    harvest_cost_per_m3: object | None = None,
    next_strata: object | None = None,
    max_age: int = DEFAULT_MAX_AGE,
) -> np.ndarray:
    """Value per ha of the forest left at the end of the horizon, at the end (undiscounted).

    By ``economics.ending_value``:

    * ``"faustmann"``: the best future: clear-cut the standing crop at some age
      ``a >= e`` (``e`` its age at the end) and own the land after it:
      ``max_a (S(a) + LEV') (1 + r)**-(a - e)``, with ``S`` the net stumpage value
      (regeneration cost not subtracted) and ``LEV'`` the land expectation value of the
      stratum that regenerates after that cut (:func:`land_expectation_values`, which pays
      the regeneration cost ``C`` at its start). Ages ``a = max(e, 0) + j``, ``j = 0 ..
      max_age`` (whole years from the end); a negative ``e`` means the crop starts ``-e``
      years after the end. For land cut just before the end (``e = -delay``) this is
      ``LEV' + C``: the regeneration cost was already charged at that cut.
    * ``"standing"``: the net stumpage value of the standing trees, ``S(max(e, 0))``.
    * ``"none"``: 0.

    Parameters
    ----------
    strata
        (n,) stratum of the crop standing at the end.
    age_end_yr
        (n,) its age at the end.
    growth, settings
        Growth model; settings (``economics``, ``regeneration.delay_yr``).
    harvest_cost_per_m3
        (n,) harvest cost per row; default ``economics.harvest_cost_per_m3``.
    next_strata
        (n,) stratum regenerating after the next cut; default ``strata``.
    max_age
        Grid length in years.

    Returns
    -------
    numpy.ndarray
        (n,) value per ha at the end; discount it with ``(1 + r)**-(P L)``.

    Raises
    ------
    SettingsError
        ``"faustmann"`` with ``economics.discount_rate`` 0.
    """
    econ = settings.economics
    lab = np.asarray(strata, dtype=object).reshape(-1)
    age = np.asarray(age_end_yr, dtype=float).reshape(-1)
    hc = (
        np.full(lab.shape, float(econ.harvest_cost_per_m3))
        if harvest_cost_per_m3 is None
        else np.broadcast_to(np.asarray(harvest_cost_per_m3, dtype=float), lab.shape)
    )
    mode = econ.ending_value
    if mode == "none":
        return np.zeros(len(lab))
    if mode == "standing":
        return net_value_per_ha(lab, age, growth, econ, hc, regeneration_cost=False)
    r = econ.discount_rate
    if not r > 0:
        msg = (
            f'economics.ending_value = "faustmann" needs economics.discount_rate > 0 (got {r!r}:'
            " the land expectation value is unbounded); set economics.ending_value = "
            '"standing" or "none" (flag --ending-value)'
        )
        raise SettingsError(msg)
    nxt = lab if next_strata is None else np.asarray(next_strata, dtype=object).reshape(-1)
    (u_lab, u_nxt, u_hc, u_age), inv = _unique_rows(lab, nxt, np.asarray(hc, float), age)
    delay = settings.regeneration.delay_yr
    land = land_expectation_values(u_nxt, growth, econ, u_hc, delay, max_age)[0]
    j = np.arange(int(max_age) + 1, dtype=float)
    out = np.empty(len(u_lab))
    for lo in range(0, len(u_lab), _CHUNK_ROWS):
        sl = slice(lo, lo + _CHUNK_ROWS)
        start = np.maximum(u_age[sl], 0.0)
        wait = start - u_age[sl]  # years from the end to age max(e, 0)
        sv = net_value_per_ha(
            u_lab[sl],
            start[:, None] + j[None, :],
            growth,
            econ,
            u_hc[sl],
            regeneration_cost=False,
        )
        disc = discount_factor(wait[:, None] + j[None, :], r)
        out[sl] = ((sv + land[sl, None]) * disc).max(axis=1)
    return out[inv]


def harvest_values(
    strata: np.ndarray,
    age_start_yr: np.ndarray,
    growth: GrowthModel,
    settings: Settings,
    harvest_cost_per_m3: np.ndarray | None = None,
    cost_class: np.ndarray | None = None,
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
    hc = harvest_cost_per_stand(n, econ, harvest_cost_per_m3, cost_class)
    vol, dia, price, gross, net = _timber(strata, age, growth, econ, hc)
    if econ.regeneration_cost_per_ha != 0:
        net = net - econ.regeneration_cost_per_ha
    disc = discount_factor(t, r)
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
        npv_per_ha=npv_,
        times_yr=t,
        discount=disc,
        annual_cost_pv_per_ha=annual_pv,
        ending_age_yr=end_age,
        ending_volume_m3_ha=end_vol,
        ending_value_per_ha=end_val,
        ending_discount=float(discount_factor(P * L, r)),
    )


# ---------------------------------------------------------------------------------------
# long-term sustained yield
# ---------------------------------------------------------------------------------------
LTSY_COLUMNS = [
    "stratum",
    "harvest_cost_per_m3",
    "net_area_ha",
    "mai_max_age",
    "mai_max_m3_ha_yr",
    "faustmann_age",
    "faustmann_mai_m3_ha_yr",
    "ltsy_mai_max_m3_yr",
    "ltsy_faustmann_m3_yr",
]


@dataclass(frozen=True)
class SustainedYield:
    """Long-term sustained yield (LTSY) of a forest, m3 per year.

    Attributes
    ----------
    mai_max_m3_yr
        Sum over strata of net area x the highest mean annual increment (its culmination):
        the most volume the land can yield every year once every stand is regulated.
    faustmann_m3_yr
        The same at the Faustmann rotation of each stratum (the economic rotation).
    table
        One row per (stratum, harvest cost): ``stratum``, ``harvest_cost_per_m3``,
        ``net_area_ha``, ``mai_max_age``, ``mai_max_m3_ha_yr``, ``faustmann_age``,
        ``faustmann_mai_m3_ha_yr``, ``ltsy_mai_max_m3_yr``, ``ltsy_faustmann_m3_yr``.
    """

    mai_max_m3_yr: float
    faustmann_m3_yr: float
    table: pd.DataFrame


def long_term_sustained_yield(
    strata: object,
    net_area_ha: object,
    growth: GrowthModel,
    settings: Settings,
    harvest_cost_per_m3: object | None = None,
    max_age: int = DEFAULT_MAX_AGE,
) -> SustainedYield:
    """LTSY as the trade computes it: sum of net area x MAI, at culmination and at Faustmann.

    A regulated forest cut at crop age ``T`` yields ``V(T) / (T + d)`` m3 per ha and year
    (``d`` = ``regeneration.delay_yr``; with ``d = 0`` this is the MAI ``V(T)/T``). The
    first total takes each stratum's highest value of it (MAI culmination), the second its
    value at the Faustmann rotation (:func:`land_expectation_values`; NaN rotation, hence
    0 m3, where the net value is never positive). Ages on the 1-year grid ``1 .. max_age``,
    first maximum on ties, as in :func:`rotation_table`.

    Parameters
    ----------
    strata
        (n,) stratum each stand is managed as in the long run: the regenerated stratum
        (:func:`spatialplan.prescriptions.regenerated_strata`) for a planner's LTSY.
    net_area_ha
        (n,) harvestable area; give reserves and inoperable stands 0.
    growth, settings
        Growth model and settings (``economics``, ``regeneration.delay_yr``).
    harvest_cost_per_m3
        (n,) harvest cost per stand; default ``economics.harvest_cost_per_m3``.
    max_age
        Last age of the grid.

    Returns
    -------
    SustainedYield
        Needs ``economics.discount_rate > 0`` for the Faustmann rotation.
    """
    econ = settings.economics
    lab = np.asarray(strata, dtype=object).reshape(-1)
    area = np.broadcast_to(np.asarray(net_area_ha, dtype=float), lab.shape)
    hc = (
        np.full(lab.shape, float(econ.harvest_cost_per_m3))
        if harvest_cost_per_m3 is None
        else np.broadcast_to(np.asarray(harvest_cost_per_m3, dtype=float), lab.shape)
    )
    d = float(settings.regeneration.delay_yr)
    if not len(lab):
        return SustainedYield(0.0, 0.0, pd.DataFrame(columns=LTSY_COLUMNS))
    (u_lab, u_hc), inv = _unique_rows(lab, np.asarray(hc, dtype=float))
    u_area = np.bincount(inv, weights=area, minlength=len(u_lab))
    ages = np.arange(1, int(max_age) + 1, dtype=float)
    vol = growth.volume(u_lab, np.broadcast_to(ages, (len(u_lab), len(ages))))
    sy = vol / (ages + d)[None, :]
    i_max = _first_argmax(sy) if len(u_lab) else np.zeros(0, dtype=np.int64)
    rows = np.arange(len(u_lab))
    faus_age = land_expectation_values(u_lab, growth, econ, u_hc, d, max_age)[1]
    ok = np.isfinite(faus_age)
    i_f = np.where(ok, np.nan_to_num(faus_age, nan=1.0), 1.0).astype(np.int64) - 1
    faus_sy = np.where(ok, sy[rows, i_f], 0.0)
    table = pd.DataFrame(
        {  # in the order of LTSY_COLUMNS
            "stratum": u_lab,
            "harvest_cost_per_m3": u_hc,
            "net_area_ha": u_area,
            "mai_max_age": ages[i_max],
            "mai_max_m3_ha_yr": sy[rows, i_max],
            "faustmann_age": faus_age,
            "faustmann_mai_m3_ha_yr": faus_sy,
        }
    )
    table["ltsy_mai_max_m3_yr"] = table["net_area_ha"] * table["mai_max_m3_ha_yr"]
    table["ltsy_faustmann_m3_yr"] = table["net_area_ha"] * table["faustmann_mai_m3_ha_yr"]
    table = table.sort_values(["stratum", "harvest_cost_per_m3"], ignore_index=True)
    return SustainedYield(
        mai_max_m3_yr=float(table["ltsy_mai_max_m3_yr"].sum()),
        faustmann_m3_yr=float(table["ltsy_faustmann_m3_yr"].sum()),
        table=table,
    )
