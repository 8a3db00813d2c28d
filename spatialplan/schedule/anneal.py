"""Local search over prescription choices: simulated annealing with hard openings.

The state is a full plan (one prescription per stand). Every move changes the
prescription of one or two stands; drawn at random:

* *reassign* one stand: to any of its prescriptions, or to the one whose harvests are all
  one period earlier or later, or whose first or last harvest is one period earlier or
  later (for a single harvest these are the same move; shifting a harvest out of period 1
  means no harvest);
* *swap* the harvest periods of two stands: a neighbour (shifts an opening) or any stand
  (keeps the period volumes close while changing where the cuts fall).

The spatial rules are hard: a move is applied only if every opening it touches stays within
the maximum (a search over the open neighbours in each period the new prescription keeps
the stand open, stopped as soon as the group passes the maximum area) and, with the unit
restriction, no open neighbour. Openness comes from per-prescription bit masks. When the
start plan meets every rule row, the rows are hard as well (a move breaking one is rejected,
or paired with a one-period shift of another stand that restores them all), so every
accepted plan is legal. Otherwise the rule
rows (flow, targets, ending inventory, old forest) are a penalty in the acceptance test
whose weight rises within a round, so the search may cross slightly infeasible plans to
shift volume between periods; only plans that meet every row with a small margin are
recorded as best. Acceptance is the Metropolis rule of simulated annealing (Kirkpatrick,
Gelatt & Vecchi 1983, Science 220:671-680) with geometric cooling; its use for
adjacency-constrained harvest scheduling goes back to Lockwood & Moore (1993, Canadian
Journal of Forest Research 23:468-478, from memory).

Each round cools from a start temperature to a low one over a fixed number of moves,
starting from the best plan; rounds repeat until the deadline or until a few rounds in a
row bring nothing. NPV and row left-hand sides are updated incrementally per move (O(rows),
from a ``(K, R)`` table of row coefficients against the no-harvest prescription), so the
loop runs tens of thousands of moves per second in pure Python. With a fixed seed and move
budget the result is deterministic.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from spatialplan.schedule.model import Prep

__all__ = ["AnnealResult", "anneal"]

BLOCK = 4096  # moves between random-number refills, schedule updates and deadline checks
# Relative margin kept below each row's right-hand side (the float64 check allows 1e-9).
ROW_MARGIN = 1e-7


@dataclass
class AnnealResult:
    """What :func:`anneal` found."""

    prescription: np.ndarray  # best feasible plan (the start plan when nothing better was found)
    period: np.ndarray  # its first harvest period per stand (0 = none)
    npv: float
    start_npv: float
    moves: int = 0
    accepted: int = 0
    rounds: int = 0
    improving_rounds: int = 0
    seconds: float = 0.0
    history: list = field(default_factory=list)  # (round, moves so far, best npv)


def _bits(mask: int) -> tuple[int, ...]:
    """0-based period columns set in a mask."""
    out = []
    while mask:
        low = mask & -mask
        out.append(low.bit_length() - 1)
        mask ^= low
    return tuple(out)


def _shifted(mask: int, how: str, up: bool, P: int) -> int:
    """The harvest mask with all, the first or the last harvest one period later/earlier.

    Returns -1 when the shift leaves the horizon at its end; a harvest shifted out of
    period 1 is dropped (the single-harvest move "period 1 -> no harvest").
    """
    if how == "all":
        if up:
            return -1 if mask >> (P - 1) else mask << 1
        return mask >> 1
    bit = mask & -mask if how == "first" else 1 << (mask.bit_length() - 1)
    rest = mask ^ bit
    if up:
        nb = bit << 1
        if nb >> P or nb & rest:
            return -1
        return rest | nb
    nb = bit >> 1
    if nb & rest:
        return -1
    return rest | nb


class _State:
    """Plan, openness per period and row left-hand sides, all updated in place."""

    def __init__(self, prep: Prep, plan: np.ndarray) -> None:
        n, P = prep.n, prep.P
        self.n, self.P = n, P
        self.nbrs = [prep.indices[prep.indptr[i] : prep.indptr[i + 1]].tolist() for i in range(n)]
        self.area = prep.opening_area.astype(float).tolist()
        self.fixed = [bytearray(prep.fixed_open[:, p].astype(np.uint8).tobytes()) for p in range(P)]
        self.open = [bytearray(b) for b in self.fixed]
        self.hop = [bytearray(n) for _ in range(P)]  # harvest-open
        mx = prep.max_opening
        # A group at exactly the maximum is legal; keep a hair of room against summation order.
        self.mx = math.inf if mx is None else float(mx) * (1 - 1e-12)
        self.unit = bool(prep.unit)
        self.spatial = prep.spatial
        self.null = prep.null.tolist()
        self.open_mask = prep.open_mask
        # Open periods of every prescription (tuples shared between equal masks).
        uniq, inv = np.unique(prep.open_mask, return_inverse=True)
        tup = [_bits(int(m)) for m in uniq.tolist()]
        self.obits = [tup[u] for u in inv.ravel().tolist()]
        self.val = prep.rel_value.tolist()  # against the no-harvest prescription
        self.base_value = float(prep.value[prep.null].sum())
        allowed = prep.allowed
        stand_of = prep.stand_of
        ks = np.nonzero(allowed)[0]
        split = np.searchsorted(stand_of[ks], np.arange(1, n))
        self.options = [a.tolist() for a in np.split(ks, split)]
        hm = prep.harvest_mask.tolist()
        self.hmask = hm
        # Per stand: harvest mask -> best allowed prescription with it (for swaps, shifts).
        self.lut: list[dict[int, int]] = []
        val = self.val
        for opts in self.options:
            d: dict[int, int] = {}
            for k in opts:
                m = hm[k]
                if m not in d or val[k] > val[d[m]]:
                    d[m] = k
            self.lut.append(d)
        multi = bool(np.any(np.diff(prep.rx.harvest_start) > 1))
        self.multi = multi
        self.shift: dict[tuple[str, bool], list[int]] = {}
        for how in ("all", "first", "last") if multi else ("all",):
            for up in (False, True):
                out = [-1] * len(hm)
                for i, opts in enumerate(self.options):
                    d = self.lut[i]
                    for k in opts:
                        if hm[k]:
                            m2 = _shifted(hm[k], how, up, P)
                            if m2 >= 0:
                                out[k] = d.get(m2, -1)
                self.shift[(how, up)] = out
        if not multi:
            for up in (False, True):
                self.shift[("first", up)] = self.shift[("last", up)] = self.shift[("all", up)]
        rows = prep.rows
        k = len(rows)
        self.k = k
        self.D = prep.row_deltas  # (K, R)
        self.const = rows.lhs(prep.null)
        self.cap = rows.rhs - ROW_MARGIN * rows.scale
        # Penalty per unit of excess: one typical stand's contribution to the row costs
        # one typical stand's value (times the weight lambda).
        self.row_unit = np.ones(k)
        for r in range(k):
            a = np.abs(self.D[allowed, r])
            nz = a[a > 0]
            if nz.size:
                self.row_unit[r] = float(np.median(nz))
        self.plan = list(self.null)
        self.lhs = self.const.copy()
        start = np.asarray(plan, dtype=np.int64)
        for i in np.nonzero(start != prep.null)[0].tolist():
            self.set(i, int(start[i]))
        self.recompute()

    def recompute(self) -> None:
        """Row left-hand sides from scratch (removes drift of the incremental sums)."""
        self.lhs = self.const + self.D[np.asarray(self.plan, dtype=np.int64)].sum(axis=0)

    def npv(self, plan: list[int] | None = None) -> float:
        """NPV of the current (or the given) plan."""
        val = self.val
        return self.base_value + float(sum(val[k] for k in (self.plan if plan is None else plan)))

    def set(self, i: int, k: int) -> None:
        """Give stand ``i`` (now on its no-harvest prescription) prescription ``k``."""
        self.plan[i] = k
        for p in self.obits[k]:
            self.open[p][i] = 1
            self.hop[p][i] = 1

    def unset(self, i: int) -> None:
        """Put stand ``i`` back on its no-harvest prescription."""
        for p in self.obits[self.plan[i]]:
            self.open[p][i] = self.fixed[p][i]
            self.hop[p][i] = 0
        self.plan[i] = self.null[i]

    def excess_near(self, p: int, i: int) -> tuple[float, int]:
        """Over-size area and count of breaching groups in period ``p`` touching stand ``i``.

        Only the groups that hold ``i`` or one of its neighbours can change when ``i``
        changes, so the difference of this value before and after a change of ``i`` is the
        change of the plan's total over-size area in ``p``.
        """
        col = self.open[p]
        hop = self.hop[p]
        nbrs = self.nbrs
        area = self.area
        mx = self.mx
        exc = 0.0
        bad = 0
        seen: set[int] = set()
        for s0 in (i, *nbrs[i]):
            if not col[s0] or s0 in seen:
                continue
            seen.add(s0)
            stack = [s0]
            a = 0.0
            h = 0
            while stack:
                kk = stack.pop()
                a += area[kk]
                h |= hop[kk]
                for j in nbrs[kk]:
                    if col[j] and j not in seen:
                        seen.add(j)
                        stack.append(j)
            if h and a > mx:
                exc += a - mx
                bad += 1
        return exc, bad

    def move_soft(self, i: int, kn: int) -> tuple[float, int]:
        """Give stand ``i`` prescription ``kn``; returns the change of over-size area and groups."""
        ko = self.plan[i]
        d_exc = 0.0
        d_bad = 0
        was_m = int(self.open_mask[ko])
        now_m = int(self.open_mask[kn])
        for p in _bits(was_m ^ now_m):
            now = (now_m >> p) & 1
            e0, b0 = self.excess_near(p, i)
            self.hop[p][i] = now
            self.open[p][i] = now | self.fixed[p][i]
            e1, b1 = self.excess_near(p, i)
            d_exc += e1 - e0
            d_bad += b1 - b0
        self.plan[i] = kn
        return d_exc, d_bad

    def can_add(self, i: int, k: int) -> bool:
        """True when giving stand ``i`` (now uncut) prescription ``k`` keeps every opening legal."""
        periods = self.obits[k]
        if not periods or not self.spatial:
            return True
        mx = self.mx
        area = self.area
        ai = area[i]
        if ai > mx:
            return False
        nbrs = self.nbrs
        nb = nbrs[i]
        unit = self.unit
        check_area = mx != math.inf
        for p in periods:
            col = self.open[p]
            if unit:
                for j in nb:
                    if col[j]:
                        return False
            if not check_area:
                continue
            total = ai
            seen = {i}
            stack = [i]
            while stack:
                kk = stack.pop()
                for j in nbrs[kk]:
                    if col[j] and j not in seen:
                        total += area[j]
                        if total > mx:
                            return False
                        seen.add(j)
                        stack.append(j)
        return True


def anneal(
    prep: Prep,
    start: np.ndarray,
    seed: int = 0,
    deadline: float | None = None,
    round_moves: int | None = None,
    max_rounds: int = 1000,
    patience: int = 3,
    t_start: float = 0.5,
    t_end: float = 0.002,
    lam_start: float = 0.5,
    lam_end: float = 8.0,
    soft: bool = False,
    mu_start: float = 1.0,
    mu_end: float = 30.0,
    stop: Callable[[], bool] | None = None,
    on_best: Callable[[np.ndarray, float], None] | None = None,
    hard_rows: bool | None = None,
    repair_tries: int = 4,
) -> AnnealResult:
    """Improve a legal plan by simulated annealing; never returns a worse plan.

    Parameters
    ----------
    prep
        Pre-computed problem.
    start
        (n,) legal plan (prescription per stand) to start from (checked by the caller).
        Only plans meeting every rule are recorded as best, so a start that breaks a row
        is returned unchanged when no legal plan is found.
    seed
        Seed of the random moves; with the same seed and move budget the result is the same.
    deadline
        ``time.perf_counter()`` value at which to stop (checked every few thousand moves).
    round_moves
        Moves per cooling round (default ``max(50_000, 400 n)``).
    max_rounds, patience
        Stop after ``max_rounds`` rounds, or after ``patience`` rounds in a row without a
        better plan.
    t_start, t_end
        Start and end temperature as fractions of the mean best value of a stand.
    lam_start, lam_end
        Weight of the row penalty at the start and end of a round (1 = one typical
        stand's excess costs one typical stand's value).
    soft, mu_start, mu_end
        With ``soft`` (area restriction without unit restriction only), a move may also
        make openings over-size; the over-size area is then a penalty of weight ``mu`` (1 =
        an excess of one maximum opening costs one typical stand's value), rising from
        ``mu_start`` to ``mu_end`` within a round. Only plans with no over-size opening
        are recorded. Without it, every move must keep the openings legal. Experimental:
        on small instances with tight openings it often ends its rounds with an over-size
        opening and records nothing; off by default.
    stop
        Called every few thousand moves; ``True`` stops the search (Ctrl-C, gap reached).
    on_best
        Called with ``(plan, npv)`` at the end of every round that improved the best plan.
    hard_rows
        Keep the rule rows hard, like the openings: a move that takes any row past its
        right-hand side is rejected, so every accepted plan is legal and every improvement
        is recorded. A single move that breaks a row may be paired with a shift of another
        stand's harvests one period earlier or later that restores every row (``repair_tries``
        random partners). ``None`` (the default) keeps the rows hard when the start plan
        meets them all; with ``False`` they are a penalty as described above.
    repair_tries
        Partners tried for a single move that breaks a row (hard rows only).

    Returns
    -------
    AnnealResult
    """
    t_begin = time.perf_counter()
    st = _State(prep, start)
    n = st.n
    movable = [i for i in range(n) if len(st.options[i]) > 1]
    start_plan = np.asarray(start, dtype=np.int64).copy()
    start_npv = st.npv()
    res = AnnealResult(
        prescription=start_plan,
        period=prep.first_period(start_plan),
        npv=start_npv,
        start_npv=start_npv,
    )
    if not movable:
        return res
    rng = np.random.default_rng(seed)
    best_vals = [max(st.val[k] for k in st.options[i]) for i in movable]
    unit = float(np.mean([v for v in best_vals if v > 0])) if any(v > 0 for v in best_vals) else 1.0
    moves_per_round = int(round_moves or max(50_000, 400 * n))
    D, cap, k = st.D, st.cap, st.k
    soft = bool(soft and prep.max_opening is not None and not prep.unit)
    if hard_rows is None:
        hard_rows = bool(k) and bool(np.all(st.lhs <= cap))
    hard = bool(hard_rows and k and not soft)
    best_npv = start_npv
    best_plan = list(st.plan)
    idle = 0
    n_mov = len(movable)
    total_moves = 0
    accepted = 0
    stopped = False
    multi = st.multi
    sh_all_dn, sh_all_up = st.shift[("all", False)], st.shift[("all", True)]
    sh_first_dn, sh_first_up = st.shift[("first", False)], st.shift[("first", True)]
    sh_last_dn, sh_last_up = st.shift[("last", False)], st.shift[("last", True)]
    for rnd in range(max_rounds):
        # Each round starts from the best plan.
        for i in range(n):
            if st.plan[i] != best_plan[i]:
                st.unset(i)
                st.set(i, best_plan[i])
        st.recompute()
        cur = best_npv
        round_best = best_npv
        bad = 0  # over-size openings in the current plan (the best plan has none)
        lhs = st.lhs
        done = 0
        while done < moves_per_round:
            if (deadline is not None and time.perf_counter() >= deadline) or (
                stop is not None and stop()
            ):
                stopped = True
                break
            frac = done / moves_per_round
            temp = unit * t_start * (t_end / t_start) ** frac
            lam = lam_start * (lam_end / lam_start) ** frac
            wl = (lam * unit) / st.row_unit
            wm = (mu_start * (mu_end / mu_start) ** frac) * unit / st.mx if soft else 0.0
            pen = float(np.maximum(lhs - cap, 0.0) @ wl) if k else 0.0
            r_stand = rng.integers(0, n_mov, BLOCK).tolist()
            r_type = rng.random(BLOCK).tolist()
            r_opt = rng.random(BLOCK).tolist()
            r_acc = rng.random(BLOCK).tolist()
            # Partner draws for repaired moves (drawn only with hard rows, so the other
            # modes keep their random streams).
            r_rep = rng.random(BLOCK).tolist() if hard else r_acc
            inv_t = 1.0 / temp
            plan = st.plan
            null = st.null
            val = st.val
            options = st.options
            nbrs = st.nbrs
            hmask = st.hmask
            lut = st.lut
            obits = st.obits
            for b in range(BLOCK):
                i = movable[r_stand[b]]
                ki = plan[i]
                u = r_type[b]
                j = -1
                kj = knj = -1
                if u < 0.55:
                    # reassign i
                    w = r_opt[b]
                    if w < 0.5 and ki != null[i]:
                        if not multi:
                            sh = sh_all_dn if w < 0.25 else sh_all_up
                        elif w < 0.25:
                            # Shift all (first third), the first or the last harvest.
                            sh = (
                                sh_all_dn
                                if w < 0.0833
                                else sh_first_dn
                                if w < 0.1667
                                else sh_last_dn
                            )
                        else:
                            sh = (
                                sh_all_up
                                if w < 0.3333
                                else sh_first_up
                                if w < 0.4167
                                else sh_last_up
                            )
                        kn = sh[ki]
                        if kn < 0:
                            continue
                    else:
                        opts = options[i]
                        # A cut stand draws w in [0.5, 1): with several harvests per
                        # prescription, rescale so that every prescription can be drawn
                        # (early first harvests included); single-harvest draws keep
                        # the later half of the periods, which measured better there.
                        u2 = 2.0 * w - 1.0 if multi and ki != null[i] else w
                        kn = opts[int(u2 * len(opts)) % len(opts)]
                        if kn == ki:
                            continue
                    dv = val[kn] - val[ki]
                    if k:
                        nl = lhs + (D[kn] - D[ki])
                else:
                    if u < 0.8:
                        nb = nbrs[i]
                        if not nb:
                            continue
                        j = nb[int(r_opt[b] * len(nb))]
                    else:
                        j = movable[int(r_opt[b] * n_mov)]
                    kj = plan[j]
                    mi = hmask[ki]
                    mj = hmask[kj]
                    if mi == mj:
                        continue
                    # Where u falls in its range picks the variant (no extra random
                    # draw): exchange whole harvest sequences, or only the first or only
                    # the last harvest periods (the same move for single harvests).
                    if multi and mi and mj:
                        v = (u - 0.55) * 4.0 if u < 0.8 else (u - 0.8) * 5.0
                    else:
                        v = 0.0
                    if v >= 0.3333:
                        if v < 0.6667:
                            bi, bj = mi & -mi, mj & -mj
                        else:
                            bi, bj = 1 << (mi.bit_length() - 1), 1 << (mj.bit_length() - 1)
                        if bi == bj or (mi ^ bi) & bj or (mj ^ bj) & bi:
                            continue
                        kn = lut[i].get((mi ^ bi) | bj, -1)
                        knj = lut[j].get((mj ^ bj) | bi, -1)
                    else:
                        kn = lut[i].get(mj, -1)
                        knj = lut[j].get(mi, -1)
                    if kn < 0 or knj < 0:
                        continue
                    dv = val[kn] - val[ki] + val[knj] - val[kj]
                    if k:
                        nl = lhs + (D[kn] - D[ki] + D[knj] - D[kj])
                if hard:
                    npen = 0.0
                    if (nl > cap).any():
                        if j >= 0 or repair_tries <= 0:
                            continue
                        # Pair the move with a one-period shift of another stand's harvests
                        # that brings every row back within its bound (volume moved out of
                        # one period and into its neighbour keeps a chained flow legal).
                        j = -1
                        for t in range(repair_tries):
                            jj = movable[int(((r_rep[b] + t * 0.618034) % 1.0) * n_mov)]
                            if jj == i:
                                continue
                            kjj = plan[jj]
                            if kjj == null[jj]:
                                continue
                            knn = (sh_all_dn if (t + b) & 1 else sh_all_up)[kjj]
                            if knn < 0:
                                continue
                            nl2 = nl + (D[knn] - D[kjj])
                            if not (nl2 > cap).any():
                                j, kj, knj = jj, kjj, knn
                                nl = nl2
                                dv += val[knn] - val[kjj]
                                break
                        if j < 0:
                            continue
                    delta = dv
                elif k:
                    npen = float(np.maximum(nl - cap, 0.0) @ wl)
                    delta = dv - (npen - pen)
                else:
                    npen = 0.0
                    delta = dv
                if (bad == 0 or not soft) and delta < 0.0 and r_acc[b] >= math.exp(delta * inv_t):
                    # With no over-size opening the spatial change can only add penalty,
                    # so the move fails the test whatever it does to the openings.
                    continue
                if soft:
                    de, db = st.move_soft(i, kn)
                    if j >= 0:
                        de2, db2 = st.move_soft(j, knj)
                        de += de2
                        db += db2
                    tot = delta - wm * de
                    if tot < 0.0 and r_acc[b] >= math.exp(tot * inv_t):
                        if j >= 0:
                            st.move_soft(j, kj)
                        st.move_soft(i, ki)
                        continue
                    bad += db
                    accepted += 1
                    cur += dv
                    pen = npen
                    if k:
                        lhs = nl
                    if bad == 0 and npen == 0.0 and cur > round_best + 1e-9 * abs(round_best):
                        round_best = cur
                        best_plan = list(plan)
                    continue
                # spatial test, applying the move
                if j < 0:
                    st.unset(i)
                    if obits[kn] and not st.can_add(i, kn):
                        st.set(i, ki)
                        continue
                    st.set(i, kn)
                else:
                    st.unset(i)
                    st.unset(j)
                    ok = True
                    if obits[kn]:
                        ok = st.can_add(i, kn)
                    if ok:
                        st.set(i, kn)
                        if obits[knj] and not st.can_add(j, knj):
                            ok = False
                            st.unset(i)
                    if not ok:
                        st.set(i, ki)
                        st.set(j, kj)
                        continue
                    st.set(j, knj)
                accepted += 1
                cur += dv
                pen = npen
                if k:
                    lhs = nl
                if npen == 0.0 and cur > round_best + 1e-9 * abs(round_best):
                    round_best = cur
                    best_plan = list(plan)
            done += BLOCK
            total_moves += BLOCK
        st.lhs = lhs
        res.rounds = rnd + 1
        if round_best > best_npv + 1e-9 * max(abs(best_npv), 1.0):
            # Re-derive the value exactly (the incremental sum drifts by rounding only).
            best_npv = st.npv(best_plan)
            res.improving_rounds += 1
            idle = 0
            if on_best is not None:
                on_best(np.asarray(best_plan, dtype=np.int64), best_npv)
        else:
            idle += 1
        res.history.append((rnd + 1, total_moves, best_npv))
        if stopped or idle >= patience:
            break
    res.prescription = np.asarray(best_plan, dtype=np.int64)
    res.period = prep.first_period(res.prescription)
    res.npv = best_npv
    res.moves = total_moves
    res.accepted = accepted
    res.seconds = time.perf_counter() - t_begin
    return res
