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
* value ``((price - h) V(a) - C) (1 + r)^-t A`` (the harvest's share of the plan NPV,
  regeneration cost included);
* the value of the forest left at the end (:func:`ending_value_per_ha`, by
  ``economics.ending_value``), discounted from ``P L``; with ``faustmann`` it holds the
  land expectation value of the regenerated stratum over crop ages of 1 .. 300 years
  (Faustmann 1849).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from spatialplan.errors import InputError, SettingsError
from spatialplan.settings import Economics, Settings
from spatialplan.verify.events import regeneration
from spatialplan.verify.yields import Curves, key_text

__all__ = [
    "LAND_VALUE_MAX_AGE_YR",
    "discount",
    "ending_value_per_ha",
    "harvest_cost",
    "harvest_value_per_ha",
    "land_value",
    "stumpage",
]

#: crop ages searched for the land value and the ending value (docs/methods.md)
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


def _net_stumpage(
    strata: np.ndarray, ages: np.ndarray, cost: np.ndarray, curves: Curves, econ: Economics
) -> np.ndarray | None:
    """``S(a) = (price(d(a)) - h) V(a)`` per ha (ages below 0 count as 0); ``None`` without a price."""
    a = np.maximum(np.asarray(ages, dtype=float), 0.0)
    price = stumpage(curves.diameter(strata, a), econ)
    if price is None:
        return None
    return (price - cost) * curves.volume(strata, a)


def land_value(
    strata: np.ndarray, cost: np.ndarray, curves: Curves, settings: Settings
) -> np.ndarray:
    """Faustmann land expectation value of bare land: the best over crop ages 1 .. 300 years.

    ``LEV(T) = (S(T) - C (1 + r)^(T + d)) / ((1 + r)^(T + d) - 1)`` with
    ``S(T) = (price - h) V(T)``, the regeneration cost ``C`` at the start of every rotation
    and the land bare ``d = regeneration.delay_yr`` years after each cut (Faustmann 1849).
    NaN where no price is known.

    Raises
    ------
    SettingsError
        ``economics.discount_rate`` is not above 0 (the LEV is unbounded).
    """
    econ = settings.economics
    r = econ.discount_rate
    if not r > 0:
        msg = f"economics.discount_rate = {r!r}: a land expectation value needs a rate > 0"
        raise SettingsError(msg)
    delay, _ = regeneration(settings)
    ages = np.arange(1, LAND_VALUE_MAX_AGE_YR + 1, dtype=float)
    growth = (1.0 + r) ** (ages + delay)
    regen = econ.regeneration_cost_per_ha
    out = np.full(len(strata), np.nan)
    pairs = pd.DataFrame({"s": np.asarray(strata, dtype=object), "h": np.asarray(cost, float)})
    for (lab, h), rows in pairs.groupby(["s", "h"]).groups.items():
        labels = np.full(len(ages), lab, dtype=object)
        value = _net_stumpage(labels, ages, np.full(len(ages), h), curves, econ)
        if value is None:
            continue
        out[np.asarray(rows)] = float(np.nanmax((value - regen * growth) / (growth - 1.0)))
    return out


def harvest_value_per_ha(
    stratum_cut: np.ndarray,
    age_yr: np.ndarray,
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
        ``None`` when the settings give no price.
    """
    econ, L = settings.economics, settings.horizon.period_length_yr
    price = stumpage(curves.diameter(stratum_cut, age_yr), econ)
    if price is None:
        return None
    net = (price - cost) * curves.volume(stratum_cut, age_yr) - econ.regeneration_cost_per_ha
    return net * discount((period - 0.5) * L, econ.discount_rate)


def ending_value_per_ha(
    strata: np.ndarray,
    age_end_yr: np.ndarray,
    next_strata: np.ndarray,
    cost: np.ndarray,
    curves: Curves,
    settings: Settings,
) -> np.ndarray:
    """Value per ha of the forest left at the end of the horizon, at the end (undiscounted).

    By ``economics.ending_value`` (``docs/methods.md``, Ending value):

    * ``faustmann``: ``max_a (S(a) + LEV') (1 + r)^-(a - e)`` over ages
      ``a = max(e, 0) + j``, ``j = 0 .. 300`` years, of the crop of age ``e`` standing at the
      end: cut it at the best age, then own bare land worth the LEV of the stratum that
      regenerates after it (:func:`land_value`);
    * ``standing``: ``S(max(e, 0))``, the standing timber;
    * ``none``: 0.

    Parameters
    ----------
    strata, age_end_yr
        (n,) stratum and age of the crop standing at the end.
    next_strata
        (n,) stratum that regenerates after that crop is cut.
    cost
        (n,) harvest cost per m3.
    curves, settings
        Verify's growth curves; ``economics`` and ``regeneration`` are used.

    Returns
    -------
    numpy.ndarray
        NaN where no price is known.
    """
    econ = settings.economics
    e = np.asarray(age_end_yr, dtype=float)
    mode = econ.ending_value
    if mode == "none":
        return np.zeros(len(e))
    if mode == "standing":
        value = _net_stumpage(np.asarray(strata, dtype=object), e, cost, curves, econ)
        return np.full(len(e), np.nan) if value is None else value
    land = land_value(next_strata, cost, curves, settings)
    rows = pd.DataFrame({"s": np.asarray(strata, dtype=object), "h": np.asarray(cost, float)})
    j = np.arange(LAND_VALUE_MAX_AGE_YR + 1, dtype=float)
    out = np.full(len(e), np.nan)
    for (lab, h), members in rows.groupby(["s", "h"]).groups.items():
        idx = np.asarray(members)
        ages = np.maximum(e[idx], 0.0)[:, None] + j[None, :]  # (stands, future ages)
        value = _net_stumpage(np.full(ages.size, lab, dtype=object), ages.ravel(),
                              np.full(ages.size, h), curves, econ)  # fmt: skip
        if value is None:
            continue
        worth = (value.reshape(ages.shape) + land[idx, None]) * discount(
            ages - e[idx, None], econ.discount_rate
        )
        out[idx] = np.max(worth, axis=1)
    return out
