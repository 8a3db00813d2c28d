"""Search loops: lazy cover rounds on a CP-SAT model, repair windows and spatial LNS.

*Lazy rounds.* Solve a (sub-)model, check the plan it returns with the float64 checker;
every over-size opening gives minimal covers that are added to the model and to a pool
shared by all later models; repeat until the returned plan is legal. A legal plan that
CP-SAT proved optimal for a model holding only some covers is optimal for the full rules
(the model is a relaxation).

*Repair.* A plan CP-SAT proposes that breaks some openings is usually close to a very good
legal plan: the stands of the offending openings and their neighbours are freed, the rest
fixed at the proposal, and the window is solved by lazy rounds.

*Windows.* Large neighbourhood search (Shaw 1998, from memory) with CP-SAT inside
(:class:`WindowSearch`): a window of stands of one of several kinds is freed, every other
stand keeps its prescription in the best plan (and enters the openings and the rule rows as
constants), the window is re-optimised with its opening covers written up front, and
improvements are kept. Kinds are drawn by what they gained per second; window sizes adapt
to how fast CP-SAT closes them.
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
    covers_from_roots,
    extract_covers,
    plan_npv,
    spatial_breaches,
    window_covers,
)
from spatialplan.schedule.repair import period_volumes

__all__ = ["SearchCtx", "WindowCache", "WindowSearch", "lazy_rounds", "lns", "seed_pair_covers"]


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
    keep_all: int = 0,
) -> str:
    """Solve ``sub`` in rounds, adding covers until its plan is legal or time runs out.

    With ``keep_all > 0`` up to that many earlier solutions of each call are checked when
    the last one breaks the opening rule (the best legal one is kept).

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
        out = sub.solve(
            min(slice_s, left), ctx.workers, ctx.seed, gap, ctx.registry, keep_all=keep_all > 0
        )
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
        if br and keep_all:
            # The final plan breaks covers not yet in the model; an earlier solution of the
            # same call may be legal and still better than the incumbent. Its breaches give
            # covers too, so one call teaches the model several of them.
            for plan in reversed(out.plans[:-1][-keep_all:]):
                if plan_npv(ctx.prep.problem, plan, ctx.prep.rx) <= ctx.best_npv:
                    break
                b2 = spatial_breaches(ctx.prep, plan)
                if not b2:
                    if ctx.offer(plan, source):
                        result = "legal"
                    break
                _new_covers(ctx, plan, b2)
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


# Neighbourhood kinds of the window search (see :func:`lns`).
# In the order of their first try: on the demo forest (tight chained flow rows) the
# few-period windows gained 0.8-1.1 % of the bound in 20 s and balls 0.04-0.2 %; on the
# single-harvest bench landscape opening windows gained most (docs/benchmarks.md). A
# ``forest`` window is a few-period window over the whole forest (or as much of it as its
# size allows): volume can then move along the whole chain of flow rows at once.
WINDOW_KINDS = ("forest", "periods", "opening", "ball", "lp_miss", "two_balls", "scatter")
# A few-period window starts this many times larger (each free stand has fewer choices).
PERIODS_SIZE = 3.0
# A whole-forest few-period window at most this many times (the demo's take 1,400-2,200
# variables; on the 2,000-stand bench landscape the whole forest, 17,400, took 15 s for
# nothing).
FOREST_SIZE = 4.0


@dataclass
class _Arm:
    """What one neighbourhood kind has paid so far."""

    tries: int = 0
    gain: float = 0.0
    seconds: float = 0.0
    target_vars: float = 0.0


def _grow(prep: Prep, seeds: list[int], target_vars: float, weight: np.ndarray) -> np.ndarray:
    """Breadth-first region from ``seeds`` until its free variables reach ``target_vars``.

    ``weight`` counts the variables a stand brings (stands with none are passed through).
    """
    seen = set(seeds)
    dq = deque(seeds)
    out: list[int] = []
    total = 0.0
    while dq and total < target_vars:
        i = dq.popleft()
        if weight[i] > 0:
            out.append(i)
            total += float(weight[i])
        for j in prep.neighbours(i):
            j = int(j)
            if j not in seen:
                seen.add(j)
                dq.append(j)
    return np.array(sorted(out), dtype=np.int64)


def _pick(rng: np.random.Generator, arms: dict[str, _Arm]) -> str:
    """Each kind once, then by NPV gained per second (a floor of 5 % of the best rate keeps
    every kind in play)."""
    for k, a in arms.items():
        if a.tries == 0:
            return k
    rates = np.array([a.gain / max(a.seconds, 1e-3) for a in arms.values()])
    top = float(rates.max())
    w = rates + 0.05 * (top if top > 0 else 1.0)
    return list(arms)[int(rng.choice(len(arms), p=w / w.sum()))]


def _window(
    ctx: SearchCtx,
    kind: str,
    target_vars: float,
    rng: np.random.Generator,
    stand_vars: np.ndarray,
    lp_stand_value: np.ndarray | None,
    deficit: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray | None]:
    """Free stands (and the prescriptions they may take) of one window of ``kind``."""
    prep = ctx.prep
    assert ctx.best is not None
    best = ctx.best
    has = np.nonzero(stand_vars > 0)[0]
    if kind == "lp_miss" and lp_stand_value is not None:
        # Stands whose LP value the plan misses most are where a re-packing pays.
        miss = np.maximum(lp_stand_value - prep.rel_value[best], 0.0)[has]
        if miss.sum() > 0:
            return _grow(
                prep, [int(rng.choice(has, p=miss / miss.sum()))], target_vars, stand_vars
            ), None
    if kind == "opening" and prep.spatial:
        _, hop = prep.open_matrices(best)
        cut = prep.harvest_mask[best] != 0
        periods = [p for p in range(prep.P) if (hop[:, p] & cut).any()]
        if periods:
            p = int(rng.choice(periods))
            members = np.nonzero(hop[:, p])[0]
            # The stands of up to three openings near a random open stand, then rings.
            seed = int(rng.choice(members))
            inset = set(members.tolist())
            region = _grow(prep, [seed], target_vars / 3.0, np.where(hop[:, p], 1.0, 0.0))
            seeds = [int(i) for i in region if int(i) in inset] or [seed]
            return _grow(prep, seeds, target_vars, stand_vars), None
    if kind in ("two_balls", "scatter") and has.size > 4:
        # Balls that do not touch, so volume can move between parts of the forest under
        # the flow rows: two, or six small ones.
        count = 2 if kind == "two_balls" else 6
        out = _grow(prep, [int(rng.choice(has))], target_vars / count, stand_vars)
        for _ in range(3 * count):
            far = np.setdiff1d(has, out)
            if far.size == 0 or len(out) == 0:
                break
            b = _grow(prep, [int(rng.choice(far))], target_vars / count, stand_vars)
            if not np.intersect1d(out, b).size:
                out = np.union1d(out, b)
                if out.size and np.sum(stand_vars[out]) >= 0.9 * target_vars:
                    break
        return out, None
    if kind in ("periods", "forest") and prep.P > 3:
        # Only a few consecutive periods free: every free stand keeps its harvests outside
        # them, so the window can be several times larger for the same model size.
        w = int(rng.integers(2, 4))
        a0 = int(rng.integers(0, prep.P - w + 1))
        if kind == "forest" and deficit is not None:
            # Where the plan's volume falls short of the LP's: the periods it must fill.
            short = np.convolve(np.maximum(deficit, 0.0), np.ones(w), "valid")
            short = short + 0.05 * max(float(short.max()), 1.0)
            a0 = int(rng.choice(short.size, p=short / short.sum()))
        inside = np.uint64(((1 << w) - 1) << a0)
        outside = ~inside
        hm = prep.harvest_mask
        allow = (hm & outside) == (hm[best[prep.stand_of]] & outside)
        allow[best] = True
        weight = np.bincount(prep.stand_of[prep.choice & allow], minlength=prep.n)
        if kind == "forest" and weight.sum() <= target_vars:
            return np.nonzero(weight > 0)[0], allow
        seed = int(rng.choice(has))
        return _grow(prep, [seed], target_vars, weight.astype(float)), allow
    return _grow(prep, [int(rng.choice(has))], target_vars, stand_vars), None


@dataclass
class WindowCache:
    """What the window searches of one solve share (the openings are the same for all).

    Attributes
    ----------
    cover_sets
        Minimal over-size sets listed so far (over all stands).
    cover_by_stand
        Indices into ``cover_sets`` by stand.
    cover_done
        (n,) bool: stands whose sets are all listed (empty until a search starts).
    cache_misses
        Listings that ran past the set limit (the searches then list per window).
    build_s
        Seconds the last window build took (model and cover clauses): no window is
        started with less time left.
    """

    cover_sets: list[frozenset[int]] = field(default_factory=list)
    cover_by_stand: dict[int, list[int]] = field(default_factory=dict)
    cover_done: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))
    cache_misses: int = 0
    build_s: float = 0.0


class WindowSearch:
    """Window search from ``ctx.best`` (a matheuristic LNS), resumable in blocks.

    Each round frees a window of stands (about ``target_vars`` prescription variables),
    keeps every other stand at its prescription in the best plan (constants in the
    openings and the rule rows, so the incumbent stays a solution and is the hint) and
    re-optimises the window with CP-SAT (every minimal opening cover holding a free stand
    written up front, lazy cover rounds as the safety net). Window kinds
    (:data:`WINDOW_KINDS`): a ball around a random stand; a ball around a stand whose LP
    value the plan misses; the stands of current openings and rings around them; two
    or six balls apart in one model; a larger ball where only 2-3 consecutive periods
    are free. Kinds are drawn by the NPV they gained per second; each kind's window grows when
    CP-SAT proves it optimal quickly and shrinks when it neither proves nor improves. After
    ``stall_s`` seconds without a gain every window size is redrawn (half or double).
    """

    def __init__(
        self,
        ctx: SearchCtx,
        lp_stand_value: np.ndarray | None = None,
        target_vars: float = 1000.0,
        window_time_s: float = 3.0,
        kinds: tuple[str, ...] = WINDOW_KINDS,
        stall_s: float = 15.0,
        lp_volume: np.ndarray | None = None,
        cache: WindowCache | None = None,
    ) -> None:
        prep = ctx.prep
        self.ctx = ctx
        self.lp_stand_value = lp_stand_value
        self.window_time_s = window_time_s
        self.stall_s = stall_s
        self.rng = np.random.default_rng(ctx.seed)
        self.stand_vars = np.bincount(prep.stand_of[prep.choice], minlength=prep.n).astype(float)
        self.total_vars = float(self.stand_vars.sum())
        has = self.stand_vars > 0
        self.floor = max(30.0, 5.0 * float(self.stand_vars[has].mean())) if has.any() else 0.0
        if lp_stand_value is None:
            kinds = tuple(k for k in kinds if k != "lp_miss")
        if not prep.spatial:
            kinds = tuple(k for k in kinds if k != "opening")
        if prep.P <= 3:
            kinds = tuple(k for k in kinds if k != "forest")
        size = {"periods": PERIODS_SIZE * target_vars, "forest": FOREST_SIZE * target_vars}
        self.arms = {
            k: _Arm(target_vars=min(size.get(k, target_vars), self.total_vars)) for k in kinds
        }
        self.last_gain = time.perf_counter()
        self.max_cover_sets = 100_000
        self.lp_volume = lp_volume
        self._rx_volume: np.ndarray | None = None  # (K, P) volumes, made on first use
        self.cache = WindowCache() if cache is None else cache
        if self.cache.cover_done.size != prep.n:
            self.cache.cover_done = np.zeros(prep.n, dtype=bool)

    def _eager_covers(self, sub: SubModel) -> None:
        """Every minimal cover holding a free stand, as clauses of this window only.

        Measured on the 2,000-stand bench landscape (windows of ~400 variables after the
        annealing): with lazy covers alone a window needed 4-6 CP-SAT calls of 2 s to
        return a legal plan and gained 65-215 per window; with the covers written up
        front (2,000-10,000 clauses, 0.05-0.5 s to list) the first call was legal and
        gained 3,000-24,000. They are not put in the shared pool (too many to scan).

        The sets of every stand are listed once per search (over all stands, whatever
        the plan) and kept; a window takes those whose stands can all be open. Where a
        stand's list runs past ``max_cover_sets`` grown sets the window lists its own
        sets over the stands open in the plan (the earlier way).
        """
        prep = self.ctx.prep
        if prep.max_opening is None:
            return
        open_any = np.asarray(sub.base_hop.any(axis=1) | prep.fixed_open.any(axis=1))
        take = open_any.copy()
        take[sub.free] = True
        done = self.cache.cover_done
        need = sub.free[~done[sub.free]]
        if need.size and self.cache.cache_misses < 1:
            sets, fin = covers_from_roots(
                prep, need, np.ones(prep.n, dtype=bool), self.max_cover_sets, done
            )
            for s in sets:
                k = len(self.cache.cover_sets)
                self.cache.cover_sets.append(s)
                for i in s:
                    self.cache.cover_by_stand.setdefault(i, []).append(k)
            done[fin] = True
            if fin.size < need.size:
                self.cache.cache_misses += 1
        if done[sub.free].all():
            ids = {k for i in sub.free.tolist() for k in self.cache.cover_by_stand.get(i, ())}
            chosen = [self.cache.cover_sets[k] for k in sorted(ids)]
            chosen = [s for s in chosen if all(take[j] for j in s)]
            sub.add_cover_sets(chosen)
            self.ctx.bump("window_cover_sets", len(chosen))
            return
        sets, complete = window_covers(prep, sub.free, open_any, self.max_cover_sets)
        sub.add_cover_sets(sets)
        self.ctx.bump("window_cover_sets", len(sets))
        if not complete:
            self.ctx.bump("window_cover_lists_cut")

    def _deficit(self) -> np.ndarray | None:
        """(P,) LP volume minus the best plan's volume by period (``None`` without LP)."""
        if self.lp_volume is None or self.ctx.best is None:
            return None
        if self._rx_volume is None:
            self._rx_volume = period_volumes(self.ctx.prep)
        plan_vol = self._rx_volume[self.ctx.best].sum(axis=0)
        return np.asarray(self.lp_volume, dtype=float) - plan_vol

    def run(self, until: float) -> None:
        """Solve windows until ``until`` (or the deadline, the stopping gap, Ctrl-C)."""
        ctx, prep = self.ctx, self.ctx.prep
        if ctx.best is None or self.total_vars == 0:
            return
        self.last_gain = time.perf_counter()
        # Building a window takes from a few tenths of a second to two seconds (whole-forest
        # windows on the demo): none is started in the last 0.3 s plus the last build's
        # time, so the time limit holds.
        while (
            not ctx.stopped()
            and min(ctx.left(), until - time.perf_counter()) > 0.3 + self.cache.build_s
        ):
            kind = _pick(self.rng, self.arms)
            arm = self.arms[kind]
            free, allow = _window(
                ctx,
                kind,
                arm.target_vars,
                self.rng,
                self.stand_vars,
                self.lp_stand_value,
                self._deficit() if kind == "forest" else None,
            )
            arm.tries += 1
            if free.size == 0:
                continue
            t0 = time.perf_counter()
            before = ctx.best_npv
            sub = SubModel(prep, free, ctx.best, ctx.scaling, allow=allow)
            self._eager_covers(sub)
            # No window is started with less time left than the last build took (the
            # time limit holds within a few tenths of a second; the first build of a
            # solve also lists the covers, once).
            self.cache.build_s = time.perf_counter() - t0
            # Larger windows get longer (up to four times the base time).
            scale = float(np.clip(len(sub.xvars) / 1000.0, 1.0, 4.0))
            budget = min(self.window_time_s * scale, ctx.left(), until - time.perf_counter())
            res = lazy_rounds(ctx, sub, budget, "lns_" + kind, first_slice_s=0.5, keep_all=8)
            dt = time.perf_counter() - t0
            gain = ctx.best_npv - before
            arm.seconds += dt
            arm.gain += gain
            ctx.bump("lns_windows")
            if gain > 0:
                ctx.bump("lns_improving_windows")
                self.last_gain = time.perf_counter()
            if res == "optimal" and dt < 0.5 * self.window_time_s:
                arm.target_vars = min(arm.target_vars * 1.3, self.total_vars)
            elif res != "optimal" and gain <= 0:
                arm.target_vars = max(arm.target_vars * 0.8, self.floor)
            if time.perf_counter() - self.last_gain > self.stall_s:
                # Stalled: other window sizes (the tool must not idle to the deadline).
                for a in self.arms.values():
                    a.target_vars = float(
                        np.clip(
                            a.target_vars * self.rng.choice([0.5, 2.0]),
                            self.floor,
                            self.total_vars,
                        )
                    )
                ctx.bump("lns_stall_resizes")
                self.last_gain = time.perf_counter()
        ctx.stats["lns_kinds"] = {
            k: {
                "windows": a.tries,
                "gain": round(a.gain, 2),
                "seconds": round(a.seconds, 2),
                "final_vars": round(a.target_vars),
            }
            for k, a in self.arms.items()
        }


def lns(
    ctx: SearchCtx,
    lp_stand_value: np.ndarray | None = None,
    target_vars: float = 1000.0,
    window_time_s: float = 3.0,
    lp_volume: np.ndarray | None = None,
) -> None:
    """:class:`WindowSearch` from ``ctx.best`` until the deadline."""
    WindowSearch(ctx, lp_stand_value, target_vars, window_time_s, lp_volume=lp_volume).run(
        ctx.deadline
    )
