"""Shared pieces of the scheduler: rule rows, openness, the float64 plan check, covers.

Everything here works on a :class:`~spatialplan.problem.PlanProblem` and a plan given as
an ``(n,)`` integer array ``period`` (0 = not harvested, else ``1 .. P``).

Non-spatial rules (flow, targets, ending inventory) are all written as *rows*: one row is
``sum_i C[i, period_i] <= rhs`` with ``C`` an ``(n, P + 1)`` matrix whose column 0 is the
"not harvested" choice. The LP, the CP-SAT model, the heuristic and the final check all read
the same rows, so they cannot disagree about what a rule means.

Spatial rules follow the openness convention of :mod:`spatialplan.problem`: a stand
harvested in period ``q`` is *harvest-open* in ``q .. q + G - 1``; a stand in
``initially_open`` is open whatever the plan does. Within a period, a connected group of
open stands whose opening area exceeds ``max_opening_ha`` breaks the area restriction when
at least one of its stands is harvest-open (a group made only of stands that were already
open at the start is a pre-existing condition, not a breach of the plan). With the unit
restriction, two adjacent open stands break it when at least one is harvest-open.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from spatialplan.problem import PlanProblem

__all__ = [
    "Prep",
    "Row",
    "build_rows",
    "check_plan",
    "extract_covers",
    "plan_npv",
    "spatial_breaches",
]

# Relative slack allowed when re-checking a row in float64: absorbs summation-order noise
# only (the integer model is conservative, so real plans keep a larger margin).
ROW_RTOL = 1e-9


@dataclass
class Row:
    """One linear rule ``sum_i C[i, period_i] <= rhs`` over plan columns ``0 .. P``.

    ``terms`` maps a plan column (0 = not harvested) to an ``(n,)`` coefficient vector;
    columns that are absent have coefficient 0.
    """

    name: str
    family: str  # "flow", "targets" or "ending"
    terms: dict[int, np.ndarray]
    rhs: float
    scale_ref: float = 1.0  # size of typical left-hand side values, for tolerances

    def lhs(self, period: np.ndarray, absolute: bool = False) -> float:
        """Left-hand side of the row for a plan (or the sum of the terms' magnitudes)."""
        total = 0.0
        for col, coef in self.terms.items():
            sel = period == col
            if sel.any():
                c = coef[sel]
                total += float(np.sum(np.abs(c) if absolute else c, dtype=np.float64))
        return total

    def x_coefs(self, n: int, periods: int) -> tuple[np.ndarray, float]:
        """Coefficients on harvest variables ``x[i, p]`` and the constant part.

        Returns ``(D, const)`` with ``D`` of shape ``(n, P)`` such that the row reads
        ``sum D * x + const <= rhs`` for any 0/1 ``x`` with at most one 1 per stand.
        """
        c0 = self.terms.get(0)
        base = np.zeros(n) if c0 is None else c0
        d = np.zeros((n, periods))
        for col, coef in self.terms.items():
            if col > 0:
                d[:, col - 1] += coef
        d -= base[:, None]
        return d, float(np.sum(base))


def build_rows(problem: PlanProblem) -> list[Row]:
    """All non-spatial rules of a problem as rows (see :class:`Row`)."""
    n, P = problem.n_stands, problem.periods
    fr = problem.flow
    a = np.asarray(problem.area_ha, dtype=np.float64)
    vol = a[:, None] * np.asarray(problem.volume_m3_ha, dtype=np.float64)  # (n, P)
    vol = np.where(problem.eligible, vol, 0.0)
    area = np.where(problem.eligible, a[:, None], 0.0)
    vref = max(float(vol.sum()) / max(P, 1), 1.0)
    aref = max(float(area.sum()) / max(P, 1), 1.0)
    rows: list[Row] = []
    for p in range(1, P):  # periods p -> p + 1 (plan columns)
        if fr.flow_tolerance is not None:
            t = float(fr.flow_tolerance)
            rows.append(
                Row(
                    f"flow: period {p + 1} volume at most {1 + t:g} x period {p}",
                    "flow",
                    {p + 1: vol[:, p], p: -(1 + t) * vol[:, p - 1]},
                    0.0,
                    vref,
                )
            )
            rows.append(
                Row(
                    f"flow: period {p + 1} volume at least {1 - t:g} x period {p}",
                    "flow",
                    {p: (1 - t) * vol[:, p - 1], p + 1: -vol[:, p]},
                    0.0,
                    vref,
                )
            )
        if fr.non_declining:
            rows.append(
                Row(
                    f"non-declining: period {p + 1} volume at least period {p}",
                    "flow",
                    {p: vol[:, p - 1].copy(), p + 1: -vol[:, p]},
                    0.0,
                    vref,
                )
            )
    for p in range(1, P + 1):
        if fr.volume_max_m3 is not None:
            rows.append(
                Row(
                    f"period {p} volume <= {fr.volume_max_m3:g} m3",
                    "targets",
                    {p: vol[:, p - 1]},
                    float(fr.volume_max_m3),
                    vref,
                )
            )
        if fr.volume_min_m3 is not None:
            rows.append(
                Row(
                    f"period {p} volume >= {fr.volume_min_m3:g} m3",
                    "targets",
                    {p: -vol[:, p - 1]},
                    -float(fr.volume_min_m3),
                    vref,
                )
            )
        if fr.area_max_ha is not None:
            rows.append(
                Row(
                    f"period {p} area <= {fr.area_max_ha:g} ha",
                    "targets",
                    {p: area[:, p - 1]},
                    float(fr.area_max_ha),
                    aref,
                )
            )
        if fr.area_min_ha is not None:
            rows.append(
                Row(
                    f"period {p} area >= {fr.area_min_ha:g} ha",
                    "targets",
                    {p: -area[:, p - 1]},
                    -float(fr.area_min_ha),
                    aref,
                )
            )
    if fr.ending_volume_min_m3 is not None:
        ev = problem.ending_volume_m3_ha
        if ev is None:
            msg = "FlowRules.ending_volume_min_m3 needs PlanProblem.ending_volume_m3_ha"
            raise ValueError(msg)
        ev = a[:, None] * np.asarray(ev, dtype=np.float64)
        rows.append(
            Row(
                f"ending volume >= {fr.ending_volume_min_m3:g} m3",
                "ending",
                {c: -ev[:, c] for c in range(P + 1)},
                -float(fr.ending_volume_min_m3),
                max(float(ev[:, 0].sum()), 1.0),
            )
        )
    if fr.ending_mean_age_min_yr is not None:
        eage = problem.ending_age_yr
        if eage is None:
            msg = "FlowRules.ending_mean_age_min_yr needs PlanProblem.ending_age_yr"
            raise ValueError(msg)
        m = float(fr.ending_mean_age_min_yr)
        w = a[:, None] * (np.asarray(eage, dtype=np.float64) - m)
        rows.append(
            Row(
                f"ending mean age >= {m:g} yr",
                "ending",
                {c: -w[:, c] for c in range(P + 1)},
                0.0,
                max(float(np.abs(a[:, None] * eage).sum()) / max(n, 1), 1.0),
            )
        )
    return rows


def plan_npv(problem: PlanProblem, period: np.ndarray) -> float:
    """Net present value of a plan in float64 from the problem arrays."""
    idx = np.nonzero(period > 0)[0]
    if idx.size == 0:
        return 0.0
    vals = (
        np.asarray(problem.area_ha, dtype=np.float64)[idx]
        * np.asarray(problem.npv_per_ha, dtype=np.float64)[idx, period[idx] - 1]
    )
    return float(np.sum(vals))


@dataclass
class Prep:
    """Pre-computed arrays shared by the solver components."""

    problem: PlanProblem
    n: int
    P: int
    indptr: np.ndarray  # symmetric adjacency in CSR form
    indices: np.ndarray
    green: np.ndarray  # (n,) green-up periods (int)
    eligible: np.ndarray  # (n, P) bool, stands too big to be an opening removed
    value: np.ndarray  # (n, P) area x npv per ha
    fixed_open: np.ndarray  # (n, P) bool, initially open
    opening_area: np.ndarray
    max_opening: float | None
    unit: bool
    rows: list[Row] = field(default_factory=list)

    @property
    def spatial(self) -> bool:
        """True when any spatial rule is on."""
        return self.max_opening is not None or self.unit

    def neighbours(self, i: int) -> np.ndarray:
        """Neighbour positions of stand ``i``."""
        return self.indices[self.indptr[i] : self.indptr[i + 1]]

    def open_matrices(self, period: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``(open, harvest_open)`` boolean ``(n, P)`` matrices of a plan."""
        hopen = harvest_open(period, self.green, self.P)
        return self.fixed_open | hopen, hopen


def harvest_open(period: np.ndarray, green: np.ndarray, P: int) -> np.ndarray:
    """``(n, P)`` bool: stand harvested in ``q`` is open in ``q .. q + G - 1``."""
    cols = np.arange(1, P + 1)[None, :]
    q = period[:, None]
    return (q > 0) & (cols >= q) & (cols <= q + green[:, None] - 1)


def prepare(problem: PlanProblem) -> Prep:
    """Check the problem and pre-compute adjacency, values and rows."""
    problem.validate()
    n, P = problem.n_stands, problem.periods
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
    elig = np.asarray(problem.eligible, dtype=bool).copy()
    oa = np.asarray(problem.opening_area_ha, dtype=np.float64)
    green = np.asarray(problem.green_up_periods, dtype=np.int64)
    if problem.max_opening_ha is not None:
        # A single stand larger than the maximum opening can never be cut (it would be an
        # over-size opening with a new harvest in it) unless it never opens (G = 0).
        too_big = (oa > problem.max_opening_ha) & (green > 0)
        elig[too_big] = False
    value = np.asarray(problem.area_ha, dtype=np.float64)[:, None] * np.asarray(
        problem.npv_per_ha, dtype=np.float64
    )
    value = np.where(elig, value, 0.0)
    return Prep(
        problem=problem,
        n=n,
        P=P,
        indptr=indptr,
        indices=indices,
        green=green,
        eligible=elig,
        value=value,
        fixed_open=np.asarray(problem.initially_open, dtype=bool),
        opening_area=oa,
        max_opening=problem.max_opening_ha,
        unit=bool(problem.unit_restriction),
        rows=build_rows(problem),
    )


def _edges_csr(prep: Prep) -> tuple[np.ndarray, np.ndarray]:
    rows = np.repeat(np.arange(prep.n), np.diff(prep.indptr))
    return rows, prep.indices


def spatial_breaches(
    prep: Prep, period: np.ndarray, periods: list[int] | None = None
) -> list[tuple[int, np.ndarray]]:
    """Breaches of the spatial rules by a plan.

    Returns a list of ``(p, stands)`` with ``p`` the period column (0-based) and
    ``stands`` the positions of one offending group: an over-size connected open group
    containing a harvest-open stand, or (unit restriction) an adjacent open pair with a
    harvest-open stand.
    """
    if not prep.spatial:
        return []
    opn, hop = prep.open_matrices(period)
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


def check_plan(prep: Prep, period: np.ndarray) -> list[str]:
    """Every rule a plan breaks, as readable messages (empty list = plan is legal).

    Checks, in float64 with the real coefficients: harvest only in eligible cells, the
    rows (flow, targets, ending inventory) and the spatial rules.
    """
    pr = prep.problem
    msgs: list[str] = []
    period = np.asarray(period, dtype=np.int64)
    if period.shape != (prep.n,) or period.min(initial=0) < 0 or period.max(initial=0) > prep.P:
        return ["plan has the wrong shape or period numbers"]
    h = np.nonzero(period > 0)[0]
    bad = h[~np.asarray(pr.eligible, dtype=bool)[h, period[h] - 1]]
    if bad.size:
        msgs.append(f"harvest in an ineligible period: stands {list(pr.stand_ids[bad][:10])}")
    for r in prep.rows:
        lhs = r.lhs(period)
        if lhs > r.rhs + ROW_RTOL * max(abs(r.rhs), r.scale_ref):
            msgs.append(f"{r.name}: broken by {lhs - r.rhs:.6g}")
    for p, grp in spatial_breaches(prep, period):
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


def _connected(prep: Prep, members: list[int]) -> bool:
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
            if _connected(prep, rest):
                members = rest
        out.append(frozenset(members))
    return list(dict.fromkeys(out))
