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
   within seconds (:mod:`spatialplan.schedule.construct`).
3. Simulated annealing over prescription choices with hard opening checks and
   penalised rule rows (:mod:`spatialplan.schedule.anneal`): on large models until the
   deadline, on small and medium ones for a share of the time.
4. Small and medium models: CP-SAT (:mod:`spatialplan.schedule.cpsat`) on the full model
   hinted with the best plan, minimal cover clauses added lazily in rounds (each returned
   plan is checked, its over-size openings become clauses, near-legal plans are repaired in
   a small window); it gives the bound and proves optimality on small instances. Large
   models: the annealing until it stalls, then blocks of annealing or of CP-SAT windows
   (:class:`spatialplan.schedule.windows.WindowSearch`) to the deadline, each block to the
   one that gained more per second; a window frees some stands, keeps the rest at the best
   plan and re-optimises the freed ones exactly.
5. The final plan is re-checked in float64 against every rule.

The empty plan: when the rules allow it (with default even flow ``0 <= 0`` holds) harvesting
nothing is a legal plan and may be returned when nothing better was found in time, but
never silently: ``stats["empty_plan"]`` is ``True`` and ``stats["warnings"]`` says so, and its
status is never ``"optimal"`` while the LP bound is positive.
"""

from __future__ import annotations

import dataclasses
import signal
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np

from spatialplan.errors import InfeasibleError, NoSolutionError
from spatialplan.problem import PlanProblem, Prescriptions
from spatialplan.schedule.anneal import anneal
from spatialplan.schedule.bound import LpResult, cover_lp_bound, lp_bound, solve_lp
from spatialplan.schedule.construct import greedy_plan
from spatialplan.schedule.cpsat import CoverPool, SubModel, make_scaling
from spatialplan.schedule.model import Prep, check_plan, plan_harvests, plan_npv, prepare
from spatialplan.schedule.repair import sweep_flow
from spatialplan.schedule.windows import (
    SearchCtx,
    WindowCache,
    WindowSearch,
    lazy_rounds,
    lns,
    seed_pair_covers,
)
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
# Large models, after the annealing's first stall: blocks of this share of the time limit
# (at least BLOCK_MIN_S) go to the annealing or the CP-SAT windows, whichever gained more
# per second in its last block (docs/benchmarks.md, "CP-SAT windows": the annealing gains
# more on single-harvest landscapes, the windows where chained flow rows stall it).
BLOCK_SHARE = 0.15
BLOCK_MIN_S = 5.0
# The annealing's first run (its quick climb) ends when it stalls or after this share of
# the remaining time (on the demo its rounds keep improving a little for the whole limit).
FIRST_LOCAL_SHARE = 0.3
HEURISTIC_ORDERS = ("balanced", "regret", "lp_round", "sequential")
# Non-declining flow: the construction also aims 1-4 % below the LP's period volumes
# (``greedy_plan(slack=...)``), which leaves its flow repair room to keep the chain of rows;
# at the LP's own volumes the repair often fails and the plan is trimmed to nothing
# (docs/benchmarks.md, "Construction targets below the LP volumes"). These variants run
# while the construction has used less than CONSTRUCT_SHARE of the time limit; the
# FALLBACK_SLACKS ones only while no plan that harvests was found.
CHAIN_SLACKS = (-0.02, -0.01, 0.0, -0.03, -0.04)
FALLBACK_SLACKS = (-0.08, -0.15)
CONSTRUCT_SHARE = 0.3
# Non-declining flow: a share of the time left after the construction goes to a search on
# the problem without the non-declining rows (every other rule kept); its plans are swept
# back into the chain of rows (repair.sweep_flow), at most every SWEEP_EVERY_S seconds.
RELAXED_SHARE = 0.4
SWEEP_EVERY_S = 2.0
SWEEP_SHARE = 0.1  # of the time limit, at most, for one sweep
# Slacks (below the LP's period volumes) of the looser construction's best order, each
# plan swept, while the construction budget lasts; under non-declining flow the two
# constructions (looser one swept, slack ladder) share CHAIN_CONSTRUCT_SHARE of the time
# limit (on the demo the searches after them gained 0-0.04 points of the bound).
RELAXED_SLACKS = (-0.02, -0.04, -0.01, -0.03)
CHAIN_CONSTRUCT_SHARE = 0.5


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


def gap(npv: float, bound: float) -> float:
    """Relative gap of a plan's NPV to an upper bound: ``(bound - npv) / |bound|``.

    Never negative; infinite when there is no finite bound. The denominator is kept away
    from zero so a bound of 0 gives a large gap rather than a division error.

    Examples
    --------
    >>> gap(95.0, 100.0)
    0.05
    >>> gap(100.0, float("nan"))
    inf
    """
    if not np.isfinite(bound):
        return float("inf")
    return max(0.0, (bound - npv) / max(abs(bound), 1e-9))


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
        b = _bound(c)
        on_progress(SolveProgress(time.perf_counter() - t0, c.best_npv, b, gap(c.best_npv, b)))

    ctx.on_improve = report
    with _sigint(registry):
        # 2. heuristic
        th = time.perf_counter()
        budget = CONSTRUCT_SHARE * float(settings.time_limit_s)
        relaxed = None
        chain = problem.flow.non_declining and prep.P > 1
        sweeps: dict = {"n": 0, "s": 0.0, "npv": -np.inf}
        ladder = _construction_runs(problem)
        best_h: tuple[np.ndarray, float, str] | None = None
        hinfo: dict = {}
        if chain:
            # The ladder's first run first: a legal plan within seconds (the looser
            # construction and its sweeps take a third of the time limit on the demo).
            best_h, hinfo = _construct(
                prep, lp, ladder[:1], deadline, budget, lambda p: ctx.offer(p, "heuristic")
            )
            ladder = ladder[1:]
            # Non-declining flow: the construction without those rows, its plans swept
            # back into the chain of rows (see _looser_construction).
            relaxed = _without_chain(prep)
            budget = CHAIN_CONSTRUCT_SHARE * float(settings.time_limit_s)
            rbest, rinfo = _looser_construction(
                ctx, relaxed, lp, float(settings.time_limit_s), th + budget, sweeps
            )
            stats["relaxed_heuristic"] = rinfo
            stats["relaxed_heuristic_sweeps"] = {
                "runs": sweeps["n"],
                "seconds": round(sweeps["s"], 3),
            }
        else:
            rbest = None
        # Several assignment orders (each a fraction of a second per 1,000 stands); the
        # best legal plan is kept. Which order wins depends on the landscape; under
        # non-declining flow neither way of construction wins everywhere (on 150-stand
        # landscapes the sweep often loses to the slack ladder, on the demo it wins by
        # 2.5 points), so the ladder's first run comes first and the rest of the ladder
        # gets what the looser construction leaves of the budget.
        best_rest, info_rest = _construct(
            prep,
            lp,
            ladder,
            deadline,
            max(budget - (time.perf_counter() - th), 0.0),
            lambda plan: ctx.offer(plan, "heuristic"),
            best_h,
        )
        hinfo.update(info_rest)
        best_h = best_rest
        stats["heuristic_time_s"] = round(time.perf_counter() - th, 3)
        stats["heuristic"] = hinfo
        if best_h is not None:
            ctx.offer(best_h[0], "heuristic")
            stats["heuristic_order"] = best_h[2]
        stats["heuristic_npv"] = None if best_h is None else best_h[1]
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
                infeasible = _full(ctx, settings, stats, until_first=True)
            if (
                not infeasible
                and ctx.best is not None
                and relaxed is not None
                and strategy in ("local", "windows")
            ):
                _relaxed_chain(
                    ctx,
                    stats,
                    lp,
                    float(settings.time_limit_s),
                    relaxed,
                    rbest,
                    sweeps["npv"],
                    cache,
                )
            if not infeasible and ctx.best is not None and strategy in ("full", "local"):
                # Small models: the local search gets a share of the time, CP-SAT polishes
                # the result (and proves optimality on small instances); large models: the
                # local search runs to the deadline.
                share = LOCAL_SHARE_FULL if strategy == "full" else 1.0
                _local(
                    ctx,
                    stats,
                    time.perf_counter() + share * max(ctx.left(), 0.0),
                    patience=3 if strategy == "full" else 2,
                    repeat=strategy != "full",
                )
            if strategy == "full" and not infeasible and not ctx.stopped():
                infeasible = _full(ctx, settings, stats, until_first=False)
            if strategy == "windows" and not infeasible and ctx.best is not None:
                _alternate(
                    ctx,
                    stats,
                    _lp_stand_value(prep, lp),
                    float(settings.time_limit_s),
                    _lp_volume(lp),
                    cache,
                )
            if strategy == "lns" and not infeasible and ctx.best is not None:
                lns(ctx, _lp_stand_value(prep, lp), lp_volume=_lp_volume(lp))
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
    bound = _bound(ctx)
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


def _bound(ctx: SearchCtx) -> float:
    b = ctx.lp_value
    if ctx.cpsat_bound is not None:
        b = min(b, ctx.cpsat_bound)
    if ctx.proven:
        b = min(b, ctx.best_npv)
    return b


def _full(ctx: SearchCtx, settings: SolverSettings, stats: dict, until_first: bool) -> bool:
    """CP-SAT on the full model with lazy covers; returns True when proven infeasible."""
    prep = ctx.prep
    free = np.nonzero(prep.has_choice)[0]
    base = prep.empty_plan()
    tb = time.perf_counter()
    sub = SubModel(prep, free, base, ctx.scaling)
    stats["model_build_s"] = round(time.perf_counter() - tb, 3)
    while not ctx.stopped():
        res = lazy_rounds(
            ctx,
            sub,
            ctx.left(),
            "cpsat",
            first_slice_s=_first_slice(prep),
            gap=settings.stop_gap,
            repair=True,
            full=True,
        )
        if res == "infeasible":
            return True
        if res == "optimal" or (until_first and ctx.best is not None and ctx.best.any()):
            break
        if (
            ctx.best is not None
            and ctx.cpsat_bound is not None
            and gap(ctx.best_npv, _bound(ctx)) <= settings.stop_gap
        ):
            break
    size = sub.size()
    stats.update(
        {
            "variables": size["variables"],
            "constraints": size["constraints"],
            "area_restriction_constraints": size["cover_clauses"],
            "row_tightening_rel": sub.row_tightening,
        }
    )
    return False


def _offer_local(ctx: SearchCtx, plan: np.ndarray) -> None:
    ctx.offer(plan, "local")


def _local(
    ctx: SearchCtx,
    stats: dict,
    until: float,
    patience: int,
    repeat: bool,
    state: dict | None = None,
) -> None:
    """Simulated annealing from the best plan (:mod:`spatialplan.schedule.anneal`).

    With ``repeat`` the search starts again from the best plan with longer rounds and the
    next seed whenever it stalls, until ``until``. Rounds are ``max(50,000, 400 n, 15 x
    prescription variables)`` moves to begin with. ``state`` carries the round length,
    the seed counter and the totals from one call to the next (blocks of one solve).
    """
    prep = ctx.prep
    assert ctx.best is not None
    state = {} if state is None else state
    # Longer rounds with many prescriptions per stand (re-harvest models): 3M moves a
    # round gave 93.5 % of the LP bound in 60 s on the 2,000-stand estate landscape,
    # 800k-move rounds 92.7 %. The single-harvest model keeps 400 moves per stand.
    round_moves = state.get("round_moves", max(50_000, 400 * prep.n, 15 * prep.n_vars))
    k = state.get("k", 0)
    tl = time.perf_counter()
    info: dict = stats.get("local_search") or {
        "runs": 0,
        "moves": 0,
        "rounds": 0,
        "improving_rounds": 0,
        "seconds": 0.0,
        "gain": 0.0,
    }
    start_npv = ctx.best_npv
    while ctx.best is not None and not ctx.stopped() and time.perf_counter() < until:
        start_round = ctx.best_npv
        res = anneal(
            prep,
            ctx.best,
            seed=ctx.seed + 7919 * k,
            deadline=until,
            round_moves=round_moves,
            patience=patience,
            stop=ctx.stopped,
            on_best=lambda per, v: _offer_local(ctx, per),
        )
        info["runs"] += 1
        # NPV per second of the run's last round: what one more round is likely worth.
        h = res.history
        if h and res.seconds > 0 and res.moves > 0:
            prev_v, prev_m = (h[-2][2], h[-2][1]) if len(h) >= 2 else (start_round, 0)
            round_s = (h[-1][1] - prev_m) / (res.moves / res.seconds)
            state["last_round_rate"] = (h[-1][2] - prev_v) / max(round_s, 1e-3)
        info["moves"] += res.moves
        info["rounds"] += res.rounds
        info["improving_rounds"] += res.improving_rounds
        k += 1
        if not repeat:
            break
        round_moves *= 2
    state["round_moves"], state["k"] = round_moves, k
    info["seconds"] = round(info["seconds"] + time.perf_counter() - tl, 3)
    dt = info["seconds"]
    info["moves_per_s"] = round(info["moves"] / dt) if dt > 0 else None
    info["gain"] += ctx.best_npv - start_npv
    stats["local_search"] = info


def _alternate(
    ctx: SearchCtx,
    stats: dict,
    lp_stand_value: np.ndarray | None,
    time_limit_s: float,
    lp_volume: np.ndarray | None = None,
    cache: WindowCache | None = None,
) -> None:
    """The annealing until it stalls (at most ``FIRST_LOCAL_SHARE`` of the time left),
    then blocks of annealing or CP-SAT windows.

    The windows get the first block; afterwards the next block goes to the one that
    gained more NPV per second in its last block (the annealing's first run counts by its
    last round), and the other one is re-measured after
    three blocks without a turn (what pays changes as the plan improves).
    """
    state: dict = {}
    t = time.perf_counter()
    before = ctx.best_npv
    _local(
        ctx,
        stats,
        t + FIRST_LOCAL_SHARE * max(ctx.left(), 0.0),
        patience=2,
        repeat=False,
        state=state,
    )
    blocks = [("local", round(time.perf_counter() - t, 2), round(ctx.best_npv - before, 2))]
    windows = WindowSearch(ctx, lp_stand_value, lp_volume=lp_volume, cache=cache)
    block = max(BLOCK_MIN_S, BLOCK_SHARE * time_limit_s)
    # The annealing is first judged by what its last round gained per second (its early
    # rounds climb fast and say little about the next one).
    rate: dict[str, float | None] = {"windows": None, "local": state.get("last_round_rate")}
    idle = {"windows": 0, "local": 0}  # blocks since each method last ran
    while ctx.best is not None and not ctx.stopped() and ctx.left() > 0.3:
        if rate["windows"] is None:
            m = "windows"
        elif rate["local"] is None:
            m = "local"
        else:
            order = sorted(rate, key=lambda k: rate[k] or 0.0, reverse=True)
            m = order[1] if idle[order[1]] >= 3 else order[0]
        idle = {k: 0 if k == m else v + 1 for k, v in idle.items()}
        t = time.perf_counter()
        before = ctx.best_npv
        if m == "windows":
            windows.run(min(t + block, ctx.deadline))
        else:
            # A cut-short annealing round is still hot and finds nothing: the block
            # holds at least one whole round at the measured move rate.
            mps = stats["local_search"].get("moves_per_s") or 1e5
            span = max(block, 1.2 * state["round_moves"] / mps)
            _local(ctx, stats, min(t + span, ctx.deadline), patience=2, repeat=True, state=state)
        dt = time.perf_counter() - t
        rate[m] = (ctx.best_npv - before) / max(dt, 1e-3)
        blocks.append((m, round(dt, 2), round(ctx.best_npv - before, 2)))
    stats["search_blocks"] = blocks


def _construct(
    prep: Prep,
    lp: LpResult,
    runs: list[tuple[str, float]],
    deadline: float,
    budget: float,
    on_plan: Callable[[np.ndarray], object],
    best: tuple[np.ndarray, float, str] | None = None,
) -> tuple[tuple[np.ndarray, float, str] | None, dict]:
    """The construction runs ``(order, slack)`` in turn: the best legal plan and each run's info.

    Every better legal plan goes to ``on_plan`` at once (several runs can take a third of
    the time limit). With more runs than orders (the slack ladder of non-declining flow)
    the runs stop once ``budget`` seconds are used and a plan that harvests was found;
    the fallback slacks run only while none was. ``best`` is the best plan of earlier
    runs (``(plan, npv, key)``), kept unless a run beats it.
    """
    problem = prep.problem
    th = time.perf_counter()
    hinfo: dict = {}
    best_h = best
    for order, slack in runs:
        now = time.perf_counter()
        if best_h is not None and (
            now >= deadline
            or (
                len(runs) > len(HEURISTIC_ORDERS)
                and (now - th > budget or slack in FALLBACK_SLACKS)
                and prep.harvests_any(best_h[0])
            )
        ):
            break
        if lp.status == "optimal" and lp.x_rx is not None:
            plan, info = greedy_plan(prep, lp.x_rx, lp.price, deadline, order=order, slack=slack)
        else:
            # No LP solution: spread every stand evenly over its harvest periods.
            even = np.where(prep.harvest_mask != 0, 1.0 / max(prep.P, 1), 0.0)
            plan, info = greedy_plan(prep, even, None, deadline, order=order)
        info["npv"] = plan_npv(problem, plan, prep.rx) if info.get("legal") else None
        info["seconds"] = round(time.perf_counter() - now, 3)
        key = order if slack == 0.0 else f"{order} {slack:+.0%}"
        hinfo[key] = info
        if info.get("legal") and (best_h is None or info["npv"] > best_h[1]):
            best_h = (plan, info["npv"], key)
            on_plan(plan)
    return best_h, hinfo


def _sweep_deadline(ctx: SearchCtx, time_limit_s: float) -> float:
    """When a sweep started now must end (a sweep cut short returns a plan that is checked)."""
    return min(ctx.deadline, time.perf_counter() + SWEEP_SHARE * time_limit_s)


def _looser_construction(
    ctx: SearchCtx,
    relaxed: Prep,
    lp: LpResult,
    time_limit_s: float,
    until: float,
    sweeps: dict,
) -> tuple[tuple[np.ndarray, float, str] | None, dict]:
    """The construction on the problem without the non-declining rows, swept back.

    The four assignment orders on ``relaxed``, their best plan swept into the chain of
    rows (:func:`sweep_flow`), then the best order again at each of ``RELAXED_SLACKS``
    below the LP's volumes, each plan swept, until ``until``: a plan that leaves the later
    periods room under a volume cap loses less in the sweep (on the demo 0.9815 of the
    bound from -2 % against 0.979 from 0 %). Every swept plan is offered to ``ctx``
    (checked there). ``sweeps`` counts the sweeps, their seconds and the best looser NPV
    swept. Returns the best looser plan ``(plan, npv, key)`` and each run's info.
    """
    prep = ctx.prep

    def swept(plan: np.ndarray) -> None:
        ts = time.perf_counter()
        ctx.offer(sweep_flow(prep, plan, _sweep_deadline(ctx, time_limit_s)), "relaxed")
        sweeps["n"] += 1
        sweeps["s"] += time.perf_counter() - ts
        sweeps["npv"] = max(sweeps["npv"], plan_npv(prep.problem, plan, prep.rx))

    t = time.perf_counter()
    runs = _construction_runs(relaxed.problem)
    rbest, rinfo = _construct(relaxed, lp, runs, ctx.deadline, until - t, lambda p: None)
    if rbest is None:
        return None, rinfo
    swept(rbest[0])
    if lp.status != "optimal" or lp.x_rx is None:
        return rbest, rinfo
    order = rbest[2]
    for slack in RELAXED_SLACKS:
        now = time.perf_counter()
        if now >= min(until, ctx.deadline):
            break
        plan, info = greedy_plan(relaxed, lp.x_rx, lp.price, ctx.deadline, order=order, slack=slack)
        info["seconds"] = round(time.perf_counter() - now, 3)
        rinfo[f"{order} {slack:+.0%}"] = info
        if info.get("legal"):
            swept(plan)
    return rbest, rinfo


def _without_chain(prep: Prep) -> Prep:
    """The problem without its non-declining rows (every other rule kept), prepared."""
    problem = prep.problem
    return prepare(
        dataclasses.replace(problem, flow=dataclasses.replace(problem.flow, non_declining=False))
    )


def _relaxed_chain(
    ctx: SearchCtx,
    stats: dict,
    lp: LpResult,
    time_limit_s: float,
    prep_r: Prep,
    start: tuple[np.ndarray, float, str] | None,
    swept_npv: float = -np.inf,
    cache: WindowCache | None = None,
) -> None:
    """Search without the non-declining rows, sweeping its plans back into the chain.

    Under non-declining flow a period's volume can only rise when every later one does,
    so single moves and windows stall on a plan that climbs to the cap. Without those
    rows (the flow tolerance, the volume limits, openings and every other rule kept) the
    same search keeps the volumes level near the LP's; :func:`sweep_flow` then lowers the
    periods, last first, until each is at most the next. ``RELAXED_SHARE`` of the time
    left goes to this phase; the swept plans are offered to ``ctx`` as they come (each
    sweep is checked there), the last one at the end of the phase. ``prep_r`` is the
    problem without the non-declining rows; the search starts from the better of
    ``start`` (its construction's best plan) and ``ctx.best``; only plans better than
    ``swept_npv`` (the best one swept already) are swept.
    """
    prep = ctx.prep
    t = time.perf_counter()
    until = t + RELAXED_SHARE * max(ctx.left(), 0.0)
    info: dict = {"sweeps": 0, "sweep_s": 0.0, "offered": 0}
    rctx = SearchCtx(
        prep=prep_r,
        scaling=ctx.scaling,
        pool=ctx.pool,
        workers=ctx.workers,
        seed=ctx.seed,
        deadline=until,
        t0=ctx.t0,
        lp_value=ctx.lp_value,
        registry=ctx.registry,
        stats={"warnings": []},
        gap_stop=ctx.gap_stop,
    )
    last = {"at": -np.inf, "npv": swept_npv}  # the best looser plan swept so far

    def sweep(c: SearchCtx, force: bool = False) -> None:
        now = time.perf_counter()
        if c.best is None or c.best_npv <= last["npv"]:
            return
        if not force and now - last["at"] < max(
            SWEEP_EVERY_S, 5.0 * info["sweep_s"] / max(info["sweeps"], 1)
        ):
            return
        plan = sweep_flow(prep, c.best, _sweep_deadline(ctx, time_limit_s))
        last["at"], last["npv"] = time.perf_counter(), c.best_npv
        info["sweeps"] += 1
        info["sweep_s"] = round(info["sweep_s"] + last["at"] - now, 3)
        if ctx.offer(plan, "relaxed"):
            info["offered"] += 1

    if start is not None:
        rctx.offer(start[0], "start")
    if ctx.best is not None:
        rctx.offer(ctx.best, "start")
    if rctx.best is None:
        return
    rctx.on_improve = sweep
    _alternate(rctx, rctx.stats, _lp_stand_value(prep_r, lp), time_limit_s, _lp_volume(lp), cache)
    sweep(rctx, force=True)
    info["relaxed_npv"] = rctx.best_npv
    info["seconds"] = round(time.perf_counter() - t, 3)
    info["search_blocks"] = rctx.stats.get("search_blocks")
    stats["relaxed_chain"] = info


def _lp_stand_value(prep, lp: LpResult) -> np.ndarray | None:
    """(K,) -> (n,): each stand's value in the LP solution, against no harvest."""
    if lp.status != "optimal" or lp.x_rx is None:
        return None
    x = np.asarray(lp.x_rx, dtype=float)
    return np.bincount(prep.stand_of, weights=x * prep.rel_value, minlength=prep.n)


def _construction_runs(problem: PlanProblem) -> list[tuple[str, float]]:
    """(order, slack) of the construction runs, in the order tried."""
    if problem.flow.non_declining and problem.periods > 1:
        return [(o, s) for s in CHAIN_SLACKS + FALLBACK_SLACKS for o in HEURISTIC_ORDERS]
    return [(o, 0.0) for o in HEURISTIC_ORDERS]


def _lp_volume(lp: LpResult) -> np.ndarray | None:
    """(P,) harvest volume of the LP solution by period (``None`` without one)."""
    if lp.status != "optimal":
        return None
    return np.asarray(lp.period_volume_m3, dtype=float)


def _first_slice(prep) -> float:
    return float(min(5.0, 0.5 + prep.n_vars / 4000.0))


def diagnose(problem: PlanProblem, settings: SolverSettings) -> list[str]:
    """Which rule family makes a problem infeasible, and the smallest relaxation that works.

    See :func:`spatialplan.schedule.diagnosis.diagnose`.
    """
    from spatialplan.schedule.diagnosis import diagnose as _diagnose

    return _diagnose(problem, settings)
