"""Local search over stand-period assignments: simulated annealing with hard openings.

The state is a full plan (one period or "not harvested" per stand). Moves, drawn at random:

* *reassign* one stand to another of its eligible periods, to the period before or after
  its current one, or to "not harvested";
* *swap* the periods of two stands: a neighbour (shifts an opening) or any stand (keeps the
  period volumes close while changing where the cuts fall).

The spatial rules are hard: a move is applied only if every opening it touches stays within
the maximum (a search over the open neighbours in each period the new harvest keeps open,
stopped as soon as the group passes the maximum area) and, with the unit restriction, no
open neighbour. The rule rows (flow, targets, ending inventory) are a penalty in the
acceptance test whose weight rises within a round, so the search may cross slightly
infeasible plans to shift volume between periods; only plans that meet every row with a
small margin are recorded as best. Acceptance is the Metropolis rule of simulated annealing
(Kirkpatrick, Gelatt & Vecchi 1983, Science 220:671-680) with geometric cooling; its use for
adjacency-constrained harvest scheduling goes back to Lockwood & Moore (1993, Canadian
Journal of Forest Research 23:468-478, from memory).

Each round cools from a start temperature to a low one over a fixed number of moves,
starting from the best plan; rounds repeat until the deadline or until a few rounds in a
row bring nothing. NPV and row left-hand sides are updated incrementally per move (O(rows)),
so the loop runs tens of thousands of moves per second in pure Python. With a fixed seed
and move budget the result is deterministic.
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

    period: np.ndarray  # best feasible plan (the start plan when nothing better was found)
    npv: float
    start_npv: float
    moves: int = 0
    accepted: int = 0
    rounds: int = 0
    improving_rounds: int = 0
    seconds: float = 0.0
    history: list = field(default_factory=list)  # (round, moves so far, best npv)


class _State:
    """Plan, openness per period and row left-hand sides, all updated in place."""

    def __init__(self, prep: Prep, period: np.ndarray) -> None:
        n, P = prep.n, prep.P
        self.n, self.P = n, P
        self.nbrs = [prep.indices[prep.indptr[i] : prep.indptr[i + 1]].tolist() for i in range(n)]
        self.area = prep.opening_area.astype(float).tolist()
        self.green = prep.green.astype(int).tolist()
        self.fixed = [bytearray(prep.fixed_open[:, p].astype(np.uint8).tobytes()) for p in range(P)]
        self.open = [bytearray(b) for b in self.fixed]
        self.hop = [bytearray(n) for _ in range(P)]  # harvest-open
        mx = prep.max_opening
        # A group at exactly the maximum is legal; keep a hair of room against summation order.
        self.mx = math.inf if mx is None else float(mx) * (1 - 1e-12)
        self.unit = bool(prep.unit)
        self.spatial = prep.spatial
        el = prep.eligible
        self.elig = [[True, *row] for row in el.tolist()]
        self.options = [[0, *(np.nonzero(el[i])[0] + 1).tolist()] for i in range(n)]
        v = np.where(el, prep.value, 0.0)
        self.val = [[0.0, *row] for row in v.tolist()]
        rows = prep.rows
        k = len(rows)
        self.k = k
        self.D = np.zeros((n, P + 1, k))
        const = np.zeros(k)
        rhs = np.zeros(k)
        margin = np.zeros(k)
        for r, row in enumerate(rows):
            d, c = row.x_coefs(n, P)
            self.D[:, 1:, r] = np.where(el, d, 0.0)
            const[r] = c
            rhs[r] = row.rhs
            margin[r] = ROW_MARGIN * max(abs(row.rhs), row.scale_ref)
        self.const = const
        self.cap = rhs - margin
        # Penalty per unit of excess: one typical stand's contribution to the row costs
        # one typical stand's value (times the weight lambda).
        self.row_unit = np.ones(k)
        for r in range(k):
            a = np.abs(self.D[:, :, r])
            nz = a[a > 0]
            if nz.size:
                self.row_unit[r] = float(np.median(nz))
        self.period = [0] * n
        self.lhs = const.copy()
        for i in np.nonzero(np.asarray(period) > 0)[0].tolist():
            self.set(i, int(period[i]))
        self.recompute()

    def recompute(self) -> None:
        """Row left-hand sides from scratch (removes drift of the incremental sums)."""
        per = np.asarray(self.period, dtype=np.int64)
        self.lhs = self.const + self.D[np.arange(self.n), per].sum(axis=0)

    def npv(self) -> float:
        """NPV of the current plan."""
        return float(sum(self.val[i][q] for i, q in enumerate(self.period) if q))

    def set(self, i: int, q: int) -> None:
        """Harvest stand ``i`` (now uncut) in period ``q``."""
        self.period[i] = q
        P = self.P
        for p in range(q - 1, min(q - 1 + self.green[i], P)):
            self.open[p][i] = 1
            self.hop[p][i] = 1

    def unset(self, i: int) -> None:
        """Leave stand ``i`` uncut."""
        q = self.period[i]
        if q:
            for p in range(q - 1, min(q - 1 + self.green[i], self.P)):
                self.open[p][i] = self.fixed[p][i]
                self.hop[p][i] = 0
            self.period[i] = 0

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

    def move_soft(self, i: int, qn: int) -> tuple[float, int]:
        """Give stand ``i`` period ``qn``; returns the change of over-size area and groups."""
        qo = self.period[i]
        g = self.green[i]
        P = self.P
        d_exc = 0.0
        d_bad = 0
        lo = min(qo - 1 if qo else P, qn - 1 if qn else P)
        hi = max(min(qo - 1 + g, P) if qo else 0, min(qn - 1 + g, P) if qn else 0)
        for p in range(lo, hi):
            was = 1 if qo and qo - 1 <= p < qo - 1 + g else 0
            now = 1 if qn and qn - 1 <= p < qn - 1 + g else 0
            if was == now:
                continue
            e0, b0 = self.excess_near(p, i)
            self.hop[p][i] = now
            self.open[p][i] = now | self.fixed[p][i]
            e1, b1 = self.excess_near(p, i)
            d_exc += e1 - e0
            d_bad += b1 - b0
        self.period[i] = qn
        return d_exc, d_bad

    def can_add(self, i: int, q: int) -> bool:
        """True when harvesting uncut stand ``i`` in period ``q`` keeps every opening legal."""
        g = self.green[i]
        if g <= 0 or not self.spatial:
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
        for p in range(q - 1, min(q - 1 + g, self.P)):
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
) -> AnnealResult:
    """Improve a legal plan by simulated annealing; never returns a worse plan.

    Parameters
    ----------
    prep
        Pre-computed problem.
    start
        (n,) legal plan to start from (checked by the caller). Only plans meeting every
        rule are recorded as best, so a start that breaks a row is returned unchanged
        when no legal plan is found.
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
        Called with ``(period, npv)`` at the end of every round that improved the best plan.

    Returns
    -------
    AnnealResult
    """
    t_begin = time.perf_counter()
    st = _State(prep, start)
    n = st.n
    movable = [i for i in range(n) if len(st.options[i]) > 1]
    start_npv = st.npv()
    res = AnnealResult(
        period=np.asarray(start, dtype=np.int64).copy(), npv=start_npv, start_npv=start_npv
    )
    if not movable:
        return res
    rng = np.random.default_rng(seed)
    best_vals = [max(st.val[i]) for i in movable]
    unit = float(np.mean([v for v in best_vals if v > 0])) if any(v > 0 for v in best_vals) else 1.0
    moves_per_round = int(round_moves or max(50_000, 400 * n))
    D, cap, k = st.D, st.cap, st.k
    soft = bool(soft and prep.max_opening is not None and not prep.unit)
    best_npv = start_npv
    best_period = list(st.period)
    idle = 0
    n_mov = len(movable)
    total_moves = 0
    accepted = 0
    stopped = False
    for rnd in range(max_rounds):
        # Each round starts from the best plan.
        for i in range(n):
            if st.period[i] != best_period[i]:
                st.unset(i)
        for i in range(n):
            if best_period[i] and not st.period[i]:
                st.set(i, best_period[i])
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
            inv_t = 1.0 / temp
            period = st.period
            val = st.val
            elig = st.elig
            options = st.options
            nbrs = st.nbrs
            for b in range(BLOCK):
                i = movable[r_stand[b]]
                qi = period[i]
                u = r_type[b]
                j = -1
                if u < 0.55:
                    # reassign i
                    opts = options[i]
                    w = r_opt[b]
                    if w < 0.5 and qi:
                        qn = qi - 1 if w < 0.25 else qi + 1
                        if qn > st.P or not elig[i][qn]:
                            continue
                    else:
                        qn = opts[int(w * len(opts)) % len(opts)]
                        if qn == qi:
                            continue
                    dv = val[i][qn] - val[i][qi]
                    if k:
                        nl = lhs + (D[i, qn] - D[i, qi])
                else:
                    if u < 0.8:
                        nb = nbrs[i]
                        if not nb:
                            continue
                        j = nb[int(r_opt[b] * len(nb))]
                    else:
                        j = movable[int(r_opt[b] * n_mov)]
                    qj = period[j]
                    if qj == qi or not elig[i][qj] or not elig[j][qi]:
                        continue
                    qn = qj
                    dv = val[i][qj] - val[i][qi] + val[j][qi] - val[j][qj]
                    if k:
                        nl = lhs + (D[i, qj] - D[i, qi] + D[j, qi] - D[j, qj])
                if k:
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
                    de, db = st.move_soft(i, qn)
                    if j >= 0:
                        de2, db2 = st.move_soft(j, qi)
                        de += de2
                        db += db2
                    tot = delta - wm * de
                    if tot < 0.0 and r_acc[b] >= math.exp(tot * inv_t):
                        if j >= 0:
                            st.move_soft(j, qn)
                        st.move_soft(i, qi)
                        continue
                    bad += db
                    accepted += 1
                    cur += dv
                    pen = npen
                    if k:
                        lhs = nl
                    if bad == 0 and npen == 0.0 and cur > round_best + 1e-9 * abs(round_best):
                        round_best = cur
                        best_period = list(period)
                    continue
                # spatial test, applying the move
                if j < 0:
                    st.unset(i)
                    if qn and not st.can_add(i, qn):
                        if qi:
                            st.set(i, qi)
                        continue
                    if qn:
                        st.set(i, qn)
                else:
                    qj = qn
                    st.unset(i)
                    st.unset(j)
                    ok = True
                    if qj:
                        if st.can_add(i, qj):
                            st.set(i, qj)
                        else:
                            ok = False
                    if ok and qi:
                        if st.can_add(j, qi):
                            st.set(j, qi)
                        else:
                            ok = False
                            st.unset(i)
                    if not ok:
                        if qi:
                            st.set(i, qi)
                        if qj:
                            st.set(j, qj)
                        continue
                accepted += 1
                cur += dv
                pen = npen
                if k:
                    lhs = nl
                if npen == 0.0 and cur > round_best + 1e-9 * abs(round_best):
                    round_best = cur
                    best_period = list(period)
            done += BLOCK
            total_moves += BLOCK
        st.lhs = lhs
        res.rounds = rnd + 1
        if round_best > best_npv + 1e-9 * max(abs(best_npv), 1.0):
            # Re-derive the value exactly (the incremental sum drifts by rounding only).
            exact = float(sum(st.val[i][q] for i, q in enumerate(best_period) if q))
            best_npv = exact
            res.improving_rounds += 1
            idle = 0
            if on_best is not None:
                on_best(np.asarray(best_period, dtype=np.int64), best_npv)
        else:
            idle += 1
        res.history.append((rnd + 1, total_moves, best_npv))
        if stopped or idle >= patience:
            break
    res.period = np.asarray(best_period, dtype=np.int64)
    res.npv = best_npv
    res.moves = total_moves
    res.accepted = accepted
    res.seconds = time.perf_counter() - t_begin
    return res
