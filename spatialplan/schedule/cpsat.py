"""CP-SAT models of the scheduling problem: the full model and spatial-window sub-models.

One Boolean ``x_k`` per allowed harvesting prescription ``k`` and ``AtMostOne`` per stand:
the stand's no-harvest prescription is the implicit last choice, so exactly one
prescription per stand is chosen. The harvest indicator of stand ``i`` in period ``p`` is
the linear expression ``sum x_k`` over its prescriptions harvesting in ``p``, and its
openness ``o[i, p]`` is ``sum x_k`` over its prescriptions that keep it harvest-open in
``p`` (every harvest opens the stand for ``G_i`` periods; at most one ``x_k`` of a stand
is 1, so the sum is 0/1). The opening rules are *cover* clauses over minimal over-size
connected stand sets, generated lazily from the plans CP-SAT proposes (see
:func:`spatialplan.schedule.model.extract_covers`): for a set ``S`` and period ``p`` the
clause says "not every stand of ``S`` is open in ``p``". A Boolean equal to ``o[i, p]`` is
made only when a clause needs it (when one ``x_k`` keeps the stand open in ``p``, that
``x_k`` itself is used). Stands open from the start are constants.

A *sub-model* frees only some stands; the others keep the prescription of a base plan and
enter the clauses and the rule rows as constants. The full model is the sub-model that
frees every stand.

Integer scaling (CP-SAT needs integer coefficients). Objective: ``round(s_obj * c)`` with
``c`` the value of a prescription against the stand's no-harvest one and ``s_obj = 1e7 /
max |c|``; the largest error on one stand is reported, and the sum of the per-stand maxima
is added to CP-SAT's bound so the bound stays valid in real units. Rows ``sum d x <= b``
(``d`` against the no-harvest prescription): each coefficient is rounded *up* (``ceil(s
d)``) and the right-hand side *down* (``floor(s b - safety)``), with ``s = 1e6 / max |d|``.
Since ``ceil(s d) >= s d`` and ``x >= 0``, every integer-feasible plan satisfies the real
row with a margin, so a plan CP-SAT accepts also passes a float64 check (it is re-checked
anyway).
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from ortools.sat.python import cp_model

from spatialplan.schedule.model import Prep, mask_bits

__all__ = ["CoverPool", "Scaling", "SubModel", "make_scaling"]

OBJ_TARGET = 1e7
ROW_TARGET = 1e6


@dataclass
class Scaling:
    """Objective scale and the resulting rounding errors (currency units)."""

    s_obj: float
    int_value: np.ndarray  # (K,) int64 objective coefficients against the no-harvest rx
    max_coef_error: float  # largest |round(s c) / s - c| over prescriptions
    total_error_bound: float  # sum over stands of the largest prescription error
    offset: float = 0.0  # value of the plan that harvests nothing (the objective's constant)


def make_scaling(prep: Prep) -> Scaling:
    """Integer objective coefficients for a problem."""
    v = np.where(prep.choice, prep.rel_value, 0.0)
    mx = float(np.abs(v).max()) if v.size else 0.0
    s = OBJ_TARGET / mx if mx > 0 else 1.0
    iv = np.rint(v * s).astype(np.int64)
    err = np.abs(iv / s - v)
    per_stand = np.zeros(prep.n)
    np.maximum.at(per_stand, prep.stand_of, err)
    return Scaling(
        s,
        iv,
        float(err.max(initial=0.0)),
        float(per_stand.sum()),
        float(prep.value[prep.null].sum()),
    )


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
        self,
        on_solution: Callable[[float, float], None] | None,
        registry: dict | None = None,
        xidx: np.ndarray | None = None,
    ) -> None:
        super().__init__()
        self.on_solution = on_solution
        self.registry = registry
        self.xidx = xidx
        self.found: list[np.ndarray] = []  # x values of every solution, in the order found

    def on_solution_callback(self) -> None:
        if self.registry is not None and self.registry.get("interrupted"):
            self.stop_search()
        if self.xidx is not None:
            sol = np.asarray(self.response_proto.solution, dtype=np.int64)
            self.found.append(sol[self.xidx] > 0)
        if self.on_solution is not None:
            self.on_solution(self.objective_value, self.best_objective_bound)


@dataclass
class SolveOut:
    """What one CP-SAT call returned."""

    status: str  # "optimal", "feasible", "infeasible", "unknown", "invalid"
    plan: np.ndarray | None  # prescription per stand
    objective_int: float | None
    bound_int: float | None
    wall_s: float
    stats: dict = field(default_factory=dict)
    # Every improving solution CP-SAT reported, oldest first (only with ``keep_all``).
    plans: list[np.ndarray] = field(default_factory=list)


class SubModel:
    """A CP-SAT model freeing ``free`` stands, the others fixed at a base plan.

    Parameters
    ----------
    prep
        Pre-computed problem.
    free
        Positions of the stands whose prescription is decided here.
    base
        (n,) plan giving the prescriptions of the other stands (values of free stands
        ignored).
    scaling
        Objective scaling shared by all models of one solve.
    unit_edges
        Add the unit-restriction clauses eagerly (all edges touching ``free``).
    allow
        (K,) bool: the prescriptions a free stand may take here (``None``: all allowed
        ones). A free stand whose no-harvest prescription is not allowed must take one of
        its allowed harvesting prescriptions; ``base`` must hold an allowed one for it.
    """

    def __init__(
        self,
        prep: Prep,
        free: np.ndarray,
        base: np.ndarray,
        scaling: Scaling,
        unit_edges: bool = True,
        allow: np.ndarray | None = None,
    ) -> None:
        self.prep = prep
        n = prep.n
        self.m = cp_model.CpModel()
        m = self.m
        self.free = np.asarray(free, dtype=np.int64)
        self.is_free = np.zeros(n, dtype=bool)
        self.is_free[self.free] = True
        base = np.asarray(base, dtype=np.int64).copy()
        base[self.is_free] = prep.null[self.is_free]
        self.base = base
        _, self.base_hop = prep.open_matrices(base)
        # x variables: allowed harvesting prescriptions of the free stands (sorted by k,
        # hence by stand).
        sel = prep.choice & self.is_free[prep.stand_of]
        if allow is not None:
            sel &= allow
        ks = np.nonzero(sel)[0]
        # Free stands that must harvest (their no-harvest prescription is not allowed).
        must = np.zeros(n, dtype=bool)
        if allow is not None:
            must[self.free] = ~allow[prep.null[self.free]]
        si = prep.stand_of[ks]
        self.cell_k = ks
        self.cell_i = si
        self.xvars = [m.new_bool_var(f"x{k}") for k in ks.tolist()]
        self.xidx = np.array([v.index for v in self.xvars], dtype=np.int64)
        starts = np.searchsorted(si, np.arange(n), side="left")
        ends = np.searchsorted(si, np.arange(n), side="right")
        self._span = (starts, ends)
        self._omask = prep.open_mask[ks]
        self.n_amo = 0
        for i in self.free.tolist():
            a, b = int(starts[i]), int(ends[i])
            if must[i]:
                m.add_exactly_one(self.xvars[a:b])
                self.n_amo += 1
            elif b - a > 1:
                m.add_at_most_one(self.xvars[a:b])
                self.n_amo += 1
        self.ovars: dict[tuple[int, int], cp_model.IntVar] = {}
        self.n_cover_clauses = 0
        self.n_rows = 0
        self.row_tightening = 0.0
        self.added: set[int] = set()
        # rule rows, against the no-harvest prescriptions
        rows = prep.rows
        if len(rows) and len(ks):
            D = rows.coefs(ks) - rows.coefs(prep.null[si])
        else:
            D = np.zeros((len(ks), len(rows)))
        const_all = rows.lhs(base)  # free stands on no harvest in ``base``
        mag_all = rows.magnitude(base)
        for r, row in enumerate(rows):
            dv = D[:, r]
            nz = np.nonzero(dv)[0]
            const = float(const_all[r])
            if nz.size == 0:
                continue
            mx = float(np.abs(dv[nz]).max())
            s = ROW_TARGET / mx
            coefs = np.ceil(dv[nz] * s).astype(np.int64)
            # Bound on the float error of rhs - const (zero when both are exact zeros).
            safety = 1e-12 * (abs(row.rhs) + float(mag_all[r]))
            rhs_real = row.rhs - const - safety
            rhs = math.floor(rhs_real * s)
            self.row_tightening = max(
                self.row_tightening,
                float(
                    ((coefs - dv[nz] * s).sum() + (rhs_real * s - rhs)) / s / max(row.scale_ref, 1)
                ),
            )
            m.add(
                cp_model.LinearExpr.weighted_sum([self.xvars[k] for k in nz], coefs.tolist()) <= rhs
            )
            self.n_rows += 1
        # objective
        coef = scaling.int_value[ks]
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
        a, b = int(self._span[0][i]), int(self._span[1][i])
        bit = np.uint64(1) << np.uint64(p)
        pos = [a + int(t) for t in np.nonzero(self._omask[a:b] & bit)[0]]
        if not pos:
            return None
        if len(pos) == 1:
            v = self.xvars[pos[0]]
        else:
            # o[i, p] = sum of the x_k keeping the stand open in p (at most one is 1).
            v = self.m.new_bool_var(f"o{i}_{p + 1}")
            self.m.add(cp_model.LinearExpr.sum([self.xvars[t] for t in pos]) == v)
        self.ovars[key] = v
        return v

    def add_cover(self, s: frozenset[int]) -> int:
        """Add the clauses of cover ``s`` for every period; returns how many were added."""
        return self.add_cover_sets([s])

    def _can_open(self) -> np.ndarray:
        """(n, P) bool: a free stand has an allowed prescription keeping it open then."""
        if not hasattr(self, "_canopen"):
            prep = self.prep
            bits = np.zeros(prep.n, dtype=np.uint64)
            if len(self.cell_i):
                np.bitwise_or.at(bits, self.cell_i, self._omask)
            self._canopen = mask_bits(bits, prep.P)
        return self._canopen

    def add_cover_sets(self, sets: list[frozenset[int]]) -> int:
        """Add the clauses of many covers at once; returns how many clauses were added.

        For cover ``S`` and period ``p``: a fixed stand that is closed in ``p`` makes the
        clause void, as does a free stand that cannot be open then; fixed open stands are
        constants; the clause is "not every free stand of ``S`` open". When every stand of
        ``S`` is open from the start, no free stand may be harvest-open then (unit
        clauses). Which case applies is worked out for all covers and periods with numpy;
        only the clauses themselves are built one by one.
        """
        if not sets:
            return 0
        prep = self.prep
        n, P = prep.n, prep.P
        width = max(len(s) for s in sets)
        M = np.full((len(sets), width), n, dtype=np.int64)
        for r, s in enumerate(sets):
            M[r, : len(s)] = sorted(s)
        fixed = np.zeros((n + 1, P), dtype=bool)
        fixed[:n] = prep.fixed_open
        free = np.zeros(n + 1, dtype=bool)
        free[:n] = self.is_free
        can = np.zeros((n + 1, P), dtype=bool)
        can[:n] = self._can_open()
        hop = np.zeros((n + 1, P), dtype=bool)
        hop[:n] = self.base_hop & ~self.is_free[:, None]
        pad = np.zeros((n + 1, P), dtype=bool)
        pad[n] = True
        fr = free[:, None]
        void = (fr & ~fixed & ~can) | (~fr & ~fixed & ~hop & ~pad)
        lit = fr & ~fixed & can
        close = fr & fixed & can
        F = free[M]  # (C, L)
        V = void[M]  # (C, L, P)
        anyfree: np.ndarray = np.asarray(F.any(axis=1))
        keep = ~V.any(axis=1) & anyfree[:, None]
        has_lit = lit[M].any(axis=1)
        new = hop[M].any(axis=1)
        units = keep & ~has_lit & ~new & close[M].any(axis=1)
        keep &= has_lit
        added = 0
        for r, p in zip(*np.nonzero(keep), strict=True):
            lits = [self._o(int(i), int(p)) for i in M[r] if i < n and lit[i, p]]
            self.m.add_bool_or([~v for v in lits if v is not None])
            added += 1
        for r, p in zip(*np.nonzero(units), strict=True):
            for i in M[r]:
                if i < n and close[i, p]:
                    o = self._o(int(i), int(p))
                    if o is not None:
                        self.m.add_bool_or([~o])
                        added += 1
        self.n_cover_clauses += added
        return added

    def add_covers(self, pool: CoverPool, ids: list[int] | None = None) -> int:
        """Add the pool's covers (those touching free stands) not yet in this model."""
        ids = pool.touching(self.free) if ids is None else ids
        todo = [k for k in ids if k not in self.added]
        self.added.update(todo)
        return self.add_cover_sets([pool.covers[k] for k in todo])

    def _unit_clauses(self) -> None:
        e = np.asarray(self.prep.problem.edges, dtype=np.int64).reshape(-1, 2)
        if e.size == 0:
            return
        sel = self.is_free[e[:, 0]] | self.is_free[e[:, 1]]
        self.add_cover_sets([frozenset((int(a), int(b))) for a, b in e[sel]])

    def plan_of(self, on: np.ndarray) -> np.ndarray:
        """The full plan (prescription per stand) of a 0/1 vector over the x variables."""
        plan = self.base.copy()
        plan[self.cell_i[on]] = self.cell_k[on]
        return plan

    # ---- hints and solving --------------------------------------------------------------
    def hint(self, plan: np.ndarray) -> None:
        """Use ``plan`` (prescriptions of the free stands) as the solution hint."""
        m = self.m
        m.clear_hints()
        per = np.asarray(plan, dtype=np.int64)
        on = per[self.cell_i] == self.cell_k
        for v, b in zip(self.xvars, on.tolist(), strict=True):
            m.add_hint(v, b)
        om = self.prep.open_mask
        for (i, p), v in self.ovars.items():
            if v.index in self._xset():
                continue
            m.add_hint(v, bool((int(om[per[i]]) >> p) & 1))

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
        keep_all: bool = False,
    ) -> SolveOut:
        """Run CP-SAT; ``registry["solver"]`` holds the live solver (for Ctrl-C).

        With ``keep_all`` every improving solution is returned in ``plans``: one that
        breaks an opening cover not yet in the model may be preceded by a legal one.
        """
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
        cb = _Callback(on_solution, registry, self.xidx if keep_all else None)
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
            plan = self.plan_of(sol[self.xidx] > 0)
            plans = [self.plan_of(on) for on in cb.found]
            return SolveOut(
                name, plan, solver.objective_value, solver.best_objective_bound, wall, plans=plans
            )
        bound = solver.best_objective_bound if name == "unknown" else None
        return SolveOut(name, None, None, bound, wall)
