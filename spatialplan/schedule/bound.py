"""The aspatial upper bound: Model I as a linear program solved with HiGHS.

Model I (Johnson & Scheurman 1977, Operations Research 25(1):153-168, from memory) gives
one variable per (stand, period) with ``0 <= x <= 1`` and ``sum_p x[i, p] <= 1``. Here it
carries every non-spatial rule of the problem (flow, targets, ending inventory) and no
spatial rule, so its optimum is an upper bound on the NPV of every legal plan.
"""

from __future__ import annotations

import os
import sys
from dataclasses import dataclass

import highspy
import numpy as np
import scipy.sparse as sp

from spatialplan.problem import PlanProblem
from spatialplan.schedule.model import Row, build_rows

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
        (n, P) fractional harvest shares.
    status
        ``"optimal"``, ``"infeasible"`` or another HiGHS model status in lower case.
    period_volume_m3
        (P,) harvest volume of the LP solution by period.
    """

    value: float
    x: np.ndarray
    status: str
    period_volume_m3: np.ndarray
    price: np.ndarray | None = None
    """(n, P) LP "profit" of each cell: objective minus the rule rows' dual prices times
    the cell's row coefficients (reduced cost plus the stand's own dual); the heuristic
    ranks periods of a stand by it."""


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
    rows: list[Row] | None = None,
    eligible: np.ndarray | None = None,
    objective: np.ndarray | None = None,
    time_limit_s: float | None = None,
) -> LpResult:
    """Solve Model I with the given rows (default: the problem's own rules).

    Parameters
    ----------
    problem
        The instance.
    rows
        Linear rules (defaults to :func:`~spatialplan.schedule.model.build_rows`).
    eligible
        (n, P) cells that get a variable (defaults to ``problem.eligible``).
    objective
        (n, P) objective coefficients (defaults to area x npv per ha); pass zeros for a
        pure feasibility check.
    time_limit_s
        HiGHS time limit.
    """
    n, P = problem.n_stands, problem.periods
    rows = build_rows(problem) if rows is None else rows
    elig = np.asarray(problem.eligible if eligible is None else eligible, dtype=bool)
    if objective is None:
        objective = np.asarray(problem.area_ha, float)[:, None] * np.asarray(
            problem.npv_per_ha, float
        )
    ii, pp = np.nonzero(elig)
    ncol = len(ii)
    colidx = -np.ones((n, P), dtype=np.int64)
    colidx[ii, pp] = np.arange(ncol)
    # Rows 0..k-1: one harvest at most per stand (only stands that have a variable).
    stands = np.unique(ii)
    srow = -np.ones(n, dtype=np.int64)
    srow[stands] = np.arange(len(stands))
    r_idx = [srow[ii]]
    c_idx = [np.arange(ncol)]
    vals = [np.ones(ncol)]
    lo = [np.full(len(stands), -np.inf)]
    hi = [np.ones(len(stands))]
    k = len(stands)
    for r in rows:
        d, const = r.x_coefs(n, P)
        dv = d[ii, pp]
        nz = dv != 0
        r_idx.append(np.full(int(nz.sum()), k))
        c_idx.append(np.nonzero(nz)[0])
        vals.append(dv[nz])
        lo.append(np.array([-np.inf]))
        hi.append(np.array([r.rhs - const]))
        k += 1
    a = sp.csc_matrix(
        (np.concatenate(vals), (np.concatenate(r_idx), np.concatenate(c_idx))), shape=(k, ncol)
    )
    a.sort_indices()
    inf = highspy.kHighsInf
    lp = highspy.HighsLp()
    lp.num_col_ = ncol
    lp.num_row_ = k
    lp.col_cost_ = np.asarray(objective, float)[ii, pp]
    lp.col_lower_ = np.zeros(ncol)
    lp.col_upper_ = np.ones(ncol)
    lp.row_lower_ = np.where(np.isinf(np.concatenate(lo)), -inf, np.concatenate(lo))
    lp.row_upper_ = np.concatenate(hi)
    lp.a_matrix_.format_ = highspy.MatrixFormat.kColwise
    lp.a_matrix_.start_ = a.indptr.astype(np.int32)
    lp.a_matrix_.index_ = a.indices.astype(np.int32)
    lp.a_matrix_.value_ = a.data
    lp.sense_ = highspy.ObjSense.kMaximize
    h = _new_highs()
    h.setOptionValue("threads", 1)
    if time_limit_s is not None:
        h.setOptionValue("time_limit", max(float(time_limit_s), 0.01))
    h.passModel(lp)
    h.run()
    status = h.modelStatusToString(h.getModelStatus()).lower()
    x = np.zeros((n, P))
    price = None
    if status == "optimal":
        solution = h.getSolution()
        sol = np.asarray(solution.col_value)
        x[ii, pp] = np.clip(sol, 0.0, 1.0)
        value = float(h.getInfo().objective_function_value)
        # HiGHS: col_dual = c - A^T y. Adding back the stand row's dual leaves the price
        # of the cell net of the rule rows only.
        cd = np.asarray(solution.col_dual)
        rd = np.asarray(solution.row_dual)
        price = np.full((n, P), -np.inf)
        price[ii, pp] = cd + rd[srow[ii]]
    else:
        value = float("nan")
    vol = (np.asarray(problem.area_ha, float)[:, None] * problem.volume_m3_ha * x).sum(axis=0)
    return LpResult(value=value, x=x, status=status, period_volume_m3=vol, price=price)


def lp_bound(problem: PlanProblem) -> LpResult:
    """Aspatial upper bound on NPV: Model I without spatial rules, as an LP (HiGHS).

    Parameters
    ----------
    problem
        The instance; its flow, target and ending-inventory rules are included.

    Returns
    -------
    LpResult
        Value, fractional solution ``x`` (n, P) and status.
    """
    problem.validate()
    return solve_lp(problem)
