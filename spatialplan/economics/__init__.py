"""Stand economics: stumpage by tree size, discounting, harvest values, rotation rules.

One module per job: :mod:`~spatialplan.economics.money` (discounting, prices, costs),
:mod:`~spatialplan.economics.rotation_age` (land expectation value and rotation ages),
:mod:`~spatialplan.economics.harvest_value` (per-period harvest values for the scheduler,
land values per stand, ending value) and :mod:`~spatialplan.economics.ltsy` (long-term
sustained yield). The public names are re-exported here.

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

from spatialplan.economics._common import DEFAULT_MAX_AGE
from spatialplan.economics.harvest_value import (
    HarvestValues,
    ending_value_per_ha,
    harvest_values,
    land_expectation_values,
    net_value_per_ha,
)
from spatialplan.economics.ltsy import LTSY_COLUMNS, SustainedYield, long_term_sustained_yield
from spatialplan.economics.money import (
    discount_factor,
    harvest_cost_per_stand,
    mid_period_times,
    npv,
    stumpage_price,
)
from spatialplan.economics.rotation_age import (
    ROTATION_COLUMNS,
    RotationCurves,
    faustmann_rotation,
    fisher_rotation,
    lev,
    rotation_curves,
    rotation_table,
    value_mai_rotation,
)

__all__ = [
    "DEFAULT_MAX_AGE",
    "LTSY_COLUMNS",
    "ROTATION_COLUMNS",
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
