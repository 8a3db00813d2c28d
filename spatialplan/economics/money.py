"""Discounting, stumpage prices by tree size and harvest costs per stand.

Discounting uses annual compounding, ``(1 + r)**-t``, ``t`` in years from the start; a
harvest in period ``p`` of length ``L`` happens at mid-period, ``t = (p - 0.5) L``.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from spatialplan.errors import InputError, SettingsError
from spatialplan.settings import Economics

__all__ = ["discount_factor", "harvest_cost_per_stand", "mid_period_times", "npv", "stumpage_price"]


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
