"""The aspatial upper bound: Model I as a linear program solved with HiGHS.

Model I (Johnson & Scheurman 1977, Operations Research 25(1):153-168, from memory) gives
one variable per prescription, ``0 <= x_k <= 1``, and one convexity row per stand
(``sum_k x_k = 1`` over the stand's prescriptions, the no-harvest one included). Here it
carries every non-spatial rule of the problem (flow, targets, ending inventory, old-forest
retention) and no spatial rule, so its optimum is an upper bound on the NPV of every legal
plan.

The rules read a few *quantities* (harvest volume per period, ...; see
:class:`~spatialplan.schedule.model.RowSet`). Each quantity is a free column defined by an
accounting row ``sum_k Q[k, j] x_k - q_j = 0`` and the rules are rows over the ``q_j``,
so the matrix holds one entry per prescription (its convexity row) plus one per harvest
and quantity it feeds: no dense ``(K, P)`` block, about 100 bytes per prescription in all.
"""

from __future__ import annotations

import os
import sys
import time
from dataclasses import dataclass

import highspy
import numpy as np
import scipy.sparse as sp

from spatialplan.problem import PlanProblem, Prescriptions
from spatialplan.schedule.model import Prep, RowSet, build_rows, is_connected, mask_bits

__all__ = ["CoverLpResult", "LpResult", "cover_lp_bound", "lp_bound", "solve_lp"]


@dataclass(frozen=True)
class LpResult:
    """Result of the aspatial LP.

    Attributes
    ----------
    value
        Optimal objective (NPV upper bound, currency); ``nan`` unless ``status`` is
        ``"optimal"``.
    x
        (n, P) fractional harvest shares by period: the sum of the shares of the stand's
        prescriptions that harvest in that period.
    status
        ``"optimal"``, ``"infeasible"`` or another HiGHS model status in lower case.
    period_volume_m3
        (P,) harvest volume of the LP solution by period.
    price
        (K,) LP "profit" of each prescription: its objective minus the quantities' dual
        prices times its contributions (reduced cost plus the stand's convexity dual);
        ``-inf`` for prescriptions left out. The heuristic ranks prescriptions by it.
    x_rx
        (K,) share of each prescription (0 for those left out).
    columns, rounds
        Prescription columns HiGHS held at the end and HiGHS calls (column generation).
    """

    value: float
    x: np.ndarray
    status: str
    period_volume_m3: np.ndarray
    price: np.ndarray | None = None
    x_rx: np.ndarray | None = None
    columns: int = 0
    rounds: int = 1


_BANNER_SILENCED = False


def _new_highs() -> highspy.Highs:
    """A HiGHS instance that prints nothing.

    highspy 1.16 prints its banner to the C-level stdout when the first instance of a
    process is made, before any option can be set; stdout is pointed at the null device
    for that one construction.
    """
    global _BANNER_SILENCED
    if _BANNER_SILENCED:
        h = highspy.Highs()
    else:
        _BANNER_SILENCED = True
        try:
            sys.stdout.flush()
            fd = os.dup(1)
        except (OSError, ValueError):
            fd = -1
        if fd < 0:
            h = highspy.Highs()
        else:
            try:
                with open(os.devnull, "w") as null:
                    os.dup2(null.fileno(), 1)
                    try:
                        h = highspy.Highs()
                    finally:
                        os.dup2(fd, 1)
            finally:
                os.close(fd)
    h.setOptionValue("output_flag", False)
    h.setOptionValue("log_to_console", False)
    return h


# Above this many prescriptions the LP is solved by column generation.
CG_MIN_COLUMNS = 50_000
CG_START = 3  # best prescriptions per stand (by objective) in the first restricted LP
CG_ADD = 3  # most attractive prescriptions per stand added per round
CG_TOL = 1e-9  # reduced cost (relative to the largest objective coefficient) worth adding


def _x_columns(
    rows: RowSet, stand_of: np.ndarray, cols: np.ndarray, n: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Column-wise arrays of the ``x_k`` columns, ``k in cols``, built without copies.

    A column holds a 1 in its stand's convexity row, then its contributions in the
    accounting rows ``n + j``. Returns ``(start, index, value)`` with ``len(cols) + 1``
    starts from 0.
    """
    J = len(rows.names)
    nx = len(cols)
    q = rows.quant[cols] if J else sp.csr_matrix((nx, 0))
    q.sort_indices()
    start = np.zeros(nx + 1, dtype=np.int64)
    np.cumsum(1 + np.diff(q.indptr), out=start[1:])
    nnz = int(start[-1])
    index = np.empty(nnz, dtype=np.int32)
    value = np.empty(nnz, dtype=np.float64)
    head = start[:-1]
    index[head] = stand_of[cols]
    value[head] = 1.0
    rest = np.ones(nnz, dtype=bool)
    rest[head] = False
    index[rest] = n + q.indices
    value[rest] = q.data
    return start, index, value


def _q_columns(rows: RowSet, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Column-wise arrays of the quantity columns: -1 in the accounting row ``n + j``,
    then the rule coefficients in rows ``n + J + r``."""
    J = len(rows.names)
    mat = rows.matrix  # (R, J), small
    index: list[int] = []
    value: list[float] = []
    start = [0]
    for j in range(J):
        index.append(n + j)
        value.append(-1.0)
        for r in np.nonzero(mat[:, j])[0].tolist():
            index.append(n + J + r)
            value.append(float(mat[r, j]))
        start.append(len(index))
    return (
        np.asarray(start, dtype=np.int64),
        np.asarray(index, dtype=np.int32),
        np.asarray(value, dtype=np.float64),
    )


def _best_per_stand(stand: np.ndarray, score: np.ndarray, count: int) -> np.ndarray:
    """Positions of the ``count`` highest scores of every stand."""
    order = np.lexsort((-score, stand))
    s = stand[order]
    first = np.searchsorted(s, s, side="left")
    return order[np.arange(len(order)) - first < count]


def _build_highs(
    rows: RowSet, stand_of: np.ndarray, c: np.ndarray, active: np.ndarray, n: int
) -> highspy.Highs:
    """A HiGHS instance holding Model I over the prescriptions ``active``.

    Columns: ``x`` for ``active``, then the quantity columns. Rows: convexity (``n``),
    accounting (``J``), rules (``R``).
    """
    J, R = len(rows.names), len(rows)
    xs_, xi, xv = _x_columns(rows, stand_of, active, n)
    qs, qi, qv = _q_columns(rows, n)
    inf = highspy.kHighsInf
    lp = highspy.HighsLp()
    lp.num_col_ = len(active) + J
    lp.num_row_ = n + J + R
    lp.col_cost_ = np.concatenate([c[active], np.zeros(J)])
    lp.col_lower_ = np.concatenate([np.zeros(len(active)), np.full(J, -inf)])
    lp.col_upper_ = np.concatenate([np.ones(len(active)), np.full(J, inf)])
    lp.row_lower_ = np.concatenate([np.ones(n), np.zeros(J), np.full(R, -inf)])
    lp.row_upper_ = np.concatenate([np.ones(n), np.zeros(J), rows.rhs])
    lp.a_matrix_.format_ = highspy.MatrixFormat.kColwise
    start = np.concatenate([xs_[:-1], qs + xs_[-1]])
    if start[-1] >= 2**31:
        msg = "the LP has more than 2**31 matrix entries"
        raise ValueError(msg)
    lp.a_matrix_.start_ = start.astype(np.int32)
    lp.a_matrix_.index_ = np.concatenate([xi, qi])
    lp.a_matrix_.value_ = np.concatenate([xv, qv])
    del xs_, xi, xv, start
    lp.sense_ = highspy.ObjSense.kMaximize
    h = _new_highs()
    h.setOptionValue("threads", 1)
    h.passModel(lp)
    return h


def solve_lp(
    problem: PlanProblem,
    rows: RowSet | None = None,
    allowed: np.ndarray | None = None,
    objective: np.ndarray | None = None,
    time_limit_s: float | None = None,
    rx: Prescriptions | None = None,
) -> LpResult:
    """Solve Model I with the given rows (default: the problem's own rules).

    Up to ``CG_MIN_COLUMNS`` prescriptions the whole LP goes to HiGHS. Above, it is
    solved by column generation (Dantzig-Wolfe pricing, from memory): HiGHS holds the
    no-harvest and the best few prescriptions of every stand; after each solve every
    other prescription is priced with the duals (reduced cost ``c_k - y_i - sum_j Q[k, j]
    u_j``) and the most attractive few per stand are added, until none has a positive
    reduced cost. The value returned adds ``sum_i max(0, max_k rc_k)`` over the
    prescriptions left out (the Lagrangian bound: raising each convexity dual by it
    makes the duals feasible for the full LP), so it is a valid upper bound in every
    case; it is the LP optimum when the pricing finds nothing.

    Parameters
    ----------
    problem
        The instance.
    rows
        Rule rows (defaults to :func:`~spatialplan.schedule.model.build_rows`).
    allowed
        (K,) prescriptions that get a variable (default all; the no-harvest ones must
        stay).
    objective
        (K,) objective coefficients (defaults to area x npv per ha); pass zeros for a
        pure feasibility check.
    time_limit_s
        Time limit of the HiGHS calls together.
    rx
        The prescriptions (default ``problem.rx()``).
    """
    t_end = None if time_limit_s is None else time.perf_counter() + float(time_limit_s)
    n, P = problem.n_stands, problem.periods
    rx = problem.rx() if rx is None else rx
    rows = build_rows(problem, rx) if rows is None else rows
    K = rx.n_prescriptions
    stand_of = rx.stand_of
    area = np.asarray(problem.area_ha, dtype=np.float64)
    if objective is None:
        objective = area[stand_of] * np.asarray(rx.npv_per_ha, dtype=np.float64)
    c = np.asarray(objective, dtype=np.float64)
    cols = np.arange(K) if allowed is None else np.nonzero(np.asarray(allowed, dtype=bool))[0]
    J = len(rows.names)
    if len(cols) > CG_MIN_COLUMNS:
        nulls = np.asarray(rx.stand_start[:-1])
        rest = cols[~np.isin(cols, nulls)]
        active = np.union1d(
            np.intersect1d(cols, nulls), rest[_best_per_stand(stand_of[rest], c[rest], CG_START)]
        )
    else:
        active = cols
    h = _build_highs(rows, stand_of, c, active, n)
    hcol = np.concatenate([active, np.full(J, -1)])  # prescription of every HiGHS column
    is_active = np.zeros(K, dtype=bool)
    is_active[active] = True
    tol = CG_TOL * max(float(np.abs(c[cols]).max(initial=0.0)), 1.0)
    lagrange = 0.0
    rounds = 0
    while True:
        if t_end is not None:
            h.setOptionValue("time_limit", max(t_end - time.perf_counter(), 0.01))
        h.run()
        rounds += 1
        status = h.modelStatusToString(h.getModelStatus()).lower()
        if status != "optimal" or is_active[cols].all():
            if status == "infeasible" and not is_active[cols].all():
                new = cols[~is_active[cols]]  # a restricted LP proves nothing: add all
            else:
                break
        else:
            y = np.asarray(h.getSolution().row_dual)
            out = cols[~is_active[cols]]
            rc = c[out] - y[stand_of[out]] - (rows.quant[out] @ y[n : n + J] if J else 0.0)
            pos = rc > tol
            if not pos.any():
                best = np.zeros(n)
                np.maximum.at(best, stand_of[out], rc)
                lagrange = float(best.sum())
                break
            out, rc = out[pos], rc[pos]
            new = out[_best_per_stand(stand_of[out], rc, CG_ADD)]
        new = np.sort(new)
        ns, ni, nv = _x_columns(rows, stand_of, new, n)
        h.addCols(
            len(new),
            c[new],
            np.zeros(len(new)),
            np.ones(len(new)),
            len(ni),
            ns[:-1].astype(np.int32),
            ni,
            nv,
        )
        hcol = np.concatenate([hcol, new])
        is_active[new] = True
    x_rx = np.zeros(K)
    price = None
    if status == "optimal":
        solution = h.getSolution()
        xcol = hcol >= 0
        x_rx[hcol[xcol]] = np.clip(np.asarray(solution.col_value)[xcol], 0.0, 1.0)
        value = float(h.getInfo().objective_function_value) + lagrange
        # The prescription's objective net of the quantities' dual prices (its reduced
        # cost plus its stand's convexity dual; HiGHS: col_dual = c - A^T y).
        y = np.asarray(solution.row_dual)
        price = np.full(K, -np.inf)
        price[cols] = c[cols] - (rows.quant[cols] @ y[n : n + J] if J else 0.0)
    else:
        value = float("nan")
    del h
    # Harvest shares and volumes by period, from the harvest arrays.
    hk = np.repeat(np.arange(K), np.diff(rx.harvest_start))
    hp = np.asarray(rx.harvest_period, dtype=np.int64) - 1
    xs = x_rx[hk]
    x = np.bincount(stand_of[hk] * P + hp, weights=xs, minlength=n * P).reshape(n, P)
    hv = area[stand_of[hk]] * np.asarray(rx.harvest_volume_m3_ha, dtype=np.float64) * xs
    vol = np.bincount(hp, weights=hv, minlength=P)[:P]
    return LpResult(
        value=value,
        x=x,
        status=status,
        period_volume_m3=vol,
        price=price,
        x_rx=x_rx,
        columns=int(is_active[cols].sum()),
        rounds=rounds,
    )


def lp_bound(problem: PlanProblem) -> LpResult:
    """Aspatial upper bound on NPV: Model I without spatial rules, as an LP (HiGHS).

    Parameters
    ----------
    problem
        The instance; its flow, target, ending-inventory and old-forest rules are
        included, and its prescriptions (``problem.rx()``) are the columns.

    Returns
    -------
    LpResult
        Value, harvest shares ``x`` (n, P), prescription shares ``x_rx`` and status.
    """
    problem.validate()
    return solve_lp(problem)


# ---- the cover LP: Model I with the opening rule as cover inequalities -----------------------
# The cover LP holds every allowed prescription (no column generation) up to this many;
# 64,000 (the demo, 20 periods with re-harvest) solve in about a second.
COVER_MAX_COLUMNS = 250_000
COVER_VIOLATION = 1e-4  # how far a cover must be broken by the LP solution to be added
COVER_MAX_PER_ROUND = 150  # covers added per period and round at most (the most broken)


@dataclass(frozen=True)
class CoverLpResult:
    """Result of :func:`cover_lp_bound`.

    Attributes
    ----------
    value
        Upper bound on the NPV of every legal plan (the last LP optimum with the covers
        added so far); ``nan`` unless ``status`` is ``"optimal"`` or ``"time_limit"``.
    status
        ``"optimal"`` (no violated cover left), ``"time_limit"`` (budget spent; ``value``
        is still a valid bound), ``"skipped"`` (too many prescriptions for the full LP)
        or the HiGHS status of the first solve when it failed.
    lp_value
        Optimum of the first LP (Model I over the allowed prescriptions, no cover).
    rounds, covers, seconds
        HiGHS solves, cover rows added, wall time.
    """

    value: float
    status: str
    lp_value: float
    rounds: int
    covers: int
    seconds: float


def separate_covers(
    prep: Prep, openness: np.ndarray, p: int, limit: int = COVER_MAX_PER_ROUND
) -> list[list[int]]:
    """Minimal over-size connected stand sets whose cover inequality ``openness`` breaks.

    ``openness`` is the ``(n, P)`` fractional openness of an LP solution (1 where a stand
    is open from the start). A set ``S`` breaks its cover ``sum_S o[i, p] <= |S| - 1`` when
    its total *closedness* ``sum_S (1 - o[i, p])`` is below 1. From every stand that may be
    harvest-open in ``p``, in decreasing openness, a set is grown by adding the neighbour
    with the least closedness (larger area first on ties) until it is over-size, and
    abandoned as soon as its closedness reaches 1; then every stand whose removal keeps it
    connected, over-size and holding a stand not open from the start is dropped (most
    closed first). With the unit restriction every pair of adjacent stands is over-size.
    The ``limit`` most broken sets are returned, most broken first.
    """
    mx = prep.max_opening
    oa = prep.opening_area
    o = openness[:, p]
    fixed = prep.fixed_open[:, p]
    closed = 1.0 - o
    indptr, indices = prep.indptr, prep.indices
    eps = 1e-9

    def oversize(members: list[int], area: float) -> bool:
        return (prep.unit and len(members) >= 2) or (mx is not None and area > mx)

    seeds = np.nonzero(~fixed & (o > eps))[0]
    seeds = seeds[np.argsort(-o[seeds], kind="stable")]
    found: list[list[int]] = []
    seen: set[frozenset[int]] = set()
    for s in seeds.tolist():
        members = [s]
        inset = {s}
        area = float(oa[s])
        total = float(closed[s])
        ok = True
        while not oversize(members, area):
            best, best_key = -1, (np.inf, 0.0)
            for i in members:
                for j in indices[indptr[i] : indptr[i + 1]].tolist():
                    if j not in inset and o[j] > eps:
                        key = (float(closed[j]), -float(oa[j]))
                        if key < best_key:
                            best, best_key = j, key
            if best < 0 or total + closed[best] >= 1.0 - COVER_VIOLATION:
                ok = False
                break
            members.append(best)
            inset.add(best)
            area += float(oa[best])
            total += float(closed[best])
        if not ok:
            continue
        for i in sorted(members, key=lambda i: (-closed[i], oa[i])):
            if len(members) == 1:
                break
            rest = [j for j in members if j != i]
            if (
                oversize(rest, area - float(oa[i]))
                and not fixed[rest].all()
                and is_connected(prep, rest)
            ):
                members = rest
                area -= float(oa[i])
        key_s = frozenset(members)
        if key_s in seen or float(closed[members].sum()) >= 1.0 - COVER_VIOLATION:
            continue
        seen.add(key_s)
        found.append(sorted(members))
    # The most broken first: fewer, deeper rows re-solve faster than many shallow ones.
    found.sort(key=lambda m: float(closed[m].sum()))
    return found[:limit]


def cover_lp_bound(prep: Prep, time_limit_s: float = 5.0, max_rounds: int = 100) -> CoverLpResult:
    """Upper bound on NPV: Model I with the opening rule as cover inequalities (HiGHS).

    The aspatial LP (:func:`solve_lp`, over the prescriptions a legal plan may choose)
    is solved, then cover inequalities broken by its solution are added as rows and the
    LP re-solved from the previous basis (dual simplex), in rounds, until no broken cover
    is found or the time runs out. A cover is a connected set ``S`` of stands whose
    opening area exceeds the maximum opening and that holds a stand not open from the
    start (unit restriction: two adjacent stands); every legal plan keeps, in every period
    ``p``, ``sum_{i in S} o[i, p] <= |S| - 1``, where ``o[i, p]`` is the sum of the shares
    of the stand's prescriptions open in ``p`` (1 for a stand open from the start)
    (McDill, Rebain & Braze 2002, Forest Science 48(4):631-642, from memory). Every row
    is valid, so each LP optimum on the way bounds the spatial optimum from above.

    Only the full LP is used (no column generation, so no Lagrangian correction is
    needed): above ``COVER_MAX_COLUMNS`` allowed prescriptions the result is
    ``"skipped"``.

    Parameters
    ----------
    prep
        The prepared problem (:func:`~spatialplan.schedule.model.prepare`).
    time_limit_s
        Budget for all HiGHS solves and separation rounds together.
    max_rounds
        Most HiGHS solves.

    Returns
    -------
    CoverLpResult
    """
    t0 = time.perf_counter()
    t_end = t0 + float(time_limit_s)
    n, P = prep.n, prep.P
    cols = np.nonzero(prep.allowed)[0]
    nan = float("nan")
    if len(cols) > COVER_MAX_COLUMNS:
        return CoverLpResult(nan, "skipped", nan, 0, 0, time.perf_counter() - t0)
    rows, stand_of = prep.rows, prep.stand_of
    h = _build_highs(rows, stand_of, prep.value, cols, n)
    st = stand_of[cols]
    bits = mask_bits(prep.open_mask[cols], P)  # (A, P) harvest-open periods per column
    first = np.searchsorted(st, np.arange(n + 1))  # columns of stand i: first[i]:first[i+1]
    fixed = prep.fixed_open
    spatial = prep.spatial
    value = lp_value = nan
    status = "optimal"
    rounds = covers = 0
    while rounds < max_rounds:
        h.setOptionValue("time_limit", max(t_end - time.perf_counter(), 0.01))
        h.run()
        rounds += 1
        st_run = h.modelStatusToString(h.getModelStatus()).lower()
        if st_run != "optimal":
            # A solve cut short proves nothing: keep the previous optimum (still valid).
            status = "time_limit" if rounds > 1 else st_run
            break
        value = float(h.getInfo().objective_function_value)
        if rounds == 1:
            lp_value = value
        if not spatial or time.perf_counter() >= t_end:
            status = "optimal" if not spatial else "time_limit"
            break
        x = np.clip(np.asarray(h.getSolution().col_value)[: len(cols)], 0.0, 1.0)
        oh = np.zeros((n, P))
        np.add.at(oh, st, x[:, None] * bits)
        openness = np.where(fixed, 1.0, np.minimum(oh, 1.0))
        r_start: list[int] = [0]
        r_index: list[np.ndarray] = []
        r_upper: list[float] = []
        for p in range(P):
            for members in separate_covers(prep, openness, p):
                free = [i for i in members if not fixed[i, p]]
                idx = np.concatenate([np.arange(first[i], first[i + 1]) for i in free])
                idx = idx[bits[idx, p]]
                r_index.append(idx)
                r_start.append(r_start[-1] + len(idx))
                r_upper.append(float(len(free) - 1))
            if time.perf_counter() >= t_end:
                break
        if not r_upper:
            status = "optimal"
            break
        m = len(r_upper)
        index = np.concatenate(r_index).astype(np.int32)
        h.addRows(
            m,
            np.full(m, -highspy.kHighsInf),
            np.asarray(r_upper),
            len(index),
            np.asarray(r_start[:-1], dtype=np.int32),
            index,
            np.ones(len(index)),
        )
        covers += m
        if time.perf_counter() >= t_end:
            status = "time_limit"
            break
    else:
        status = "time_limit"
    del h
    if rounds >= 1 and np.isnan(value):
        return CoverLpResult(nan, status, nan, rounds, covers, time.perf_counter() - t0)
    return CoverLpResult(value, status, lp_value, rounds, covers, time.perf_counter() - t0)
