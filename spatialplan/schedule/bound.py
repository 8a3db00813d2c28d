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
from dataclasses import dataclass

import highspy
import numpy as np
import scipy.sparse as sp

from spatialplan.problem import PlanProblem, Prescriptions
from spatialplan.schedule.model import RowSet, build_rows

__all__ = ["LpResult", "lp_bound", "solve_lp"]


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
    """

    value: float
    x: np.ndarray
    status: str
    period_volume_m3: np.ndarray
    price: np.ndarray | None = None
    x_rx: np.ndarray | None = None


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


def solve_lp(
    problem: PlanProblem,
    rows: RowSet | None = None,
    allowed: np.ndarray | None = None,
    objective: np.ndarray | None = None,
    time_limit_s: float | None = None,
    rx: Prescriptions | None = None,
) -> LpResult:
    """Solve Model I with the given rows (default: the problem's own rules).

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
        HiGHS time limit.
    rx
        The prescriptions (default ``problem.rx()``).
    """
    n, P = problem.n_stands, problem.periods
    rx = problem.rx() if rx is None else rx
    rows = build_rows(problem, rx) if rows is None else rows
    K = rx.n_prescriptions
    stand_of = rx.stand_of
    area = np.asarray(problem.area_ha, dtype=np.float64)
    if objective is None:
        objective = area[stand_of] * np.asarray(rx.npv_per_ha, dtype=np.float64)
    cols = np.arange(K) if allowed is None else np.nonzero(np.asarray(allowed, dtype=bool))[0]
    nx = len(cols)
    J, R = len(rows.names), len(rows)
    # Columns: x for the kept prescriptions, then one free column per quantity.
    # Rows: convexity (n), accounting (J), rules (R).
    conv = sp.csr_matrix((np.ones(nx), (stand_of[cols], np.arange(nx))), shape=(n, nx))
    qt = rows.quant[cols].T.tocsr() if J else sp.csr_matrix((0, nx))
    a_x = sp.vstack([conv, qt, sp.csr_matrix((R, nx))], format="csc")
    a_q = sp.vstack(
        [sp.csr_matrix((n, J)), -sp.identity(J, format="csr"), sp.csr_matrix(rows.matrix)],
        format="csc",
    )
    a = sp.hstack([a_x, a_q], format="csc")
    a.sort_indices()
    del conv, qt, a_x, a_q
    inf = highspy.kHighsInf
    lp = highspy.HighsLp()
    lp.num_col_ = nx + J
    lp.num_row_ = n + J + R
    lp.col_cost_ = np.concatenate([np.asarray(objective, dtype=np.float64)[cols], np.zeros(J)])
    lp.col_lower_ = np.concatenate([np.zeros(nx), np.full(J, -inf)])
    lp.col_upper_ = np.concatenate([np.ones(nx), np.full(J, inf)])
    lp.row_lower_ = np.concatenate([np.ones(n), np.zeros(J), np.full(R, -inf)])
    lp.row_upper_ = np.concatenate([np.ones(n), np.zeros(J), rows.rhs])
    lp.a_matrix_.format_ = highspy.MatrixFormat.kColwise
    lp.a_matrix_.start_ = a.indptr.astype(np.int32)
    lp.a_matrix_.index_ = a.indices.astype(np.int32)
    lp.a_matrix_.value_ = a.data
    del a
    lp.sense_ = highspy.ObjSense.kMaximize
    h = _new_highs()
    h.setOptionValue("threads", 1)
    if time_limit_s is not None:
        h.setOptionValue("time_limit", max(float(time_limit_s), 0.01))
    h.passModel(lp)
    del lp
    h.run()
    status = h.modelStatusToString(h.getModelStatus()).lower()
    x_rx = np.zeros(K)
    price = None
    if status == "optimal":
        solution = h.getSolution()
        x_rx[cols] = np.clip(np.asarray(solution.col_value)[:nx], 0.0, 1.0)
        value = float(h.getInfo().objective_function_value)
        # HiGHS: col_dual = c - A^T y. Adding back the stand's convexity dual leaves the
        # prescription's objective net of the quantities' prices only.
        cd = np.asarray(solution.col_dual)[:nx]
        rd = np.asarray(solution.row_dual)[:n]
        price = np.full(K, -np.inf)
        price[cols] = cd + rd[stand_of[cols]]
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
    return LpResult(value=value, x=x, status=status, period_volume_m3=vol, price=price, x_rx=x_rx)


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
