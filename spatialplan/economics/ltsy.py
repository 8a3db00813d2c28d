"""Long-term sustained yield (LTSY) of the forest at its rotation ages."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from spatialplan.economics._common import DEFAULT_MAX_AGE, first_argmax, unique_rows
from spatialplan.economics.harvest_value import land_expectation_values
from spatialplan.growth import GrowthModel
from spatialplan.settings import Settings

__all__ = ["LTSY_COLUMNS", "SustainedYield", "long_term_sustained_yield"]


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
    (u_lab, u_hc), inv = unique_rows(lab, np.asarray(hc, dtype=float))
    u_area = np.bincount(inv, weights=area, minlength=len(u_lab))
    ages = np.arange(1, int(max_age) + 1, dtype=float)
    vol = growth.volume(u_lab, np.broadcast_to(ages, (len(u_lab), len(ages))))
    sy = vol / (ages + d)[None, :]
    i_max = first_argmax(sy) if len(u_lab) else np.zeros(0, dtype=np.int64)
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
