"""Search loops: lazy cover rounds on a CP-SAT model, repair windows and spatial LNS.

*Lazy rounds.* Solve a (sub-)model, check the plan it returns with the float64 checker;
every over-size opening gives minimal covers that are added to the model and to a pool
shared by all later models; repeat until the returned plan is legal. A legal plan that
CP-SAT proved optimal for a model holding only some covers is optimal for the full rules
(the model is a relaxation).

*Repair.* A plan CP-SAT proposes that breaks some openings is usually close to a very good
legal plan: the stands of the offending openings and their neighbours are freed, the rest
fixed at the proposal, and the window is solved by lazy rounds.

*Spatial LNS.* Large neighbourhood search (Shaw 1998, from memory) over windows of the
adjacency graph: a breadth-first ball of a few hundred stands around a seed stand is freed,
every other stand keeps its prescription in the best plan (and enters the openings and the flow
rows as constants), the window is re-optimised with CP-SAT, and improvements are kept.
Windows adapt their size to how fast CP-SAT closes them.
"""

from __future__ import annotations

import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from spatialplan.schedule.cpsat import CoverPool, Scaling, SubModel
from spatialplan.schedule.model import (
    Prep,
    check_plan,
    extract_covers,
    plan_npv,
    spatial_breaches,
)

__all__ = ["SearchCtx", "lazy_rounds", "lns", "seed_pair_covers"]


@dataclass
class SearchCtx:
    """State shared by the search loops of one solve."""

    prep: Prep
    scaling: Scaling
    pool: CoverPool
    workers: int
    seed: int
    deadline: float
    t0: float
    lp_value: float
    registry: dict = field(default_factory=lambda: {"solver": None, "interrupted": False})
    best: np.ndarray | None = None
    best_npv: float = -np.inf
    cpsat_bound: float | None = None
    proven: bool = False
    on_improve: Callable[[SearchCtx], None] | None = None
    stats: dict = field(default_factory=dict)
    history: list = field(default_factory=list)
    gap_stop: float = 0.0

    def left(self) -> float:
        """Seconds to the deadline."""
        return self.deadline - time.perf_counter()

    def stopped(self) -> bool:
        """Deadline passed, interrupted, or the best plan is within the stopping gap."""
        if self.registry.get("interrupted") or self.left() <= 0 or self.proven:
            return True
        if self.best is None:
            return False
        b = self.lp_value if self.cpsat_bound is None else min(self.lp_value, self.cpsat_bound)
        return bool(np.isfinite(b) and b > 0 and self.best_npv >= b * (1 - self.gap_stop))

    def bump(self, key: str, k: int = 1) -> None:
        """Add ``k`` to a counter in ``stats``."""
        self.stats[key] = self.stats.get(key, 0) + k

    def offer(self, plan: np.ndarray, source: str) -> bool:
        """Keep ``plan`` (prescription per stand) when it is legal and better than the best."""
        v = plan_npv(self.prep.problem, plan, self.prep.rx)
        if self.best is not None and v <= self.best_npv + 1e-9 * max(abs(self.best_npv), 1.0):
            return False
        if check_plan(self.prep, plan):
            self.bump("rejected_" + source)
            return False
        self.best = np.asarray(plan, dtype=np.int64).copy()
        self.best_npv = v
        el = time.perf_counter() - self.t0
        self.stats.setdefault("time_to_first_plan_s", round(el, 3))
        self.history.append((round(el, 3), v, source))
        self.bump("improvements_" + source)
        if self.on_improve is not None:
            self.on_improve(self)
        return True


def seed_pair_covers(prep: Prep, pool: CoverPool) -> int:
    """Add every adjacent pair whose opening area exceeds the maximum (cheap, always binds)."""
    if prep.max_opening is None:
        return 0
    e = np.asarray(prep.problem.edges, dtype=np.int64).reshape(-1, 2)
    if e.size == 0:
        return 0
    a = prep.opening_area
    big = (
        (a[e[:, 0]] + a[e[:, 1]] > prep.max_opening)
        & (a[e[:, 0]] <= prep.max_opening)
        & (a[e[:, 1]] <= prep.max_opening)
    )
    k = 0
    for i, j in e[big]:
        k += pool.add(frozenset((int(i), int(j))))
    return k


def _new_covers(ctx: SearchCtx, plan: np.ndarray, breaches: list) -> int:
    prep = ctx.prep
    _, hop = prep.open_matrices(plan)
    k = 0
    for p, grp in breaches:
        for s in extract_covers(prep, p, grp, hop):
            k += ctx.pool.add(s)
    ctx.bump("covers_found", k)
    return k


def _ball(prep: Prep, seed: int, size: int, extra: np.ndarray | None = None) -> np.ndarray:
    """Breadth-first ball of ``size`` stands with a harvesting prescription around ``seed``."""
    has = prep.has_choice
    seen = {seed}
    dq = deque([seed])
    out: list[int] = []
    while dq and len(out) < size:
        i = dq.popleft()
        if has[i]:
            out.append(i)
        for j in prep.neighbours(i):
            j = int(j)
            if j not in seen:
                seen.add(j)
                dq.append(j)
    if extra is not None:
        out = sorted(set(out) | {int(i) for i in extra if has[i]})
    return np.array(sorted(out), dtype=np.int64)


def lazy_rounds(
    ctx: SearchCtx,
    sub: SubModel,
    budget_s: float,
    source: str,
    first_slice_s: float = 1.0,
    gap: float = 0.0,
    repair: bool = False,
    full: bool = False,
    hint: np.ndarray | None = None,
) -> str:
    """Solve ``sub`` in rounds, adding covers until its plan is legal or time runs out.

    Returns ``"optimal"`` (legal and proven best for this model), ``"legal"``,
    ``"infeasible"`` (the model has no plan at all) or ``"open"``.
    """
    t_end = min(time.perf_counter() + budget_s, ctx.deadline)
    sub.add_covers(ctx.pool)
    slice_s = first_slice_s
    result = "open"
    while not ctx.stopped():
        left = t_end - time.perf_counter()
        if left <= 0.01:
            break
        h = hint if hint is not None else ctx.best
        if h is not None:
            sub.hint(h)
        out = sub.solve(min(slice_s, left), ctx.workers, ctx.seed, gap, ctx.registry)
        ctx.bump("cpsat_calls")
        ctx.stats["cpsat_time_s"] = ctx.stats.get("cpsat_time_s", 0.0) + out.wall_s
        if out.status == "infeasible":
            return "infeasible"
        if full and out.bound_int is not None and out.status in ("optimal", "feasible"):
            # Only a search that reached a solution reports a proven bound; a bound below a
            # legal plan already found cannot be one (an unfinished call reports junk).
            sc = ctx.scaling
            b = out.bound_int / sc.s_obj + sc.offset + sc.total_error_bound
            if b >= ctx.best_npv - 1e-6 * max(abs(ctx.best_npv), 1.0):
                ctx.cpsat_bound = b if ctx.cpsat_bound is None else min(ctx.cpsat_bound, b)
        if out.plan is None:
            slice_s *= 2
            continue
        br = spatial_breaches(ctx.prep, out.plan)
        if not br:
            ctx.offer(out.plan, source)
            if out.status == "optimal":
                if full:
                    ctx.proven = True
                return "optimal"
            result = "legal"
            slice_s *= 2
            continue
        ctx.bump("rounds")
        new = _new_covers(ctx, out.plan, br)
        sub.add_covers(ctx.pool)
        if repair and not ctx.stopped():
            _repair(ctx, out.plan, br)
        if new == 0:
            # Should not happen (every breach yields a new cover); avoid a busy loop.
            slice_s *= 2
    return result


def _repair(ctx: SearchCtx, plan: np.ndarray, breaches: list) -> None:
    """Make a near-legal plan legal by re-solving the offending openings and their ring."""
    prep = ctx.prep
    stands = set()
    for _, grp in breaches:
        for i in grp:
            stands.add(int(i))
            stands.update(int(j) for j in prep.neighbours(int(i)))
    has = prep.has_choice
    free = np.array(sorted(i for i in stands if has[i]), dtype=np.int64)
    if free.size == 0:
        return
    sub = SubModel(prep, free, plan, ctx.scaling)
    budget = min(max(1.0, 0.002 * free.size), ctx.left())
    # Hint with the proposal itself: the legal plan wanted is the one closest to it.
    lazy_rounds(ctx, sub, budget, "repair", first_slice_s=budget, hint=plan)
    ctx.bump("repairs")


def lns(ctx: SearchCtx, window: int = 250, window_time_s: float = 4.0) -> None:
    """Spatial large neighbourhood search from ``ctx.best`` until the deadline."""
    prep = ctx.prep
    rng = np.random.default_rng(ctx.seed)
    has = np.nonzero(prep.has_choice)[0]
    if has.size == 0 or ctx.best is None:
        return
    order = list(rng.permutation(has))
    size = min(window, has.size)
    sweeps = 0
    while not ctx.stopped():
        if not order:
            order = list(rng.permutation(has))
            sweeps += 1
        s = int(order.pop())
        free = _ball(prep, s, size)
        sub = SubModel(prep, free, ctx.best, ctx.scaling)
        before = ctx.best_npv
        t0 = time.perf_counter()
        res = lazy_rounds(
            ctx, sub, min(window_time_s, ctx.left()), "lns", first_slice_s=window_time_s
        )
        dt = time.perf_counter() - t0
        ctx.bump("lns_windows")
        if ctx.best_npv > before:
            ctx.bump("lns_improving_windows")
        # Adapt the window to CP-SAT's speed: proven windows may grow, slow ones shrink.
        if res == "optimal" and dt < 0.5 * window_time_s:
            size = min(int(size * 1.25) + 1, has.size)
        elif res != "optimal":
            size = max(int(size * 0.8), 30)
        # Drop covered seeds: stands in this window need not seed again this sweep.
        if len(order) > 50:
            fs = set(free.tolist()[:: max(1, len(free) // 10)])
            order = [i for i in order if i not in fs]
    ctx.stats["lns_sweeps"] = sweeps
    ctx.stats["lns_window_final"] = size
