"""Shared pieces of the scheduler: plans, rule rows, openness, the float64 check, covers.

A *plan* is an ``(n,)`` int64 array holding, for every stand ``i``, the global index ``k``
of its chosen prescription (``rx.stand_start[i] <= k < rx.stand_start[i + 1]``; the first
prescription of a stand harvests nothing). See :class:`~spatialplan.problem.Prescriptions`.

Non-spatial rules (flow, targets, ending inventory, old-forest retention) are all written
as *rows* over a few *quantities*. A quantity is a sum over stands of what the chosen
prescription contributes (the harvest volume of period ``p``, the harvest area of ``p``,
the ending volume, the area-weighted ending-age surplus, the old-forest area of a group in
``p``), held as a sparse ``(K, J)`` matrix; a row is ``sum_j a_j q_j <= rhs``. The LP, the
CP-SAT model, the heuristic and the final check all read the same rows, so they cannot
disagree about what a rule means.

Spatial rules follow the openness convention of :mod:`spatialplan.problem`: a stand
harvested in period ``q`` is *harvest-open* in ``q .. q + G - 1`` after every harvest of its
prescription (held as a uint64 bit mask per prescription); a stand in ``initially_open``
is open whatever the plan does. Within a period, a connected group of open stands whose
opening area exceeds ``max_opening_ha`` breaks the area restriction when at least one of its
stands is harvest-open (a group made only of stands that were already open at the start is
a pre-existing condition, not a breach of the plan). With the unit restriction, two adjacent
open stands break it when at least one is harvest-open.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from spatialplan.problem import PlanProblem, Prescriptions

__all__ = [
    "Prep",
    "Row",
    "RowSet",
    "build_rows",
    "check_plan",
    "extract_covers",
    "first_period",
    "is_connected",
    "mask_bits",
    "open_masks",
    "plan_from_periods",
    "plan_harvests",
    "plan_npv",
    "spatial_breaches",
    "window_covers",
]

# Relative slack allowed when re-checking a row in float64: absorbs summation-order noise
# only (the integer model is conservative, so real plans keep a larger margin).
ROW_RTOL = 1e-9

_ONE = np.uint64(1)


# ---- prescriptions and plans ---------------------------------------------------------------
def mask_bits(masks: np.ndarray, periods: int) -> np.ndarray:
    """``(m, P)`` bool from ``(m,)`` uint64 period masks (bit ``p - 1`` = period ``p``).

    Examples
    --------
    >>> mask_bits(np.array([0b101], dtype=np.uint64), 4).astype(int).tolist()
    [[1, 0, 1, 0]]
    """
    m = np.asarray(masks, dtype=np.uint64)
    shifts = np.arange(periods, dtype=np.uint64)
    return ((m[:, None] >> shifts[None, :]) & _ONE).astype(bool)


def _harvest_owner(rx: Prescriptions) -> np.ndarray:
    """(H,) prescription index of every harvest."""
    return np.repeat(np.arange(rx.n_prescriptions), np.diff(rx.harvest_start))


def _or_by_prescription(rx: Prescriptions, per_harvest: np.ndarray) -> np.ndarray:
    """(K,) bitwise OR of a per-harvest uint64 array over each prescription's harvests."""
    out = np.zeros(rx.n_prescriptions, dtype=np.uint64)
    starts = np.asarray(rx.harvest_start[:-1])
    nonempty = np.diff(rx.harvest_start) > 0
    if nonempty.any():
        # Empty segments are dropped first: reduceat reads [start_j, start_{j+1}).
        out[nonempty] = np.bitwise_or.reduceat(per_harvest, starts[nonempty])
    return out


def open_masks(rx: Prescriptions, green: np.ndarray, periods: int) -> np.ndarray:
    """(K,) uint64: periods in which each prescription keeps its stand harvest-open.

    A harvest in ``q`` opens the stand in ``q .. q + G - 1`` (clipped to the horizon); the
    masks of all harvests of a prescription are OR-ed.
    """
    owner = _harvest_owner(rx)
    stand = rx.stand_of[owner]
    q = np.asarray(rx.harvest_period, dtype=np.int64)
    width = np.clip(np.minimum(np.asarray(green, dtype=np.int64)[stand], periods - q + 1), 0, 64)
    ones = np.where(
        width >= 64,
        np.uint64(0xFFFF_FFFF_FFFF_FFFF),
        (np.left_shift(_ONE, np.minimum(width, 63).astype(np.uint64))) - _ONE,
    )
    per_harvest = np.left_shift(ones, (q - 1).astype(np.uint64))
    return _or_by_prescription(rx, per_harvest)


def first_period(rx: Prescriptions, plan: np.ndarray) -> np.ndarray:
    """(n,) first harvest period of each stand's prescription, 0 when it harvests nothing."""
    k = np.asarray(plan, dtype=np.int64)
    h0, h1 = rx.harvest_start[k], rx.harvest_start[k + 1]
    out = np.zeros(len(k), dtype=np.int64)
    cut = h1 > h0
    out[cut] = rx.harvest_period[h0[cut]]
    return out


def plan_harvests(rx: Prescriptions, plan: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every harvest of a plan as ``(stand, harvest_no, period)`` arrays.

    ``harvest_no`` counts a stand's harvests from 1 in period order; rows are ordered by
    stand, then harvest.

    Examples
    --------
    >>> from spatialplan.problem import Prescriptions
    >>> rx = Prescriptions(
    ...     stand_start=np.array([0, 3]), harvest_start=np.array([0, 0, 1, 3]),
    ...     harvest_period=np.array([2, 1, 5], dtype=np.int16),
    ...     harvest_volume_m3_ha=np.ones(3), harvest_npv_per_ha=np.ones(3),
    ...     npv_per_ha=np.zeros(3), ending_value_per_ha=np.zeros(3),
    ...     harvest_mask=np.array([0, 2, 17], dtype=np.uint64),
    ...     old_mask=np.zeros(3, dtype=np.uint64), ending_volume_m3_ha=np.zeros(3),
    ...     ending_age_yr=np.zeros(3))
    >>> [a.tolist() for a in plan_harvests(rx, np.array([2]))]
    [[0, 0], [1, 2], [1, 5]]
    """
    k = np.asarray(plan, dtype=np.int64)
    h0, h1 = rx.harvest_start[k], rx.harvest_start[k + 1]
    counts = (h1 - h0).astype(np.int64)
    stand = np.repeat(np.arange(len(k)), counts)
    first = np.repeat(np.cumsum(counts) - counts, counts)
    no = np.arange(int(counts.sum())) - first
    period = np.asarray(rx.harvest_period, dtype=np.int64)[np.repeat(h0, counts) + no]
    return stand, no + 1, period


def plan_from_periods(rx: Prescriptions, period: np.ndarray) -> np.ndarray:
    """The plan that cuts each stand once in ``period[i]`` (0 = never), as prescriptions.

    For callers holding a single-harvest plan; raises ``ValueError`` naming the stands
    whose period is not one of their prescriptions.
    """
    per = np.asarray(period, dtype=np.int64)
    n = len(rx.stand_start) - 1
    if per.shape != (n,):
        msg = f"a plan needs one period per stand ({n})"
        raise ValueError(msg)
    bit = np.left_shift(_ONE, np.maximum(per - 1, 0).astype(np.uint64))
    want = np.where(per > 0, bit, np.uint64(0))
    stand_of = rx.stand_of
    k_hit = np.nonzero(np.asarray(rx.harvest_mask, dtype=np.uint64) == want[stand_of])[0]
    # The first matching prescription of each stand (the no-harvest one for period 0).
    s_hit, pos = np.unique(stand_of[k_hit], return_index=True)
    plan = np.full(n, -1, dtype=np.int64)
    plan[s_hit] = k_hit[pos]
    bad = np.nonzero(plan < 0)[0]
    if bad.size:
        msg = f"no prescription cuts stand(s) {bad[:10].tolist()} in the given period only"
        raise ValueError(msg)
    return plan


def plan_npv(problem: PlanProblem, plan: np.ndarray, rx: Prescriptions | None = None) -> float:
    """Net present value of a plan in float64: ``sum_i area_ha[i] * npv_per_ha[k_i]``."""
    rx = problem.rx() if rx is None else rx
    k = np.asarray(plan, dtype=np.int64)
    vals = (
        np.asarray(problem.area_ha, dtype=np.float64)
        * np.asarray(rx.npv_per_ha, dtype=np.float64)[k]
    )
    return float(np.sum(vals))


# ---- rule rows -----------------------------------------------------------------------------
@dataclass
class Row:
    """One linear rule ``sum_j coefs[j] * q_j <= rhs`` over the quantities of a :class:`RowSet`."""

    name: str
    family: str  # "flow", "targets", "ending" or "old forest"
    coefs: dict[int, float]
    rhs: float
    scale_ref: float = 1.0  # size of typical left-hand side values, for tolerances


@dataclass
class RowSet:
    """The rows of a problem and the quantities they read.

    ``quant`` is the sparse ``(K, J)`` contribution of every prescription to every
    quantity (already multiplied by the stand's area); a plan's quantities are the sum of
    its prescriptions' rows of ``quant``.
    """

    rows: list[Row]
    names: list[str]
    quant: sp.csr_matrix

    def __len__(self) -> int:
        return len(self.rows)

    def __iter__(self) -> Iterator[Row]:
        return iter(self.rows)

    def __getitem__(self, r: int) -> Row:
        return self.rows[r]

    @cached_property
    def matrix(self) -> np.ndarray:
        """(R, J) row coefficients on the quantities."""
        a = np.zeros((len(self.rows), len(self.names)))
        for r, row in enumerate(self.rows):
            for j, c in row.coefs.items():
                a[r, j] += c
        return a

    @property
    def rhs(self) -> np.ndarray:
        """(R,) right-hand sides."""
        return np.array([r.rhs for r in self.rows], dtype=np.float64)

    @property
    def scale(self) -> np.ndarray:
        """(R,) tolerance scale of each row: ``max(|rhs|, scale_ref)``."""
        return np.array([max(abs(r.rhs), r.scale_ref) for r in self.rows], dtype=np.float64)

    def quantities(self, plan: np.ndarray) -> np.ndarray:
        """(J,) quantities of a plan."""
        if not self.names:
            return np.zeros(0)
        sel = self.quant[np.asarray(plan, dtype=np.int64)]
        return np.asarray(sel.sum(axis=0), dtype=np.float64).ravel()

    def lhs(self, plan: np.ndarray) -> np.ndarray:
        """(R,) left-hand sides of the rows for a plan."""
        if not self.rows:
            return np.zeros(0)
        return self.matrix @ self.quantities(plan)

    def coefs(self, ks: np.ndarray) -> np.ndarray:
        """(len(ks), R) row coefficients of prescriptions ``ks``."""
        if not self.rows:
            return np.zeros((len(ks), 0))
        return np.asarray(self.quant[np.asarray(ks, dtype=np.int64)] @ self.matrix.T)

    def magnitude(self, plan: np.ndarray) -> np.ndarray:
        """(R,) sum of the magnitudes of the terms of each row for a plan (float error scale)."""
        if not self.rows:
            return np.zeros(0)
        sel = abs(self.quant[np.asarray(plan, dtype=np.int64)])
        return np.abs(self.matrix) @ np.asarray(sel.sum(axis=0), dtype=np.float64).ravel()


def build_rows(problem: PlanProblem, rx: Prescriptions | None = None) -> RowSet:
    """All non-spatial rules of a problem as rows (see :class:`RowSet`)."""
    rx = problem.rx() if rx is None else rx
    n, P = problem.n_stands, problem.periods
    fr = problem.flow
    K = rx.n_prescriptions
    a = np.asarray(problem.area_ha, dtype=np.float64)
    stand_of = rx.stand_of
    owner = _harvest_owner(rx)
    hp = np.asarray(rx.harvest_period, dtype=np.int64) - 1
    h_area = a[stand_of[owner]]
    h_vol = h_area * np.asarray(rx.harvest_volume_m3_ha, dtype=np.float64)
    names: list[str] = []
    ri: list[np.ndarray] = []
    ci: list[np.ndarray] = []
    vals: list[np.ndarray] = []
    rows: list[Row] = []

    def block(label: str, count: int | None = None) -> int:
        """Append quantity names (``label p`` for p = 1 .. count, or ``label``)."""
        j0 = len(names)
        if count is None:
            names.append(label)
        else:
            names.extend(f"{label} {c + 1}" for c in range(count))
        return j0

    vref = max(float(h_vol.sum()) / max(P, 1), 1.0)
    aref = max(float(h_area.sum()) / max(P, 1), 1.0)
    need_vol = (
        fr.flow_tolerance is not None
        or fr.non_declining
        or fr.volume_max_m3 is not None
        or fr.volume_min_m3 is not None
    ) and P > 0
    need_area = (fr.area_max_ha is not None or fr.area_min_ha is not None) and P > 0
    jv = ja = -1
    if need_vol:
        jv = block("volume", P)
        ri.append(owner)
        ci.append(jv + hp)
        vals.append(h_vol)
    if need_area:
        ja = block("area", P)
        ri.append(owner)
        ci.append(ja + hp)
        vals.append(h_area)
    for p in range(1, P):  # periods p -> p + 1
        v0, v1 = jv + p - 1, jv + p
        if fr.flow_tolerance is not None:
            t = float(fr.flow_tolerance)
            rows.append(
                Row(
                    f"flow: period {p + 1} volume at most {1 + t:g} x period {p}",
                    "flow",
                    {v1: 1.0, v0: -(1 + t)},
                    0.0,
                    vref,
                )
            )
            rows.append(
                Row(
                    f"flow: period {p + 1} volume at least {1 - t:g} x period {p}",
                    "flow",
                    {v0: 1 - t, v1: -1.0},
                    0.0,
                    vref,
                )
            )
        if fr.non_declining:
            rows.append(
                Row(
                    f"non-declining: period {p + 1} volume at least period {p}",
                    "flow",
                    {v0: 1.0, v1: -1.0},
                    0.0,
                    vref,
                )
            )
    # Per-period targets: (limit, sign, quantity column offset, unit, reference size); a
    # floor is written as -quantity <= -limit so every row reads "lhs <= rhs".
    targets = (
        (fr.volume_max_m3, 1.0, jv, "volume", "<=", "m3", vref),
        (fr.volume_min_m3, -1.0, jv, "volume", ">=", "m3", vref),
        (fr.area_max_ha, 1.0, ja, "area", "<=", "ha", aref),
        (fr.area_min_ha, -1.0, ja, "area", ">=", "ha", aref),
    )
    for p in range(1, P + 1):
        for limit, sign, j0, what, op, unit, ref in targets:
            if limit is not None:
                rows.append(
                    Row(
                        f"period {p} {what} {op} {limit:g} {unit}",
                        "targets",
                        {j0 + p - 1: sign},
                        sign * float(limit),
                        ref,
                    )
                )
    allk = np.arange(K)
    a_k = a[stand_of]
    null = np.asarray(rx.stand_start[:-1], dtype=np.int64)
    if fr.ending_volume_min_m3 is not None:
        if problem.prescriptions is None and problem.ending_volume_m3_ha is None:
            msg = "FlowRules.ending_volume_min_m3 needs PlanProblem.ending_volume_m3_ha"
            raise ValueError(msg)
        ev = a_k * np.asarray(rx.ending_volume_m3_ha, dtype=np.float64)
        j = block("ending volume")
        ri.append(allk)
        ci.append(np.full(K, j))
        vals.append(ev)
        rows.append(
            Row(
                f"ending volume >= {fr.ending_volume_min_m3:g} m3",
                "ending",
                {j: -1.0},
                -float(fr.ending_volume_min_m3),
                max(float(ev[null].sum()), 1.0),
            )
        )
    if fr.ending_mean_age_min_yr is not None:
        if problem.prescriptions is None and problem.ending_age_yr is None:
            msg = "FlowRules.ending_mean_age_min_yr needs PlanProblem.ending_age_yr"
            raise ValueError(msg)
        m = float(fr.ending_mean_age_min_yr)
        eage = np.asarray(rx.ending_age_yr, dtype=np.float64)
        # The surplus a (age - m) keeps the row's terms small around the floor.
        j = block("ending age surplus")
        ri.append(allk)
        ci.append(np.full(K, j))
        vals.append(a_k * (eage - m))
        rows.append(
            Row(
                f"ending mean age >= {m:g} yr",
                "ending",
                {j: -1.0},
                0.0,
                max(float(np.abs(a_k * eage).sum()) / max(n, 1), 1.0),
            )
        )
    share = fr.old_forest_min_share
    if share is not None and P > 0:
        if fr.old_forest_age_yr is None:
            msg = "FlowRules.old_forest_min_share needs FlowRules.old_forest_age_yr"
            raise ValueError(msg)
        oa = np.asarray(problem.opening_area_ha, dtype=np.float64)
        grp = problem.old_forest_group
        labels, g_of = (
            (np.array([0]), np.zeros(n, dtype=np.int64))
            if grp is None
            else np.unique(np.asarray(grp), return_inverse=True)
        )
        g_of = np.asarray(g_of, dtype=np.int64).ravel()
        j0 = len(names)
        for g in labels:
            for p in range(1, P + 1):
                names.append(
                    f"old forest {p}" if grp is None else f"old forest group {g} period {p}"
                )
        old = np.asarray(rx.old_mask, dtype=np.uint64)
        chunk = 1 << 18
        for s in range(0, K, chunk):
            kk = np.arange(s, min(s + chunk, K))
            kb, pb = np.nonzero(mask_bits(old[kk], P))
            k_abs = kk[kb]
            ri.append(k_abs)
            ci.append(j0 + g_of[stand_of[k_abs]] * P + pb)
            vals.append(oa[stand_of[k_abs]])
        total = np.bincount(g_of, weights=oa, minlength=len(labels))
        for gi, g in enumerate(labels):
            where = "the forest" if grp is None else f"group {g}"
            for p in range(1, P + 1):
                rows.append(
                    Row(
                        f"old forest: period {p} old area of {where} >= "
                        f"{float(share):g} x {total[gi]:.6g} ha",
                        "old forest",
                        {j0 + gi * P + p - 1: -1.0},
                        -float(share) * float(total[gi]),
                        max(float(total[gi]), 1.0),
                    )
                )
    J = len(names)
    if ri:
        quant = sp.csr_matrix(
            (np.concatenate(vals), (np.concatenate(ri), np.concatenate(ci))), shape=(K, J)
        )
        quant.sum_duplicates()
    else:
        quant = sp.csr_matrix((K, J))
    return RowSet(rows=rows, names=names, quant=quant)


# ---- pre-computed problem --------------------------------------------------------------------
@dataclass
class Prep:
    """Pre-computed arrays shared by the solver components."""

    problem: PlanProblem
    rx: Prescriptions
    n: int
    P: int
    indptr: np.ndarray  # symmetric adjacency in CSR form
    indices: np.ndarray
    green: np.ndarray  # (n,) green-up periods (int)
    stand_of: np.ndarray  # (K,) stand of every prescription
    null: np.ndarray  # (n,) the no-harvest prescription of every stand
    allowed: np.ndarray  # (K,) bool: may be chosen (harvests of too-big stands removed)
    value: np.ndarray  # (K,) area x npv per ha
    harvest_mask: np.ndarray  # (K,) uint64 harvest periods
    open_mask: np.ndarray  # (K,) uint64 harvest-open periods
    fixed_open: np.ndarray  # (n, P) bool, initially open
    opening_area: np.ndarray
    max_opening: float | None
    unit: bool
    rows: RowSet = field(default_factory=lambda: RowSet([], [], sp.csr_matrix((0, 0))))

    @property
    def spatial(self) -> bool:
        """True when any spatial rule is on."""
        return self.max_opening is not None or self.unit

    @property
    def n_rx(self) -> int:
        """Number of prescriptions."""
        return len(self.stand_of)

    @cached_property
    def choice(self) -> np.ndarray:
        """(K,) bool: allowed and harvesting (a decision beyond the no-harvest default)."""
        return self.allowed & (self.harvest_mask != 0)

    @cached_property
    def has_choice(self) -> np.ndarray:
        """(n,) bool: the stand has an allowed prescription that harvests."""
        return np.bincount(self.stand_of[self.choice], minlength=self.n) > 0

    @property
    def n_vars(self) -> int:
        """Allowed harvesting prescriptions (the decision variables)."""
        return int(self.choice.sum())

    @cached_property
    def rel_value(self) -> np.ndarray:
        """(K,) value against the stand's no-harvest prescription."""
        return self.value - self.value[self.null][self.stand_of]

    @cached_property
    def row_deltas(self) -> np.ndarray:
        """(K, R) row coefficients against the stand's no-harvest prescription."""
        R = len(self.rows)
        out = np.zeros((self.n_rx, R))
        if R == 0:
            return out
        base = self.rows.coefs(self.null)
        chunk = 1 << 16
        for s in range(0, self.n_rx, chunk):
            ks = np.arange(s, min(s + chunk, self.n_rx))
            out[ks] = self.rows.coefs(ks) - base[self.stand_of[ks]]
        return out

    def empty_plan(self) -> np.ndarray:
        """The plan that harvests nothing."""
        return self.null.copy()

    def harvests_any(self, plan: np.ndarray) -> bool:
        """True when the plan harvests at least one stand."""
        return bool(np.any(self.harvest_mask[np.asarray(plan, dtype=np.int64)]))

    def neighbours(self, i: int) -> np.ndarray:
        """Neighbour positions of stand ``i``."""
        return self.indices[self.indptr[i] : self.indptr[i + 1]]

    def open_matrices(self, plan: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``(open, harvest_open)`` boolean ``(n, P)`` matrices of a plan."""
        hopen = mask_bits(self.open_mask[np.asarray(plan, dtype=np.int64)], self.P)
        return self.fixed_open | hopen, hopen

    def first_period(self, plan: np.ndarray) -> np.ndarray:
        """(n,) first harvest period per stand (0 = none)."""
        return first_period(self.rx, plan)


def prepare(problem: PlanProblem) -> Prep:
    """Check the problem and pre-compute adjacency, prescriptions, values and rows."""
    problem.validate()
    n, P = problem.n_stands, problem.periods
    rx = problem.rx()
    e = np.asarray(problem.edges, dtype=np.int64).reshape(-1, 2)
    if e.size:
        e = e[e[:, 0] != e[:, 1]]
        both = np.concatenate([e, e[:, ::-1]])
        adj = sp.coo_matrix(
            (np.ones(len(both), dtype=np.int8), (both[:, 0], both[:, 1])), shape=(n, n)
        ).tocsr()
        adj.sum_duplicates()
        indptr, indices = adj.indptr.astype(np.int64), adj.indices.astype(np.int64)
    else:
        indptr, indices = np.zeros(n + 1, dtype=np.int64), np.zeros(0, dtype=np.int64)
    stand_of = rx.stand_of
    hmask = np.asarray(rx.harvest_mask, dtype=np.uint64)
    from_periods = _or_by_prescription(
        rx, np.left_shift(_ONE, (np.asarray(rx.harvest_period, np.int64) - 1).astype(np.uint64))
    )
    if not np.array_equal(from_periods, hmask):
        bad = np.nonzero(from_periods != hmask)[0][:5]
        msg = f"Prescriptions.harvest_mask disagrees with harvest_period at prescriptions {bad}"
        raise ValueError(msg)
    oa = np.asarray(problem.opening_area_ha, dtype=np.float64)
    green = np.asarray(problem.green_up_periods, dtype=np.int64)
    allowed = np.ones(len(stand_of), dtype=bool)
    if problem.max_opening_ha is not None:
        # A single stand larger than the maximum opening can never be cut (it would be an
        # over-size opening with a new harvest in it) unless it never opens (G = 0).
        too_big = (oa > problem.max_opening_ha) & (green > 0)
        allowed &= ~(too_big[stand_of] & (hmask != 0))
    value = np.asarray(problem.area_ha, dtype=np.float64)[stand_of] * np.asarray(
        rx.npv_per_ha, dtype=np.float64
    )
    fixed = np.asarray(problem.initially_open, dtype=bool)
    return Prep(
        problem=problem,
        rx=rx,
        n=n,
        P=P,
        indptr=indptr,
        indices=indices,
        green=green,
        stand_of=stand_of,
        null=np.asarray(rx.stand_start[:-1], dtype=np.int64),
        allowed=allowed,
        value=value,
        harvest_mask=hmask,
        open_mask=open_masks(rx, green, P),
        fixed_open=fixed,
        opening_area=oa,
        max_opening=problem.max_opening_ha,
        unit=bool(problem.unit_restriction),
        rows=build_rows(problem, rx),
    )


# ---- spatial rules and the plan check ----------------------------------------------------------
def _edges_csr(prep: Prep) -> tuple[np.ndarray, np.ndarray]:
    rows = np.repeat(np.arange(prep.n), np.diff(prep.indptr))
    return rows, prep.indices


def spatial_breaches(
    prep: Prep, plan: np.ndarray, periods: list[int] | None = None
) -> list[tuple[int, np.ndarray]]:
    """Breaches of the spatial rules by a plan.

    Returns a list of ``(p, stands)`` with ``p`` the period column (0-based) and
    ``stands`` the positions of one offending group: an over-size connected open group
    containing a harvest-open stand, or (unit restriction) an adjacent open pair with a
    harvest-open stand.
    """
    if not prep.spatial:
        return []
    opn, hop = prep.open_matrices(plan)
    src, dst = _edges_csr(prep)
    out: list[tuple[int, np.ndarray]] = []
    n = prep.n
    for p in range(prep.P) if periods is None else periods:
        if not hop[:, p].any():
            continue
        o = opn[:, p]
        keep = o[src] & o[dst]
        if prep.unit:
            bad = keep & (hop[src, p] | hop[dst, p]) & (src < dst)
            for a, b in zip(src[bad], dst[bad], strict=True):
                out.append((p, np.array([a, b])))
        if prep.max_opening is None:
            continue
        g = sp.coo_matrix((np.ones(int(keep.sum())), (src[keep], dst[keep])), shape=(n, n))
        _, lab = connected_components(g, directed=False)
        area = np.bincount(lab, weights=np.where(o, prep.opening_area, 0.0), minlength=n)
        has_h = np.bincount(lab, weights=hop[:, p].astype(float), minlength=n) > 0
        bad_c = np.nonzero((area > prep.max_opening) & has_h)[0]
        for c in bad_c:
            out.append((p, np.nonzero((lab == c) & o)[0]))
    return out


def check_plan(prep: Prep, plan: np.ndarray) -> list[str]:
    """Every rule a plan breaks, as readable messages (empty list = plan is legal).

    Checks, in float64 with the real coefficients: every stand holds one of its own
    prescriptions, the rows (flow, targets, ending inventory, old forest) and the spatial
    rules.
    """
    pr = prep.problem
    msgs: list[str] = []
    k = np.asarray(plan)
    if k.shape != (prep.n,) or not np.issubdtype(k.dtype, np.integer):
        return ["plan has the wrong shape or type"]
    k = k.astype(np.int64)
    start = prep.rx.stand_start
    bad = np.nonzero((k < start[:-1]) | (k >= start[1:]))[0]
    if bad.size:
        return [f"not a prescription of the stand: stands {list(pr.stand_ids[bad][:10])}"]
    lhs = prep.rows.lhs(k)
    for r, row in enumerate(prep.rows):
        if lhs[r] > row.rhs + ROW_RTOL * max(abs(row.rhs), row.scale_ref):
            msgs.append(f"{row.name}: broken by {lhs[r] - row.rhs:.6g}")
    for p, grp in spatial_breaches(prep, k):
        kind = (
            "unit restriction"
            if prep.unit
            and len(grp) == 2
            and (prep.max_opening is None or prep.opening_area[grp].sum() <= prep.max_opening)
            else "opening size"
        )
        msgs.append(
            f"{kind}: period {p + 1}, stands {list(pr.stand_ids[grp][:10])}, "
            f"{prep.opening_area[grp].sum():.2f} ha"
        )
    return msgs


def is_connected(prep: Prep, members: list[int]) -> bool:
    """True when ``members`` induce a connected subgraph of the stand adjacency."""
    if len(members) <= 1:
        return True
    ms = set(members)
    seen = {members[0]}
    stack = [members[0]]
    while stack:
        i = stack.pop()
        for j in prep.neighbours(i):
            j = int(j)
            if j in ms and j not in seen:
                seen.add(j)
                stack.append(j)
    return len(seen) == len(ms)


def extract_covers(
    prep: Prep, p: int, group: np.ndarray, hop: np.ndarray, max_seeds: int = 6
) -> list[frozenset[int]]:
    """Minimal over-size connected subsets of a breaching group (lazy cover constraints).

    Grows a set from a harvest-open seed inside ``group`` (preferring stands that are
    open from the start, which cost nothing in the constraint, then large stands) until
    its area exceeds the maximum, then drops every stand whose removal keeps the set
    connected, over-size and holding a harvest-open stand. Each result ``S`` yields the
    valid inequality "not every stand of ``S`` open" in every period.
    """
    mx = prep.max_opening
    grp = [int(i) for i in group]
    if mx is None or (len(grp) == 2 and prep.opening_area[grp].sum() <= mx):
        return [frozenset(grp)]  # unit restriction pair
    gset = set(grp)
    fixed = prep.fixed_open[:, p]
    seeds = [i for i in grp if hop[i, p]]
    # Deterministic but varied seeds: largest first, then spread.
    seeds.sort(key=lambda i: -prep.opening_area[i])
    if len(seeds) > max_seeds:
        step = len(seeds) / max_seeds
        seeds = [seeds[int(k * step)] for k in range(max_seeds)]
    out: list[frozenset[int]] = []
    for s in seeds:
        members = [s]
        inset = {s}
        area = prep.opening_area[s]
        while area <= mx:
            best, best_key = -1, None
            for i in members:
                for j in prep.neighbours(i):
                    j = int(j)
                    if j in gset and j not in inset:
                        key = (not fixed[j], -prep.opening_area[j])
                        if best_key is None or key < best_key:
                            best, best_key = j, key
            if best < 0:
                break
            members.append(best)
            inset.add(best)
            area += prep.opening_area[best]
        if area <= mx:
            continue
        # Prune: free stands first (they make the constraint longer), small ones first.
        order = sorted(members, key=lambda i: (bool(fixed[i]), prep.opening_area[i]))
        for i in order:
            if len(members) == 1:
                break
            rest = [j for j in members if j != i]
            if prep.opening_area[rest].sum() <= mx:
                continue
            if not any(hop[j, p] for j in rest):
                continue
            if is_connected(prep, rest):
                members = rest
        out.append(frozenset(members))
    return list(dict.fromkeys(out))


def window_covers(
    prep: Prep, free: np.ndarray, open_any: np.ndarray, max_sets: int = 100_000
) -> tuple[list[frozenset[int]], bool]:
    """Every minimal over-size connected stand set that holds a stand of ``free``.

    ``open_any`` (n,) marks the stands outside ``free`` that are open in some period (in
    the fixed part of the plan or from the start); the others can never be open and take
    no part. A set is minimal when no smaller connected subset is over-size (such subsets
    give their own, stronger clause). Sets are grown from each free stand by adding one
    neighbour at a time until the area exceeds the maximum, so every minimal set is
    reached; each set is visited once.

    Returns the sets and ``True`` when all were found (``False`` when ``max_sets`` grown
    sets were visited first: the rest are left to the lazy rounds).

    Examples
    --------
    A path of three 15 ha stands with a 40 ha maximum: only the whole path is over-size.

    >>> import numpy as np
    >>> from spatialplan.problem import FlowRules, PlanProblem
    >>> from spatialplan.synthetic import synthetic_prescriptions
    >>> age = np.array([60.0, 60.0, 60.0])
    >>> rx = synthetic_prescriptions(age, lambda i, a: 5.0 * a, 2, 10.0, 40.0, 1, 0.04, 50.0)
    >>> pr = PlanProblem(
    ...     stand_ids=np.array(["a", "b", "c"], dtype=object), area_ha=np.full(3, 15.0),
    ...     opening_area_ha=np.full(3, 15.0), age_start_yr=age,
    ...     eligible=np.ones((3, 2), bool), volume_m3_ha=np.full((3, 2), 300.0),
    ...     npv_per_ha=np.full((3, 2), 1000.0), green_up_periods=np.full(3, 1),
    ...     initially_open=np.zeros((3, 2), bool), edges=np.array([[0, 1], [1, 2]]),
    ...     periods=2, period_length_yr=10.0, max_opening_ha=40.0,
    ...     flow=FlowRules(flow_tolerance=None), prescriptions=rx)
    >>> prep = prepare(pr)
    >>> sets, complete = window_covers(prep, np.array([0]), np.array([False, True, True]))
    >>> [sorted(c) for c in sets], complete
    ([[0, 1, 2]], True)

    Stands outside the window that are never open take no part:

    >>> window_covers(prep, np.array([0]), np.array([False, True, False]))
    ([], True)
    """
    take = np.asarray(open_any, dtype=bool).copy()
    take[np.asarray(free, dtype=np.int64)] = True
    found, done = covers_from_roots(prep, free, take, max_sets)
    return found, bool(done.size == np.asarray(free).size)


def covers_from_roots(
    prep: Prep,
    roots: np.ndarray,
    take: np.ndarray,
    max_sets: int = 100_000,
    done: np.ndarray | None = None,
) -> tuple[list[frozenset[int]], np.ndarray]:
    """Minimal over-size connected sets of ``take`` stands holding a stand of ``roots``.

    Roots are handled one after the other; the sets grown from a root avoid the roots
    already finished (here or, through ``done`` (n,) bool, in earlier calls): a set holding
    a finished root was listed with that root. Stops after ``max_sets`` grown sets.

    Returns the sets found and the roots finished (every minimal set holding one of them
    and no earlier finished root is in the list).
    """
    mx = prep.max_opening
    roots = np.asarray(roots, dtype=np.int64)
    if mx is None:
        return [], roots
    oa = prep.opening_area
    ok = np.asarray(take, dtype=bool).copy()
    if done is not None:
        ok &= ~done
    nbr = prep.neighbours
    seen = 0
    found: list[frozenset[int]] = []
    finished: list[int] = []
    for r in roots.tolist():
        if not ok[r]:
            finished.append(r)
            continue
        visited: set[frozenset[int]] = set()
        stack = [(frozenset((r,)), float(oa[r]))]
        while stack:
            members, area = stack.pop()
            if area > mx:
                # Minimal: every connected set left after dropping one stand is at or
                # under the maximum (then so is every smaller connected subset, as each
                # grows back to the set one neighbour at a time).
                ms = list(members)
                if all(
                    area - oa[u] <= mx or not is_connected(prep, [j for j in ms if j != u])
                    for u in ms
                ):
                    found.append(members)
                continue
            front = {int(j) for i in members for j in nbr(i) if ok[j]} - members
            for v in sorted(front):
                grown = members | {v}
                if grown not in visited:
                    visited.add(grown)
                    stack.append((grown, area + float(oa[v])))
            if seen + len(visited) > max_sets:
                return found, np.array(finished, dtype=np.int64)
        seen += len(visited)
        finished.append(r)
        ok[r] = False
    return found, np.array(finished, dtype=np.int64)
