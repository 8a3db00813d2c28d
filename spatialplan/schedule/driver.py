"""The spatial harvest scheduler: LP bound, heuristic, local search, CP-SAT with lazy covers.

Public entry points:

* :func:`solve` - the best plan found within the time limit, with its NPV, CP-SAT's bound,
  the aspatial LP bound and the gap;
* :func:`lp_bound` - Model I without spatial rules as an LP (HiGHS);
* :func:`diagnose` - which rule family makes a problem infeasible and the smallest
  relaxation that works.

How :func:`solve` works (details in ``docs/methods.md``, section "Scheduling model"):

1. LP bound with HiGHS (one variable per prescription); its dual prices rank the
   prescriptions of every stand.
2. Regret greedy with incremental opening checks, flow repair and fill: a legal plan
   within seconds (:mod:`spatialplan.schedule.construct`, run in several orders by
   :mod:`spatialplan.schedule.starts`).
3. Simulated annealing over prescription choices with hard opening checks and
   penalised rule rows (:mod:`spatialplan.schedule.anneal`): on large models until the
   deadline, on small and medium ones for a share of the time.
4. Small and medium models: CP-SAT (:mod:`spatialplan.schedule.cpsat`) on the full model
   hinted with the best plan, minimal cover clauses added lazily in rounds (each returned
   plan is checked, its over-size openings become clauses, near-legal plans are repaired in
   a small window); it gives the bound and proves optimality on small instances; when it
   runs ``FULL_STALL_SHARE`` of the time limit without a better plan, the time left goes
   to blocks of annealing or of CP-SAT windows
   (:class:`spatialplan.schedule.windows.WindowSearch`), each block to the one that gained
   more per second; a window frees some stands, keeps the rest at the best plan and
   re-optimises the freed ones exactly. Large models: the annealing until it stalls,
   then those blocks to the deadline.
   The phases live in :mod:`spatialplan.schedule.phases`.
5. The final plan is re-checked in float64 against every rule.

The empty plan: when the rules allow it (with default even flow ``0 <= 0`` holds) harvesting
nothing is a legal plan and may be returned when nothing better was found in time, but
never silently: ``stats["empty_plan"]`` is ``True`` and ``stats["warnings"]`` says so, and its
status is never ``"optimal"`` while the LP bound is positive.
"""

from __future__ import annotations

import signal
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np

from spatialplan.errors import InfeasibleError, NoSolutionError
from spatialplan.problem import PlanProblem, Prescriptions
from spatialplan.schedule.bound import LpResult, cover_lp_bound, lp_bound, solve_lp
from spatialplan.schedule.cpsat import CoverPool, make_scaling
from spatialplan.schedule.model import check_plan, plan_harvests, plan_npv, prepare
from spatialplan.schedule.phases import (
    BLOCK_MIN_S,
    alternate,
    full_model,
    local_search,
    lp_stand_values,
    lp_volumes,
    relaxed_chain,
    search_bound,
)
from spatialplan.schedule.quality import gap
from spatialplan.schedule.starts import start_plans
from spatialplan.schedule.windows import SearchCtx, WindowCache, lns, seed_pair_covers
from spatialplan.settings import SolverSettings

__all__ = [
    "LpResult",
    "PlanResult",
    "SolveProgress",
    "diagnose",
    "gap",
    "lp_bound",
    "solve",
]

# Local search then CP-SAT on the full model up to this many prescription variables
# (allowed prescriptions that harvest); local search alone above.
FULL_MODEL_MAX_VARS = 6_000
# Share of the remaining time the local search may use before CP-SAT on small models.
LOCAL_SHARE_FULL = 0.4
# CP-SAT on the full model hands over to the annealing and windows once it ran this share
# of the time limit (at least FULL_STALL_MIN_S) without a better plan: on the 500-stand
# bench landscape it found nothing in its last 100 of 120 s (docs/benchmarks.md).
FULL_STALL_SHARE = 0.25
FULL_STALL_MIN_S = 15.0


@dataclass(frozen=True)
class SolveProgress:
    """A progress report while solving (NPV and bounds in currency units)."""

    elapsed_s: float
    best_npv: float
    bound: float
    gap: float


@dataclass(frozen=True)
class PlanResult:
    """The plan and how good it is.

    Attributes
    ----------
    period
        (n,) first harvest period per stand, 0 = not harvested, else ``1 .. P`` (the only
        harvest in the single-harvest model; see :meth:`harvests` for all of them).
    status
        ``"optimal"`` (gap within ``settings.stop_gap`` or proven), ``"feasible"``,
        ``"time_limit"`` (best plan when time ran out), ``"interrupted"`` (best plan when
        the user pressed Ctrl-C), ``"infeasible"`` or ``"no_solution"`` (the last two are
        raised as errors by :func:`solve`).
    npv
        NPV of the plan recomputed in float64 from the problem's prescriptions.
    cpsat_bound
        CP-SAT's upper bound on the full model in real units (``None`` when only
        sub-models were solved).
    lp_bound
        Aspatial LP upper bound.
    gap
        ``(bound - npv) / |bound|`` with the tightest of the bounds.
    solve_time_s
        Wall time of :func:`solve`.
    stats
        Model size, rounds, covers, scaling and rounding errors, heuristic NPV, time to
        first plan, what each component found, warnings.
    prescription
        (n,) chosen prescription per stand: a global index into ``problem.rx()``
        (``None`` only for results assembled from a ``period`` array alone, which then
        means the single-harvest prescriptions).
    cover_bound
        Upper bound of the LP with opening covers (:func:`~spatialplan.schedule.bound.
        cover_lp_bound`); ``None`` when it was not computed (no spatial rule, too many
        prescriptions, no time).
    """

    period: np.ndarray
    status: str
    npv: float
    cpsat_bound: float | None
    lp_bound: float
    gap: float
    solve_time_s: float
    stats: dict = field(default_factory=dict)
    prescription: np.ndarray | None = None
    cover_bound: float | None = None

    def harvests(
        self, problem: PlanProblem, rx: Prescriptions | None = None
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Every harvest of the plan as ``(stand, harvest_no, period)`` arrays.

        ``harvest_no`` counts each stand's harvests from 1; rows are ordered by stand,
        then period. ``rx`` defaults to ``problem.rx()``.
        """
        if self.prescription is None:
            per = np.asarray(self.period, dtype=np.int64)
            stand = np.nonzero(per > 0)[0]
            return stand, np.ones(len(stand), dtype=np.int64), per[stand]
        return plan_harvests(problem.rx() if rx is None else rx, self.prescription)


@contextmanager
def _sigint(registry: dict) -> Iterator[None]:
    """During a solve, Ctrl-C stops CP-SAT and returns the best plan (main thread only)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum: int, frame: object) -> None:
        # The CP-SAT wait loop (cpsat.SubModel.solve) sees the flag within 50 ms
        # and calls the live solver's stop_search().
        registry["interrupted"] = True

    previous = signal.signal(signal.SIGINT, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


def solve(
    problem: PlanProblem,
    settings: SolverSettings,
    on_progress: Callable[[SolveProgress], None] | None = None,
    *,
    _strategy: str = "auto",
) -> PlanResult:
    """Find the harvest plan with the highest NPV that keeps every rule.

    Parameters
    ----------
    problem
        The instance (plain arrays, see :class:`~spatialplan.problem.PlanProblem`).
    settings
        Time limit (whole solve, LP and heuristic included), workers, seed and the
        relative gap at which to stop.
    on_progress
        Called with a :class:`SolveProgress` whenever the best plan improves.
    _strategy
        ``"auto"`` (``"full"`` up to ``FULL_MODEL_MAX_VARS`` prescription variables,
        ``"windows"`` above), ``"full"`` (local search, then CP-SAT on the full model),
        ``"windows"`` (local search until it stalls, then CP-SAT windows),
        ``"local"`` (local search to the deadline), ``"lns"`` (CP-SAT windows only) or
        ``"heuristic"`` (LP + greedy only); the named ones are for benchmarks.

    Returns
    -------
    PlanResult

    Raises
    ------
    InfeasibleError
        The rules admit no plan; ``diagnosis`` lists the rule families to relax.
    NoSolutionError
        Time ran out (or Ctrl-C) before any legal plan was found.
    """
    t0 = time.perf_counter()
    deadline = t0 + float(settings.time_limit_s)
    prep = prepare(problem)
    stats: dict = {"warnings": []}
    # 1. LP bound
    lp = solve_lp(problem, rows=prep.rows, time_limit_s=max(deadline - time.perf_counter(), 0.05))
    stats["lp_time_s"] = round(time.perf_counter() - t0, 3)
    stats["lp_status"] = lp.status
    if lp.status == "infeasible":
        diag = diagnose(problem, settings)
        msg = "the planning rules admit no harvest plan (even without the spatial rules)"
        raise InfeasibleError(msg, diag)
    lp_value = lp.value if lp.status == "optimal" else float("inf")
    scaling = make_scaling(prep)
    pool = CoverPool()
    stats["pair_covers"] = seed_pair_covers(prep, pool)
    registry: dict = {"solver": None, "interrupted": False}
    ctx = SearchCtx(
        prep=prep,
        scaling=scaling,
        pool=pool,
        workers=int(settings.workers),
        seed=int(settings.seed),
        deadline=deadline,
        t0=t0,
        lp_value=lp_value,
        registry=registry,
        stats=stats,
        gap_stop=float(settings.stop_gap),
    )

    def report(c: SearchCtx) -> None:
        if on_progress is None:
            return
        b = search_bound(c)
        on_progress(SolveProgress(time.perf_counter() - t0, c.best_npv, b, gap(c.best_npv, b)))

    ctx.on_improve = report
    with _sigint(registry):
        # 2. heuristic
        starts = start_plans(ctx, lp, float(settings.time_limit_s), stats)
        # 2b. the cover LP: a tighter bound than the aspatial LP where openings bind
        cover = _cover_bound(ctx, settings, stats)
        empty = prep.empty_plan()
        if ctx.best is None and not check_plan(prep, empty):
            ctx.offer(empty, "empty")
        # 3. improvement
        n_vars = prep.n_vars
        strategy = _strategy
        if strategy == "auto":
            strategy = "full" if n_vars <= FULL_MODEL_MAX_VARS else "windows"
        stats["strategy"] = strategy
        infeasible = False
        cache = WindowCache()  # cover lists shared by the window searches of this solve
        if strategy != "heuristic" and not ctx.stopped() and n_vars > 0:
            if ctx.best is None or (
                not prep.harvests_any(ctx.best) and strategy not in ("local", "windows")
            ):
                # No legal start for the local search: let CP-SAT find one first.
                infeasible = full_model(ctx, settings, stats, until_first=True)
            if (
                not infeasible
                and ctx.best is not None
                and starts.relaxed is not None
                and strategy in ("local", "windows")
            ):
                relaxed_chain(
                    ctx,
                    stats,
                    lp,
                    float(settings.time_limit_s),
                    starts.relaxed,
                    starts.relaxed_best,
                    starts.swept_npv,
                    cache,
                )
            if not infeasible and ctx.best is not None and strategy in ("full", "local"):
                # Small models: the local search gets a share of the time, CP-SAT polishes
                # the result (and proves optimality on small instances); large models: the
                # local search runs to the deadline.
                share = LOCAL_SHARE_FULL if strategy == "full" else 1.0
                local_search(
                    ctx,
                    stats,
                    time.perf_counter() + share * max(ctx.left(), 0.0),
                    patience=3 if strategy == "full" else 2,
                    repeat=strategy != "full",
                )
            blocks = strategy == "windows"
            if strategy == "full" and not infeasible and not ctx.stopped():
                infeasible = full_model(
                    ctx, settings, stats, until_first=False, stall_s=_full_stall_s(settings)
                )
                # CP-SAT on the whole model stalled: blocks of annealing and windows for
                # the time left (other neighbourhoods, CP-SAT's bound kept).
                blocks = not (ctx.stopped() or ctx.proven) and ctx.left() > BLOCK_MIN_S
            if blocks and not infeasible and ctx.best is not None:
                alternate(
                    ctx,
                    stats,
                    lp_stand_values(prep, lp),
                    float(settings.time_limit_s),
                    lp_volumes(lp),
                    cache,
                )
            if strategy == "lns" and not infeasible and ctx.best is not None:
                lns(ctx, lp_stand_values(prep, lp), lp_volume=lp_volumes(lp))
    # 4. result
    elapsed = time.perf_counter() - t0
    stats["solve_time_s"] = round(elapsed, 3)
    stats["covers"] = len(pool)
    stats["scale_factor"] = scaling.s_obj
    stats["max_objective_rounding_error"] = scaling.max_coef_error
    stats["objective_rounding_error_bound"] = scaling.total_error_bound
    stats["history"] = ctx.history
    stats["variables"] = stats.get("variables", n_vars)
    if infeasible:
        diag = diagnose(problem, settings)
        msg = "the planning rules admit no harvest plan"
        raise InfeasibleError(msg, diag)
    if ctx.best is None:
        msg = (
            f"no legal plan found within {settings.time_limit_s:g} s; "
            "raise the time limit (--time-limit)"
        )
        raise NoSolutionError(msg)
    final = ctx.best
    problems = check_plan(prep, final)
    if problems:  # never expected: every accepted plan was checked
        msg = "internal error: the best plan breaks rules: " + "; ".join(problems[:3])
        raise NoSolutionError(msg)
    npv = plan_npv(problem, final, prep.rx)
    bound = search_bound(ctx)
    plan_gap = gap(npv, bound)
    empty_plan = not prep.harvests_any(final)
    stats["empty_plan"] = bool(empty_plan)
    if empty_plan and lp_value > 0:
        stats["warnings"].append(
            "the best plan found harvests nothing although the LP bound is positive; "
            "raise the time limit or check the rules"
        )
    if registry["interrupted"]:
        status = "interrupted"
    elif ctx.proven or (plan_gap <= settings.stop_gap and not (empty_plan and lp_value > 0)):
        status = "optimal"
    elif time.perf_counter() >= deadline - 0.05 or strategy in ("lns", "local", "windows"):
        status = "time_limit"
    else:
        status = "feasible"
    return PlanResult(
        period=prep.first_period(final),
        status=status,
        npv=npv,
        cpsat_bound=ctx.cpsat_bound,
        lp_bound=float(lp.value) if lp.status == "optimal" else float("nan"),
        gap=plan_gap,
        solve_time_s=elapsed,
        stats=stats,
        prescription=final.copy(),
        cover_bound=cover,
    )


def _full_stall_s(settings: SolverSettings) -> float:
    """Seconds CP-SAT on the full model may run without a better plan before handing over."""
    return max(FULL_STALL_MIN_S, FULL_STALL_SHARE * float(settings.time_limit_s))


def _cover_bound(ctx: SearchCtx, settings: SolverSettings, stats: dict) -> float | None:
    """The cover LP bound within its share of the time limit; tightens ``ctx.lp_value``."""
    prep = ctx.prep
    budget = min(float(settings.cover_bound_share) * float(settings.time_limit_s), ctx.left())
    if not prep.spatial or budget <= 0.0 or not np.isfinite(ctx.lp_value):
        return None
    res = cover_lp_bound(prep, time_limit_s=budget)
    stats["cover_lp"] = {
        "status": res.status,
        "value": res.value,
        "rounds": res.rounds,
        "covers": res.covers,
        "seconds": round(res.seconds, 3),
    }
    if not np.isfinite(res.value):
        return None
    # Every legal plan is below both bounds: the gap and the stop rule use the smaller.
    ctx.lp_value = min(ctx.lp_value, res.value)
    return res.value


def diagnose(problem: PlanProblem, settings: SolverSettings) -> list[str]:
    """Which rule family makes a problem infeasible, and the smallest relaxation that works.

    See :func:`spatialplan.schedule.diagnosis.diagnose`.
    """
    from spatialplan.schedule.diagnosis import diagnose as _diagnose

    return _diagnose(problem, settings)
