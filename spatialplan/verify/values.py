"""Verify's own volume and value arithmetic for each harvest.

Written apart from :mod:`spatialplan.economics` on purpose, from the documented
formulas (``docs/methods.md``, Economics). For a harvest at mid-period ``t = (p - 0.5) L``
of a crop of stratum ``s`` and age ``a`` on ``A`` ha of net area, with harvest cost ``h``
per m3, regeneration cost ``C`` per ha and discount rate ``r``:

* volume ``V(a) A`` (m3);
* price per m3 by the diameter class of the crop (the class with the highest
  ``min_diameter_cm`` not above the mean diameter; 0 below every class; the single
  ``economics.price_per_m3`` when there is no class list or no diameter);
* harvest cost per m3: the slope class of the stand's ``harvest_system`` when that class
  has a cost, else the stand's cost class, else ``economics.harvest_cost_per_m3``;
* value ``((price - h) V(a) - C + land) (1 + r)^-t A``, where ``land`` is 0 unless
  ``economics.include_land_value``: then the best Faustmann land expectation value of the
  regenerated stratum over rotations of 1 .. 300 years (no annual cost), plus ``C``
  (Faustmann 1849).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from spatialplan.errors import InputError
from spatialplan.settings import Economics, Settings
from spatialplan.verify.yields import Curves, key_text

__all__ = [
    "LAND_VALUE_MAX_AGE_YR",
    "discount",
    "ending_gain_per_ha",
    "harvest_cost",
    "harvest_value_per_ha",
    "land_value",
    "stumpage",
]

#: rotations searched for the land value, 1 .. this many years (docs/methods.md)
LAND_VALUE_MAX_AGE_YR = 300


def discount(t_yr: np.ndarray | float, rate: float) -> np.ndarray:
    """Annual-compounding discount factor ``(1 + r)^-t``.

    >>> round(float(discount(10.0, 0.05)), 6)  # 1 / 1.05**10, compound-interest tables
    0.613913
    """
    return np.power(1.0 + rate, -np.asarray(t_yr, dtype=float))


def stumpage(diameter_cm: np.ndarray, econ: Economics) -> np.ndarray | None:
    """Price per m3 by diameter class; ``None`` when the settings give no price at all.

    NaN where a diameter is unknown and there is no single price to fall back on.

    >>> from spatialplan.settings import PriceClass
    >>> e = Economics(price_schedule=(PriceClass("saw", 30, 80.0), PriceClass("pulp", 10, 20.0)))
    >>> stumpage(np.array([5.0, 10.0, 29.9, 30.0, np.nan]), e).tolist()
    [0.0, 20.0, 20.0, 80.0, nan]
    """
    d = np.asarray(diameter_cm, dtype=float)
    single = np.nan if econ.price_per_m3 is None else float(econ.price_per_m3)
    if not econ.price_schedule:
        return None if econ.price_per_m3 is None else np.full(d.shape, single)
    out = np.zeros(d.shape)
    for cls in sorted(econ.price_schedule, key=lambda c: c.min_diameter_cm):
        out = np.where(d >= cls.min_diameter_cm, cls.price_per_m3, out)
    return np.where(np.isnan(d), single, out)


def harvest_cost(frame: pd.DataFrame, settings: Settings, cost_column: str | None) -> np.ndarray:
    """Harvest cost per m3 of every stand of the schedule layer.

    Parameters
    ----------
    frame
        The schedule layer (``harvest_system`` is used when present).
    settings
        ``economics`` and ``terrain.slope_classes`` are used.
    cost_column
        Column holding the cost class, or ``None``.

    Raises
    ------
    InputError
        A stand's cost class is not in ``economics.harvest_cost_by_class``.
    """
    econ = settings.economics
    out = np.full(len(frame), float(econ.harvest_cost_per_m3))
    if cost_column is not None and econ.harvest_cost_by_class:
        table = {key_text(k): float(v) for k, v in econ.harvest_cost_by_class.items()}
        cls = frame[cost_column].map(key_text).to_numpy(dtype=object)
        given = frame[cost_column].notna().to_numpy() & (cls != "")
        unknown = given & ~np.isin(cls, list(table))
        if unknown.any():
            msg = (
                f"cost class {', '.join(sorted(set(cls[unknown])))} (field {cost_column}) is "
                f"not in economics.harvest_cost_by_class ({', '.join(sorted(table))})"
            )
            raise InputError(msg)
        out = np.where(given, [table.get(c, np.nan) for c in cls], out)
    if "harvest_system" in frame.columns:
        by_system = {
            c.system: float(c.harvest_cost_per_m3)
            for c in settings.terrain.slope_classes
            if c.harvest_cost_per_m3 is not None
        }
        system_cost = frame["harvest_system"].astype(str).map(by_system).to_numpy(dtype=float)
        out = np.where(np.isnan(system_cost), out, system_cost)
    return out


def land_value(strata: np.ndarray, cost: np.ndarray, curves: Curves, econ: Economics) -> np.ndarray:
    """Value of bare land just regenerated: best Faustmann LEV over 1 .. 300 years, plus ``C``.

    ``LEV(T) = (S(T) - C (1 + r)^T) / ((1 + r)^T - 1)`` with ``S(T) = (price - h) V(T)``
    (Faustmann 1849); ``C`` is added back because the harvest already paid it. NaN where
    no price is known.
    """
    ages = np.arange(1, LAND_VALUE_MAX_AGE_YR + 1, dtype=float)
    growth = (1.0 + econ.discount_rate) ** ages
    regen = econ.regeneration_cost_per_ha
    out = np.full(len(strata), np.nan)
    pairs = pd.DataFrame({"s": strata, "h": cost})
    for (lab, h), rows in pairs.groupby(["s", "h"]).groups.items():
        labels = np.full(len(ages), lab, dtype=object)
        price = stumpage(curves.diameter(labels, ages), econ)
        if price is None:
            continue
        s = (price - h) * curves.volume(labels, ages)
        out[np.asarray(rows)] = float(np.max((s - regen * growth) / (growth - 1.0))) + regen
    return out


def harvest_value_per_ha(
    stratum_cut: np.ndarray,
    age_yr: np.ndarray,
    stratum_after: np.ndarray,
    period: np.ndarray,
    cost: np.ndarray,
    curves: Curves,
    settings: Settings,
) -> np.ndarray | None:
    """Discounted net value per ha of net area of every harvest (module docstring).

    Parameters
    ----------
    stratum_cut, age_yr
        (e,) stratum and age at mid-period of the crop each harvest cuts.
    stratum_after
        (e,) stratum regenerated after each harvest (for the land value).
    period
        (e,) harvest periods.
    cost
        (e,) harvest cost per m3.
    curves
        Verify's growth curves.
    settings
        ``economics`` and ``horizon`` are used.

    Returns
    -------
    numpy.ndarray or None
        ``None`` when the settings give no price (or ask for a land value at a rate of 0).
    """
    econ, L = settings.economics, settings.horizon.period_length_yr
    price = stumpage(curves.diameter(stratum_cut, age_yr), econ)
    if price is None:
        return None
    net = (price - cost) * curves.volume(stratum_cut, age_yr) - econ.regeneration_cost_per_ha
    return net * discount((period - 0.5) * L, econ.discount_rate)


def ending_gain_per_ha(
    cut: tuple[np.ndarray, np.ndarray],
    uncut: tuple[np.ndarray, np.ndarray],
    cost: np.ndarray,
    curves: Curves,
    settings: Settings,
) -> np.ndarray:
    """Discounted value standing at the end of the horizon if cut, less the value if uncut.

    ``cut`` and ``uncut`` are (stratum, age at the end) pairs of (e,) arrays. The value of
    standing timber is ``(price - h) V`` (docs/methods.md), discounted from ``P L``.
    NaN where no price is known.
    """
    econ, hz = settings.economics, settings.horizon
    value = []
    for strata, age in (cut, uncut):
        price = stumpage(curves.diameter(strata, age), econ)
        price = np.full(len(age), np.nan) if price is None else price
        value.append((price - cost) * curves.volume(strata, age))
    return (value[0] - value[1]) * discount(hz.periods * hz.period_length_yr, econ.discount_rate)
