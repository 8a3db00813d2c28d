"""CP-SAT models of the scheduling problem: the full model and spatial-window sub-models.

One Boolean ``x[i, p]`` per eligible (stand, period) and ``AtMostOne`` per stand. The
opening rules are *cover* clauses over minimal over-size connected stand sets, generated
lazily from the plans CP-SAT proposes (see :func:`spatialplan.schedule.model.extract_covers`):
for a set ``S`` and period ``p`` the clause says "not every stand of ``S`` is open in
``p``". Openness of a stand in ``p`` is a Boolean ``o[i, p]`` equal to the OR of the
``x[i, q]`` with ``p - G_i + 1 <= q <= p`` (made only when a clause needs it; when the
window holds one ``x`` the ``x`` itself is used). Stands open from the start are constants.

A *sub-model* frees only some stands; the others keep the period of a base plan and
enter the clauses and the rule rows as constants. The full model is the sub-model that
frees every stand.

Integer scaling (CP-SAT needs integer coefficients). Objective: ``round(s_obj * c)`` with
``s_obj = 1e7 / max |c|``; the largest error on one stand is reported, and the sum of the
per-stand maxima is added to CP-SAT's bound so the bound stays valid in real units. Rows
``sum d x <= b``: each coefficient is rounded *up* (``ceil(s d)``) and the right-hand
side *down* (``floor(s b - safety)``), with ``s = 1e6 / max |d|``. Since ``ceil(s d) >=
s d`` and ``x >= 0``, every integer-feasible plan satisfies the real row with a margin, so
a plan CP-SAT accepts also passes a float64 check (it is re-checked anyway).
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from ortools.sat.python import cp_model

from spatialplan.schedule.model import Prep

__all__ = ["CoverPool", "Scaling", "SubModel", "make_scaling"]

OBJ_TARGET = 1e7
ROW_TARGET = 1e6


@dataclass
class Scaling:
    """Objective scale and the resulting rounding errors (currency units)."""

    s_obj: float
    int_value: np.ndarray  # (n, P) int64 objective coefficients
    max_coef_error: float  # largest |round(s c) / s - c| over cells
    total_error_bound: float  # sum over stands of the largest cell error


def make_scaling(prep: Prep) -> Scaling:
    """Integer objective coefficients for a problem."""
    v = np.where(prep.eligible, prep.value, 0.0)
    mx = float(np.abs(v).max()) if v.size else 0.0
    s = OBJ_TARGET / mx if mx > 0 else 1.0
    iv = np.rint(v * s).astype(np.int64)
    err = np.abs(iv / s - v)
    return Scaling(s, iv, float(err.max(initial=0.0)), float(err.max(axis=1, initial=0.0).sum()))


class CoverPool:
    """All cover sets found so far, indexed by stand."""

    def __init__(self) -> None:
        self.covers: list[frozenset[int]] = []
        self._seen: set[frozenset[int]] = set()
        self.by_stand: dict[int, list[int]] = {}

    def add(self, s: frozenset[int]) -> bool:
        """Add a cover; returns False when it was known."""
        if s in self._seen:
            return False
        self._seen.add(s)
        k = len(self.covers)
        self.covers.append(s)
        for i in s:
            self.by_stand.setdefault(i, []).append(k)
        return True

    def touching(self, stands: np.ndarray) -> list[int]:
        """Indices of covers with at least one stand in ``stands``."""
        out: set[int] = set()
        for i in stands:
            out.update(self.by_stand.get(int(i), ()))
        return sorted(out)

    def __len__(self) -> int:
        return len(self.covers)


class _Callback(cp_model.CpSolverSolutionCallback):
    def __init__(
        self, on_solution: Callable[[float, float], None] | None, registry: dict | None = None
    ) -> None:
        super().__init__()
        self.on_solution = on_solution
        self.registry = registry

    def on_solution_callback(self) -> None:
        if self.registry is not None and self.registry.get("interrupted"):
            self.stop_search()
        if self.on_solution is not None:
            self.on_solution(self.objective_value, self.best_objective_bound)


@dataclass
class SolveOut:
    """What one CP-SAT call returned."""

    status: str  # "optimal", "feasible", "infeasible", "unknown", "invalid"
    period: np.ndarray | None
    objective_int: float | None
    bound_int: float | None
    wall_s: float
    stats: dict = field(default_factory=dict)


class SubModel:
    """A CP-SAT model freeing ``free`` stands, the others fixed at ``base`` periods.

    Parameters
    ----------
    prep
        Pre-computed problem.
    free
        Positions of the stands whose harvest period is decided here.
    base
        (n,) plan giving the periods of the other stands (values of free stands ignored).
    scaling
        Objective scaling shared by all models of one solve.
    unit_edges
        Add the unit-restriction clauses eagerly (all edges touching ``free``).
    """

    def __init__(
        self,
        prep: Prep,
        free: np.ndarray,
        base: np.ndarray,
        scaling: Scaling,
        unit_edges: bool = True,
    ) -> None:
        self.prep = prep
        n, P = prep.n, prep.P
        self.m = cp_model.CpModel()
        m = self.m
        self.free = np.asarray(free, dtype=np.int64)
        self.is_free = np.zeros(n, dtype=bool)
        self.is_free[self.free] = True
        base = np.asarray(base, dtype=np.int64).copy()
        base[self.is_free] = 0
        self.base = base
        _, self.base_hop = prep.open_matrices(base)
        # x variables
        elig = prep.eligible[self.free]
        fi, fp = np.nonzero(elig)
        si = self.free[fi]
        self.cell_i = si
        self.cell_p = fp
        self.xvars = [m.new_bool_var(f"x{i}_{p + 1}") for i, p in zip(si, fp, strict=True)]
        self.xidx = np.array([v.index for v in self.xvars], dtype=np.int64)
        self.cell_of: dict[tuple[int, int], int] = {
            (int(i), int(p)): k for k, (i, p) in enumerate(zip(si, fp, strict=True))
        }
        starts = np.searchsorted(si, self.free, side="left")
        ends = np.searchsorted(si, self.free, side="right")
        self.n_amo = 0
        for a, b in zip(starts, ends, strict=True):
            if b - a > 1:
                m.add_at_most_one(self.xvars[a:b])
                self.n_amo += 1
        self.ovars: dict[tuple[int, int], cp_model.IntVar] = {}
        self.n_cover_clauses = 0
        self.n_rows = 0
        self.row_tightening = 0.0
        self.added: set[int] = set()
        # rule rows
        for r in prep.rows:
            d, _ = r.x_coefs(n, P)
            dv = d[si, fp]
            nz = np.nonzero(dv)[0]
            const = r.lhs(base)  # free stands uncut in ``base``
            if nz.size == 0:
                continue
            mx = float(np.abs(dv[nz]).max())
            s = ROW_TARGET / mx
            coefs = np.ceil(dv[nz] * s).astype(np.int64)
            # Bound on the float error of rhs - const (zero when both are exact zeros).
            safety = 1e-12 * (abs(r.rhs) + r.lhs(base, absolute=True))
            rhs_real = r.rhs - const - safety
            rhs = math.floor(rhs_real * s)
            self.row_tightening = max(
                self.row_tightening,
                float(
                    ((coefs - dv[nz] * s).sum() + (rhs_real * s - rhs)) / s / max(r.scale_ref, 1)
                ),
            )
            m.add(
                cp_model.LinearExpr.weighted_sum([self.xvars[k] for k in nz], coefs.tolist()) <= rhs
            )
            self.n_rows += 1
        # objective
        coef = scaling.int_value[si, fp]
        nzo = np.nonzero(coef)[0]
        m.maximize(
            cp_model.LinearExpr.weighted_sum([self.xvars[k] for k in nzo], coef[nzo].tolist())
        )
        if prep.unit and unit_edges:
            self._unit_clauses()

    # ---- openness and clauses -----------------------------------------------------------
    def _o(self, i: int, p: int) -> cp_model.IntVar | None:
        """Boolean "stand ``i`` harvest-open in column ``p``" (None: cannot be)."""
        key = (i, p)
        if key in self.ovars:
            return self.ovars[key]
        g = int(self.prep.green[i])
        ks = [
            self.cell_of[(i, q)] for q in range(max(0, p - g + 1), p + 1) if (i, q) in self.cell_of
        ]
        if not ks:
            return None
        if len(ks) == 1:
            v = self.xvars[ks[0]]
        else:
            v = self.m.new_bool_var(f"o{i}_{p + 1}")
            xs = [self.xvars[k] for k in ks]
            for x in xs:
                self.m.add_implication(x, v)
            self.m.add_bool_or(xs).only_enforce_if(v)
        self.ovars[key] = v
        return v

    def add_cover(self, s: frozenset[int]) -> int:
        """Add the clauses of cover ``s`` for every period; returns how many were added."""
        prep = self.prep
        fixed = prep.fixed_open
        added = 0
        for p in range(prep.P):
            lits = []
            must_close = []
            skip = False
            any_free = False
            fixed_new = False
            for i in s:
                if self.is_free[i]:
                    any_free = True
                    if fixed[i, p]:
                        o = self._o(i, p)
                        if o is not None:
                            must_close.append(o)
                        continue
                    o = self._o(i, p)
                    if o is None:
                        skip = True
                        break
                    lits.append(o)
                else:
                    if fixed[i, p]:
                        fixed_new |= bool(self.base_hop[i, p])
                        continue
                    if not self.base_hop[i, p]:
                        skip = True
                        break
                    fixed_new = True
            if skip or not any_free:
                continue
            if lits:
                self.m.add_bool_or([~v for v in lits])
                added += 1
            elif not fixed_new:
                # Every stand of s is open from the start: no new harvest may join it.
                for v in must_close:
                    self.m.add_bool_or([~v])
                    added += 1
            # else: the base plan already breaks this cover outside the free stands.
        self.n_cover_clauses += added
        return added

    def add_covers(self, pool: CoverPool, ids: list[int] | None = None) -> int:
        """Add the pool's covers (those touching free stands) not yet in this model."""
        ids = pool.touching(self.free) if ids is None else ids
        total = 0
        for k in ids:
            if k in self.added:
                continue
            self.added.add(k)
            total += self.add_cover(pool.covers[k])
        return total

    def _unit_clauses(self) -> None:
        e = np.asarray(self.prep.problem.edges, dtype=np.int64).reshape(-1, 2)
        if e.size == 0:
            return
        sel = self.is_free[e[:, 0]] | self.is_free[e[:, 1]]
        for a, b in e[sel]:
            self.add_cover(frozenset((int(a), int(b))))

    # ---- hints and solving --------------------------------------------------------------
    def hint(self, period: np.ndarray) -> None:
        """Use ``period`` (values of the free stands) as the solution hint."""
        m = self.m
        m.clear_hints()
        per = np.asarray(period)
        on = per[self.cell_i] == self.cell_p + 1
        for v, b in zip(self.xvars, on.tolist(), strict=True):
            m.add_hint(v, b)
        for (i, p), v in self.ovars.items():
            if v.index in self._xset():
                continue
            g = int(self.prep.green[i])
            q = int(per[i])
            m.add_hint(v, q > 0 and p - g + 1 <= q - 1 <= p)

    def _xset(self) -> set[int]:
        if not hasattr(self, "_xs"):
            self._xs = set(self.xidx.tolist())
        return self._xs

    def size(self) -> dict:
        """Model size: variables and constraints."""
        proto = self.m.proto
        return {
            "variables": len(proto.variables),
            "constraints": len(proto.constraints),
            "x_vars": len(self.xvars),
            "rows": self.n_rows,
            "cover_clauses": self.n_cover_clauses,
        }

    def solve(
        self,
        time_limit_s: float,
        workers: int,
        seed: int,
        gap: float = 0.0,
        registry: dict | None = None,
        on_solution: Callable[[float, float], None] | None = None,
    ) -> SolveOut:
        """Run CP-SAT; ``registry["solver"]`` holds the live solver (for Ctrl-C)."""
        solver = cp_model.CpSolver()
        prm = solver.parameters
        prm.max_time_in_seconds = max(float(time_limit_s), 0.01)
        prm.num_workers = int(workers)
        prm.random_seed = int(seed)
        prm.relative_gap_limit = float(gap)
        prm.log_search_progress = False
        # Ctrl-C is handled in Python (schedule._sigint); CP-SAT's own C++ handler would
        # abort the process when the solve runs outside the main thread.
        prm.catch_sigint_signal = False
        cb = _Callback(on_solution, registry)
        if registry is not None:
            registry["solver"] = solver
        t0 = time.perf_counter()
        try:
            if registry is not None and registry.get("interrupted"):
                st = cp_model.UNKNOWN
            elif threading.current_thread() is threading.main_thread():
                # Solve in a helper thread so the main thread keeps running Python code
                # and a Ctrl-C handler can call stop_search() at once.
                box: dict = {}

                def run() -> None:
                    try:
                        box["st"] = solver.solve(self.m, cb)
                    except BaseException as exc:  # pragma: no cover - re-raised below
                        box["exc"] = exc

                th = threading.Thread(target=run, name="cpsat", daemon=True)
                th.start()
                stopped = False
                while th.is_alive():
                    th.join(0.05)
                    # stop_search() is only safe once the search runs (OR-Tools aborts on a
                    # call in the first instants of Solve), hence the short delay.
                    if (
                        not stopped
                        and registry is not None
                        and registry.get("interrupted")
                        and time.perf_counter() - t0 > 0.25
                        and th.is_alive()
                    ):
                        solver.stop_search()
                        stopped = True
                if "exc" in box:
                    raise box["exc"]
                st = box["st"]
            else:
                st = solver.solve(self.m, cb)
        finally:
            if registry is not None:
                registry["solver"] = None
        wall = time.perf_counter() - t0
        name = {
            cp_model.OPTIMAL: "optimal",
            cp_model.FEASIBLE: "feasible",
            cp_model.INFEASIBLE: "infeasible",
            cp_model.MODEL_INVALID: "invalid",
        }.get(st, "unknown")
        if name in ("optimal", "feasible"):
            sol = np.asarray(solver.response_proto.solution, dtype=np.int64)
            on = sol[self.xidx] > 0
            per = self.base.copy()
            per[self.cell_i[on]] = self.cell_p[on] + 1
            return SolveOut(name, per, solver.objective_value, solver.best_objective_bound, wall)
        bound = solver.best_objective_bound if name == "unknown" else None
        return SolveOut(name, None, None, bound, wall)
