"""Per-stand, per-period harvest values for the scheduler, land values and ending value."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from spatialplan.economics._common import DEFAULT_MAX_AGE, unique_rows
from spatialplan.economics.money import (
    discount_factor,
    harvest_cost_per_stand,
    mid_period_times,
    stumpage_price,
)
from spatialplan.economics.rotation_age import faustmann_rotation
from spatialplan.errors import SettingsError
from spatialplan.growth import GrowthModel
from spatialplan.settings import Economics, Settings

__all__ = [
    "HarvestValues",
    "ending_value_per_ha",
    "harvest_values",
    "land_expectation_values",
    "net_value_per_ha",
]


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
    (u_lab, u_hc), inv = unique_rows(lab, np.asarray(hc, dtype=float))
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
    (u_lab, u_nxt, u_hc, u_age), inv = unique_rows(lab, nxt, np.asarray(hc, float), age)
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
