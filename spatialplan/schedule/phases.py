"""Search phases of a solve: the annealing, CP-SAT on the whole model, blocks of annealing
or CP-SAT windows, and the search without the non-declining rows swept back.

Each phase takes the shared :class:`~spatialplan.schedule.windows.SearchCtx` (the best
plan, the deadline, the bounds), improves ``ctx.best`` through ``ctx.offer`` (which checks
every plan) and records what it did in ``stats``; :func:`spatialplan.schedule.driver.solve`
chooses which phases run (docs/methods.md, "Scheduling model").
"""

from __future__ import annotations

import time

import numpy as np

from spatialplan.schedule.anneal import anneal
from spatialplan.schedule.bound import LpResult
from spatialplan.schedule.cpsat import SubModel
from spatialplan.schedule.model import Prep
from spatialplan.schedule.quality import gap
from spatialplan.schedule.repair import sweep_flow
from spatialplan.schedule.starts import Start, sweep_deadline
from spatialplan.schedule.windows import SearchCtx, WindowCache, WindowSearch, lazy_rounds
from spatialplan.settings import SolverSettings

# Large models, after the annealing's first stall: blocks of this share of the time limit
# (at least BLOCK_MIN_S) go to the annealing or the CP-SAT windows, whichever gained more
# per second in its last block (docs/benchmarks.md, "CP-SAT windows": the annealing gains
# more on single-harvest landscapes, the windows where chained flow rows stall it).
BLOCK_SHARE = 0.15
BLOCK_MIN_S = 5.0
# The annealing's first run (its quick climb) ends when it stalls or after this share of
# the remaining time (on the demo its rounds keep improving a little for the whole limit).
FIRST_LOCAL_SHARE = 0.3
# Non-declining flow: a share of the time left after the construction goes to a search on
# the problem without the non-declining rows (every other rule kept); its plans are swept
# back into the chain of rows (repair.sweep_flow), at most every SWEEP_EVERY_S seconds.
RELAXED_SHARE = 0.4
SWEEP_EVERY_S = 2.0
# CP-SAT on the whole model counts as stalled when a call of its stall time raised the NPV
# by less than this share (on the 500-stand bench landscape, seed 2, it found +0.003 %
# in each of its last 90 s and kept the time from the windows).
STALL_GAIN = 1e-4


def search_bound(ctx: SearchCtx) -> float:
    """The best bound the search has proven: the LP (or cover LP), CP-SAT's, the plan's
    own NPV once it is proven optimal."""
    b = ctx.lp_value
    if ctx.cpsat_bound is not None:
        b = min(b, ctx.cpsat_bound)
    if ctx.proven:
        b = min(b, ctx.best_npv)
    return b


def full_model(
    ctx: SearchCtx,
    settings: SolverSettings,
    stats: dict,
    until_first: bool,
    stall_s: float | None = None,
) -> bool:
    """CP-SAT on the full model with lazy covers; returns True when proven infeasible.

    With ``stall_s`` it also returns once CP-SAT ran that many seconds (its calls of
    doubling length from the best plan) without raising the NPV by ``STALL_GAIN`` of
    itself, so that the caller can give the time left to other neighbourhoods.
    """
    prep = ctx.prep
    free = np.nonzero(prep.has_choice)[0]
    base = prep.empty_plan()
    tb = time.perf_counter()
    sub = SubModel(prep, free, base, ctx.scaling)
    stats["model_build_s"] = round(time.perf_counter() - tb, 3)
    while not ctx.stopped():
        before = ctx.best_npv
        res = lazy_rounds(
            ctx,
            sub,
            ctx.left() if stall_s is None else min(ctx.left(), stall_s),
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
            and gap(ctx.best_npv, search_bound(ctx)) <= settings.stop_gap
        ):
            break
        if stall_s is not None and ctx.best_npv <= before + STALL_GAIN * abs(before):
            stats["full_model_stalled_at_s"] = round(time.perf_counter() - ctx.t0, 3)
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


def local_search(
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


def alternate(
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
    local_search(
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
            local_search(
                ctx, stats, min(t + span, ctx.deadline), patience=2, repeat=True, state=state
            )
        dt = time.perf_counter() - t
        rate[m] = (ctx.best_npv - before) / max(dt, 1e-3)
        blocks.append((m, round(dt, 2), round(ctx.best_npv - before, 2)))
    stats["search_blocks"] = blocks


def relaxed_chain(
    ctx: SearchCtx,
    stats: dict,
    lp: LpResult,
    time_limit_s: float,
    prep_r: Prep,
    start: Start | None,
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
        plan = sweep_flow(prep, c.best, sweep_deadline(ctx, time_limit_s))
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
    alternate(rctx, rctx.stats, lp_stand_values(prep_r, lp), time_limit_s, lp_volumes(lp), cache)
    sweep(rctx, force=True)
    info["relaxed_npv"] = rctx.best_npv
    info["seconds"] = round(time.perf_counter() - t, 3)
    info["search_blocks"] = rctx.stats.get("search_blocks")
    stats["relaxed_chain"] = info


def lp_stand_values(prep: Prep, lp: LpResult) -> np.ndarray | None:
    """(K,) -> (n,): each stand's value in the LP solution, against no harvest."""
    if lp.status != "optimal" or lp.x_rx is None:
        return None
    x = np.asarray(lp.x_rx, dtype=float)
    return np.bincount(prep.stand_of, weights=x * prep.rel_value, minlength=prep.n)


def lp_volumes(lp: LpResult) -> np.ndarray | None:
    """(P,) harvest volume of the LP solution by period (``None`` without one)."""
    if lp.status != "optimal":
        return None
    return np.asarray(lp.period_volume_m3, dtype=float)


def _first_slice(prep: Prep) -> float:
    return float(min(5.0, 0.5 + prep.n_vars / 4000.0))
