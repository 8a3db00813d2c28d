"""The planning problem handed to the scheduler: plain arrays, no geometry.

A :class:`PlanProblem` is built by the pipeline from the inventory, growth, economics,
terrain and adjacency stages and is everything :mod:`spatialplan.schedule` needs. Stands
are addressed by position ``0 .. n-1``; periods by column ``0 .. P-1`` (period number
``p = column + 1``).

Timing convention (common practice in harvest-scheduling models): a harvest in period
``p`` of length ``L`` happens at mid-period, ``t = (p - 0.5) L`` years after the start,
when the stand's age is ``age_start + t``.

Openness: a stand harvested in period ``q`` is *open* (counts toward an opening) in
periods ``q .. q + G - 1`` where ``G`` is its green-up delay in periods. A stand that is
young at the start is open in every period ``p`` with ``age_start + (p - 0.5) L < G L``
(``initially_open``), whether or not it is harvested later.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["FlowRules", "PlanProblem"]


@dataclass(frozen=True)
class FlowRules:
    """Volume/area flow and ending-inventory rules (``None`` = rule off)."""

    flow_tolerance: float | None = 0.10  # |V[p+1] - V[p]| <= tol * V[p]
    non_declining: bool = False  # V[p+1] >= V[p]
    volume_min_m3: float | None = None  # per period
    volume_max_m3: float | None = None
    area_min_ha: float | None = None
    area_max_ha: float | None = None
    ending_volume_min_m3: float | None = None  # standing volume at the end of the horizon
    ending_mean_age_min_yr: float | None = None  # area-weighted mean age at the end


@dataclass(frozen=True)
class PlanProblem:
    """Arrays describing one harvest-scheduling instance.

    Attributes
    ----------
    stand_ids
        (n,) stand identifiers as text.
    area_ha
        (n,) harvestable (net) area; volumes and values are per hectare of it.
    opening_area_ha
        (n,) gross area counted toward opening size (usually the polygon area).
    age_start_yr
        (n,) age at the start of the plan.
    eligible
        (n, P) bool: the stand may be harvested in that period (not reserved, old
        enough at mid-period, operable).
    volume_m3_ha
        (n, P) merchantable volume per ha if harvested in that period.
    npv_per_ha
        (n, P) discounted net value per ha of harvesting in that period (the objective
        coefficient before multiplying by area); may be negative.
    green_up_periods
        (n,) green-up delay in whole periods per stand.
    initially_open
        (n, P) bool: open in that period because it is young at the start.
    edges
        (m, 2) int array of adjacent stand pairs ``i < j``.
    periods, period_length_yr
        Horizon.
    max_opening_ha
        Area restriction limit, or ``None`` for no area restriction.
    unit_restriction
        No two adjacent stands open in the same period.
    flow
        Flow and ending-inventory rules.
    ending_volume_m3_ha
        (n, P + 1) standing volume per ha at the end of the horizon: column 0 when the
        stand is not harvested, column ``p`` when harvested in period ``p``.
    ending_age_yr
        (n, P + 1) age at the end of the horizon, same layout.
    eligible_no_min_age
        Optional (n, P) bool: ``eligible`` without the minimum-age rule (reserves and
        operability still applied). Lets the scheduler's diagnosis test a lower minimum
        age.
    min_age_yr
        Optional minimum harvest age (at mid-period) that went into ``eligible``; used
        with ``eligible_no_min_age`` by the diagnosis.
    """

    stand_ids: np.ndarray
    area_ha: np.ndarray
    opening_area_ha: np.ndarray
    age_start_yr: np.ndarray
    eligible: np.ndarray
    volume_m3_ha: np.ndarray
    npv_per_ha: np.ndarray
    green_up_periods: np.ndarray
    initially_open: np.ndarray
    edges: np.ndarray
    periods: int
    period_length_yr: float
    max_opening_ha: float | None = 40.0
    unit_restriction: bool = False
    flow: FlowRules = field(default_factory=FlowRules)
    ending_volume_m3_ha: np.ndarray | None = None
    ending_age_yr: np.ndarray | None = None
    eligible_no_min_age: np.ndarray | None = None
    min_age_yr: float | None = None

    @property
    def n_stands(self) -> int:
        """Number of stands."""
        return len(self.stand_ids)

    def validate(self) -> None:
        """Check array shapes; raises ``ValueError`` on a programming error."""
        n, p = self.n_stands, self.periods
        for name in ("area_ha", "opening_area_ha", "age_start_yr", "green_up_periods"):
            if np.shape(getattr(self, name)) != (n,):
                msg = f"PlanProblem.{name} must have shape ({n},)"
                raise ValueError(msg)
        for name in ("eligible", "volume_m3_ha", "npv_per_ha", "initially_open"):
            if np.shape(getattr(self, name)) != (n, p):
                msg = f"PlanProblem.{name} must have shape ({n}, {p})"
                raise ValueError(msg)
        e = np.asarray(self.edges)
        if e.size and (e.ndim != 2 or e.shape[1] != 2 or e.min() < 0 or e.max() >= n):
            msg = "PlanProblem.edges must be (m, 2) stand positions"
            raise ValueError(msg)
