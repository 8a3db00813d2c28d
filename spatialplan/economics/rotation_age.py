"""Rotation rules and land value: Faustmann LEV, Fisher, Faustmann and value-MAI rotations."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from spatialplan.economics._common import DEFAULT_MAX_AGE, first_argmax
from spatialplan.economics.money import discount_factor, stumpage_price
from spatialplan.errors import SettingsError
from spatialplan.growth import GrowthModel, cr_mai_culmination_age, mai
from spatialplan.settings import Settings

__all__ = [
    "ROTATION_COLUMNS",
    "RotationCurves",
    "faustmann_rotation",
    "fisher_rotation",
    "lev",
    "rotation_curves",
    "rotation_table",
    "value_mai_rotation",
]


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
    return float(a[first_argmax(s * discount_factor(a, rate))])


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
        return float(a[first_argmax((s - regeneration_cost) / a)]), math.nan
    curve = lev(s, a, rate, regeneration_cost, annual_cost)
    i = first_argmax(curve)
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
    return float(a[first_argmax((s - regeneration_cost) / a)])


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
    i_mai = int(first_argmax(m))
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
