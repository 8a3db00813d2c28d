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

Prescriptions (Model I, Johnson and Scheurman 1977): each stand chooses exactly one
*prescription*, the sequence of its harvest periods over the horizon (none, one, two ...).
After a clear-cut in ``q`` the stand regenerates; its age at mid-period ``p > q`` is
``(p - q) L - delay``. A stand harvested in ``q`` is open in ``q .. q + G - 1`` after every
harvest. :class:`Prescriptions` holds them in compressed (CSR) form, about 70 bytes each.
When a :class:`PlanProblem` has none, :func:`single_harvest_prescriptions` derives the
single-harvest model (no harvest, or one harvest in an eligible period) from its ``(n, P)``
arrays.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["FlowRules", "PlanProblem", "Prescriptions", "single_harvest_prescriptions"]

#: Periods are held as bits of a uint64 mask (bit ``p - 1`` is period ``p``).
MAX_PERIODS = 64


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
    # Old-forest retention: in every period the gross area whose age at mid-period is at
    # least old_forest_age_yr is at least old_forest_min_share of the gross forest area (of
    # each group in PlanProblem.old_forest_group, else of the whole forest).
    old_forest_age_yr: float | None = None
    old_forest_min_share: float | None = None


@dataclass(frozen=True)
class Prescriptions:
    """Every stand's prescriptions in compressed form (Model I).

    ``K`` prescriptions in all, ``H`` harvests in all. Prescriptions of stand ``i`` are
    ``k in range(stand_start[i], stand_start[i + 1])``; the first of each stand is always
    the no-harvest prescription. Harvests of prescription ``k`` are
    ``h in range(harvest_start[k], harvest_start[k + 1])``, in period order.

    Attributes
    ----------
    stand_start
        (n + 1,) int64 offsets into the prescription arrays.
    harvest_start
        (K + 1,) int64 offsets into the harvest arrays.
    harvest_period
        (H,) int16 harvest period (1-based).
    harvest_volume_m3_ha
        (H,) float64 volume per ha of net area cut by that harvest.
    harvest_npv_per_ha
        (H,) float64 discounted net value per ha of that harvest (its share of the
        prescription's NPV, regeneration cost included; the ending value is apart).
    npv_per_ha
        (K,) float64 objective coefficient per ha of net area: the sum of the harvests'
        NPV plus the discounted ending value.
    ending_value_per_ha
        (K,) float64 discounted (to the start) value of the stand left at the end.
    harvest_mask
        (K,) uint64: bit ``p - 1`` set when the prescription harvests in period ``p``.
    old_mask
        (K,) uint64: bit ``p - 1`` set when the stand's age at mid-period ``p`` is at least
        ``FlowRules.old_forest_age_yr`` (all zero when that rule is off).
    ending_volume_m3_ha, ending_age_yr
        (K,) standing volume per ha and age at the end of the horizon.
    """

    stand_start: np.ndarray
    harvest_start: np.ndarray
    harvest_period: np.ndarray
    harvest_volume_m3_ha: np.ndarray
    harvest_npv_per_ha: np.ndarray
    npv_per_ha: np.ndarray
    ending_value_per_ha: np.ndarray
    harvest_mask: np.ndarray
    old_mask: np.ndarray
    ending_volume_m3_ha: np.ndarray
    ending_age_yr: np.ndarray

    @property
    def n_prescriptions(self) -> int:
        """Number of prescriptions ``K``."""
        return len(self.npv_per_ha)

    @property
    def stand_of(self) -> np.ndarray:
        """(K,) the stand position of every prescription."""
        counts = np.diff(self.stand_start)
        return np.repeat(np.arange(len(counts)), counts)

    def periods_of(self, k: int) -> np.ndarray:
        """Harvest periods (1-based) of prescription ``k``."""
        return self.harvest_period[self.harvest_start[k] : self.harvest_start[k + 1]]

    def validate(self, n_stands: int, periods: int) -> None:
        """Check shapes and offsets; raises ``ValueError`` on a programming error."""
        K = self.n_prescriptions
        H = len(self.harvest_period)
        if periods > MAX_PERIODS:
            msg = f"at most {MAX_PERIODS} periods are supported"
            raise ValueError(msg)
        if np.shape(self.stand_start) != (n_stands + 1,) or self.stand_start[0] != 0:
            msg = "Prescriptions.stand_start must be (n + 1,) offsets from 0"
            raise ValueError(msg)
        if self.stand_start[-1] != K or np.any(np.diff(self.stand_start) < 1):
            msg = "every stand needs at least its no-harvest prescription"
            raise ValueError(msg)
        if np.shape(self.harvest_start) != (K + 1,) or self.harvest_start[-1] != H:
            msg = "Prescriptions.harvest_start must be (K + 1,) offsets ending at H"
            raise ValueError(msg)
        for name in (
            "ending_value_per_ha",
            "harvest_mask",
            "old_mask",
            "ending_volume_m3_ha",
            "ending_age_yr",
        ):
            if np.shape(getattr(self, name)) != (K,):
                msg = f"Prescriptions.{name} must have shape ({K},)"
                raise ValueError(msg)
        for name in ("harvest_volume_m3_ha", "harvest_npv_per_ha"):
            if np.shape(getattr(self, name)) != (H,):
                msg = f"Prescriptions.{name} must have shape ({H},)"
                raise ValueError(msg)
        first = self.stand_start[:-1]
        if np.any(self.harvest_start[first + 1] != self.harvest_start[first]):
            msg = "the first prescription of every stand must harvest nothing"
            raise ValueError(msg)
        if H and (self.harvest_period.min() < 1 or self.harvest_period.max() > periods):
            msg = "harvest periods must lie in 1 .. P"
            raise ValueError(msg)


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
    prescriptions
        Optional :class:`Prescriptions` (several harvests per stand). When given, the
        scheduler chooses among them and ``eligible``, ``volume_m3_ha``, ``npv_per_ha``
        and the ``ending_*`` arrays describe the *first* harvest only (diagnosis, charts);
        when ``None`` the single-harvest model of those arrays is solved.
    old_forest_group
        Optional (n,) int group (management unit) of each stand for the old-forest rule;
        ``None`` applies it to the whole forest.
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
    prescriptions: Prescriptions | None = None
    old_forest_group: np.ndarray | None = None

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
        if self.prescriptions is not None:
            self.prescriptions.validate(n, p)
        if self.old_forest_group is not None and np.shape(self.old_forest_group) != (n,):
            msg = f"PlanProblem.old_forest_group must have shape ({n},)"
            raise ValueError(msg)

    def rx(self) -> Prescriptions:
        """The prescriptions to choose from (derived from the arrays when not given)."""
        return self.prescriptions or single_harvest_prescriptions(self)


def _old_mask_bits(old: np.ndarray) -> np.ndarray:
    """(K, P) bool -> (K,) uint64 bit masks."""
    weights = np.left_shift(np.uint64(1), np.arange(old.shape[1], dtype=np.uint64))
    return (old.astype(np.uint64) * weights[None, :]).sum(axis=1, dtype=np.uint64)


def single_harvest_prescriptions(problem: PlanProblem) -> Prescriptions:
    """The single-harvest model as prescriptions: none, or one cut in an eligible period.

    The no-harvest prescription of stand ``i`` carries the ending column 0 and an NPV of
    0; the cut in period ``p`` carries ``npv_per_ha[i, p - 1]`` (which already holds any
    ending-value difference) and the ending column ``p``. The age after a cut at
    mid-period ``q`` is ``(p - q) L`` at mid-period ``p`` (no regeneration delay).

    Examples
    --------
    >>> import numpy as np
    >>> pr = PlanProblem(
    ...     stand_ids=np.array(["a"]), area_ha=np.ones(1), opening_area_ha=np.ones(1),
    ...     age_start_yr=np.array([50.0]), eligible=np.array([[True, False, True]]),
    ...     volume_m3_ha=np.full((1, 3), 300.0), npv_per_ha=np.array([[10.0, 9.0, 8.0]]),
    ...     green_up_periods=np.array([1]), initially_open=np.zeros((1, 3), bool),
    ...     edges=np.zeros((0, 2), int), periods=3, period_length_yr=10.0)
    >>> rx = single_harvest_prescriptions(pr)
    >>> rx.stand_start.tolist(), rx.harvest_period.tolist(), rx.npv_per_ha.tolist()
    ([0, 3], [1, 3], [0.0, 10.0, 8.0])
    """
    n, P, L = problem.n_stands, problem.periods, problem.period_length_yr
    elig = np.asarray(problem.eligible, dtype=bool)
    counts = 1 + elig.sum(axis=1)
    stand_start = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=stand_start[1:])
    K = int(stand_start[-1])
    stand = np.repeat(np.arange(n), counts)
    # period of each prescription: 0 for the no-harvest one, then the eligible periods
    period = np.zeros(K, dtype=np.int64)
    _, pp = np.nonzero(elig)
    slot = np.ones(K, dtype=bool)
    slot[stand_start[:-1]] = False
    period[slot] = pp + 1  # np.nonzero is row-major: stands in order, periods ascending
    cut = period > 0
    harvest_start = np.zeros(K + 1, dtype=np.int64)
    np.cumsum(cut, out=harvest_start[1:])
    hi, hp = stand[cut], period[cut]
    npv = np.zeros(K)
    npv[cut] = problem.npv_per_ha[hi, hp - 1]
    if problem.ending_volume_m3_ha is not None:
        end_vol = problem.ending_volume_m3_ha[stand, period]
    else:
        end_vol = np.zeros(K)
    if problem.ending_age_yr is not None:
        end_age = problem.ending_age_yr[stand, period]
    else:
        end_age = np.where(cut, (P - period + 0.5) * L, problem.age_start_yr[stand] + P * L)
    mask = np.where(
        cut, np.left_shift(np.uint64(1), np.maximum(period - 1, 0).astype(np.uint64)), np.uint64(0)
    )
    old_age = problem.flow.old_forest_age_yr
    if old_age is None:
        old = np.zeros(K, dtype=np.uint64)
    else:
        mid = (np.arange(1, P + 1) - 0.5) * L
        age = problem.age_start_yr[stand][:, None] + mid[None, :]
        after = cut[:, None] & (np.arange(1, P + 1)[None, :] >= period[:, None])
        age = np.where(after, (np.arange(1, P + 1)[None, :] - period[:, None]) * L, age)
        old = _old_mask_bits(age >= old_age - 1e-9)
    return Prescriptions(
        stand_start=stand_start,
        harvest_start=harvest_start,
        harvest_period=hp.astype(np.int16),
        harvest_volume_m3_ha=np.asarray(problem.volume_m3_ha[hi, hp - 1], dtype=float),
        harvest_npv_per_ha=npv[cut].copy(),
        npv_per_ha=npv,
        ending_value_per_ha=np.zeros(K),
        harvest_mask=mask.astype(np.uint64),
        old_mask=old,
        ending_volume_m3_ha=np.asarray(end_vol, dtype=float),
        ending_age_yr=np.asarray(end_age, dtype=float),
    )
