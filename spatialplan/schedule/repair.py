"""Repair moves for a plan whose rule rows are broken: priced descent and the flow sweep.

The construction (:mod:`spatialplan.schedule.construct`) and the search under non-declining
flow (:func:`spatialplan.schedule.driver.solve`) use them.

* :class:`SpatialState` keeps the open stands per period and tests one more harvest
  incrementally; :class:`_RowState` the rule rows' left-hand sides.
* :func:`_descend` moves stands between prescriptions to lower a weighted sum of hinge
  excesses over rows, every prescription priced at once with numpy.
* :func:`_flow_sweep` brings the period volumes under the flow rules from the last period
  back (moves of one or two stands, lifting, forced mends), and :func:`sweep_flow` puts a
  plan of a looser problem (without the non-declining rows) back under the chain of rows.

Moves keep the openings legal; the caller checks the result in float64.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from spatialplan.schedule.model import Prep

__all__ = ["SpatialState", "period_volumes", "sweep_flow"]

# The flow sweep tries this many first moves in pairs with a finer second move, and
# raises a period more than LIFT_GAP (relative) below the bound its next period sets.
PAIR_FIRSTS = 16
LIFT_GAP = 0.001
# Lifting moves per period on average in one sweep.
LIFT_MOVES = 4
# Rounds of joint descent and sweep after a sweep that left a pair broken.
SWEEP_ROUNDS = 3
# Moves per sweep that mend a pair at the price of breaking a later one.
FORCED_MOVES = 10


def _bits(mask: int) -> list[int]:
    """0-based period columns set in a mask."""
    out = []
    while mask:
        low = mask & -mask
        out.append(low.bit_length() - 1)
        mask ^= low
    return out


class SpatialState:
    """Open stands per period with an incremental legality test for one more harvest."""

    def __init__(self, prep: Prep, plan: np.ndarray | None = None) -> None:
        self.prep = prep
        self.nbrs = [
            prep.indices[prep.indptr[i] : prep.indptr[i + 1]].tolist() for i in range(prep.n)
        ]
        self.area = prep.opening_area.tolist()
        self.fixed = prep.fixed_open
        self.open = prep.fixed_open.copy()
        self.plan = prep.null.copy()
        self.cut = np.zeros(prep.n, dtype=bool)
        self._bits: dict[int, list[int]] = {}
        if plan is not None:
            for i in np.nonzero(np.asarray(plan) != prep.null)[0]:
                self.set(int(i), int(plan[i]))

    def window(self, k: int) -> list[int]:
        """0-based period columns prescription ``k`` keeps its stand harvest-open."""
        m = int(self.prep.open_mask[k])
        b = self._bits.get(m)
        if b is None:
            b = self._bits[m] = _bits(m)
        return b

    def can_add(self, i: int, k: int) -> bool:
        """True when giving uncut stand ``i`` prescription ``k`` breaks no spatial rule."""
        prep = self.prep
        if not prep.spatial:
            return True
        mx = prep.max_opening
        for p in self.window(k):
            col = self.open[:, p]
            if prep.unit and any(col[j] for j in self.nbrs[i]):
                return False
            if mx is None:
                continue
            total = self.area[i]
            if total > mx:
                return False
            seen = {i}
            stack = [i]
            while stack:
                s = stack.pop()
                for j in self.nbrs[s]:
                    if j not in seen and col[j]:
                        seen.add(j)
                        total += self.area[j]
                        if total > mx:
                            return False
                        stack.append(j)
        return True

    def set(self, i: int, k: int) -> None:
        """Give stand ``i`` (now uncut) prescription ``k``."""
        self.plan[i] = k
        self.cut[i] = k != self.prep.null[i]
        for p in self.window(k):
            self.open[i, p] = True

    def unset(self, i: int) -> None:
        """Put stand ``i`` back on its no-harvest prescription."""
        k = int(self.plan[i])
        for p in self.window(k):
            self.open[i, p] = self.fixed[i, p]
        self.plan[i] = self.prep.null[i]
        self.cut[i] = False


class _RowState:
    """Left-hand sides of the rule rows with O(rows) updates per move."""

    def __init__(self, prep: Prep, plan: np.ndarray) -> None:
        rows = prep.rows
        self.D = prep.row_deltas  # (K, R), against the no-harvest prescription
        self.rhs = rows.rhs
        self.margin = 1e-7 * rows.scale
        self.lhs = rows.lhs(prep.null) + self.D[np.asarray(plan, dtype=np.int64)].sum(axis=0)

    def delta(self, k: int) -> np.ndarray:
        return self.D[k]

    def ok_after(self, dlt: np.ndarray) -> bool:
        return bool(np.all(self.lhs + dlt <= self.rhs - self.margin)) if dlt.size else True

    def violated(self) -> np.ndarray:
        return np.nonzero(self.lhs > self.rhs - self.margin)[0]


def _descend(
    st: SpatialState,
    prep: Prep,
    G: np.ndarray,
    cap: np.ndarray,
    w: np.ndarray,
    deadline: float,
    max_passes: int = 400,
) -> int:
    """Move stands between prescriptions to lower a weighted sum of hinge excesses.

    The cost of a plan is ``sum_m w[m] * max(q[m] - cap[m], 0)`` with ``q`` the sum of the
    rows ``G[k]`` (``(K, M)``, against the no-harvest prescription) of its prescriptions.
    Each pass prices every allowed prescription of every stand at once: how much the
    switch lowers the cost and how much value it loses. The moves with the most cost
    removed per unit of value lost are then applied one by one, each re-checked against
    the current cost (it must still lower it) and the openings; a stand moves at most
    once per pass. Returns the number of moves made.
    """
    if G.shape[1] == 0:
        return 0
    ks = np.nonzero(prep.allowed)[0]
    Gk = G[ks]
    sk = prep.stand_of[ks]
    rel = prep.rel_value
    relk = rel[ks]
    pos = relk[relk > 0]
    # Value lost is weighed with a floor of a twentieth of a typical stand's value, so
    # that a move losing nothing is not preferred for removing a trace of excess.
    eps = 0.05 * (float(np.mean(pos)) if pos.size else 1.0)
    q = G[st.plan].sum(axis=0)
    # Each allowed prescription's rows against its stand's current one, kept up to date
    # for the stands that moved (gathering G[cur] anew every pass took most of the time
    # on 200,000 prescriptions); ``first`` locates a stand's prescriptions in ``ks``.
    first = np.searchsorted(sk, np.arange(prep.n + 1))
    Dk = Gk - G[st.plan[sk]]
    moves = 0
    for _ in range(max_passes):
        if time.perf_counter() >= deadline:
            break
        exc = float(np.maximum(q - cap, 0.0) @ w)
        if exc <= 0.0:
            break
        cur = st.plan[sk]
        after = Dk + (q - cap)
        np.maximum(after, 0.0, out=after)
        red = exc - after @ w
        del after
        ok = (red > 1e-9 * exc) & (ks != cur)
        if not ok.any():
            break
        idx = np.nonzero(ok)[0]
        loss = np.maximum(rel[cur[idx]] - relk[idx], 0.0)
        idx = idx[np.argsort(-red[idx] / (loss + eps), kind="stable")]
        moved: set[int] = set()
        applied = tried = 0
        for t in idx.tolist():
            i = int(sk[t])
            if i in moved:
                continue
            tried += 1
            if tried > 256 and (applied or tried > 4096):
                break
            k, k0 = int(ks[t]), int(st.plan[i])
            dq = G[k] - G[k0]
            now = float(np.maximum(q - cap, 0.0) @ w)
            if now <= 0.0:
                break
            if float(np.maximum(q + dq - cap, 0.0) @ w) >= now * (1.0 - 1e-9):
                continue
            st.unset(i)
            if prep.harvest_mask[k] != 0 and not st.can_add(i, k):
                st.set(i, k0)
                continue
            st.set(i, k)
            q += dq
            moved.add(i)
            applied += 1
        for i in moved:
            a, b = first[i], first[i + 1]
            Dk[a:b] = Gk[a:b] - G[st.plan[i]]
        moves += applied
        if applied == 0:
            break
    return moves


def period_volumes(prep: Prep) -> np.ndarray:
    """(K, P) harvest volume of every prescription by period (m3)."""
    rx = prep.rx
    hk = np.repeat(np.arange(prep.n_rx), np.diff(rx.harvest_start))
    hp = np.asarray(rx.harvest_period, dtype=np.int64) - 1
    area = np.asarray(prep.problem.area_ha, dtype=np.float64)
    hv = area[prep.stand_of[hk]] * np.asarray(rx.harvest_volume_m3_ha, dtype=np.float64)
    out = np.zeros((prep.n_rx, prep.P))
    np.add.at(out, (hk, hp), hv)
    return out


def _row_units(D: np.ndarray) -> np.ndarray:
    """(R,) median magnitude of the non-zero entries of each column (a typical stand's share)."""
    unit = np.ones(D.shape[1])
    for r in range(D.shape[1]):
        a = np.abs(D[:, r])
        nz = a[a > 0]
        if nz.size:
            unit[r] = float(np.median(nz))
    return unit


def _flow_ok(prep: Prep, V: np.ndarray) -> np.ndarray:
    """``(..., P - 1)`` bool: period ``p``'s volume keeps the flow rules with period ``p + 1``.

    ``V`` holds period volumes in its last axis; a relative margin of 1e-6 of the largest
    volume is kept below every bound.
    """
    fr = prep.problem.flow
    a, b = V[..., :-1], V[..., 1:]
    m = 1e-6 * max(float(np.max(V, initial=0.0)), 1.0)
    ok = np.ones(a.shape, dtype=bool)
    t = fr.flow_tolerance
    if t is not None:
        ok &= (b <= (1.0 + t) * a - m) & (b >= (1.0 - t) * a + m)
    if fr.non_declining:
        ok &= b >= a + m
    if fr.volume_min_m3 is not None:
        ok &= a >= float(fr.volume_min_m3) + m
    if fr.volume_max_m3 is not None:
        ok &= a <= float(fr.volume_max_m3) - m
    return ok


def _flow_sweep(
    st: SpatialState,
    prep: Prep,
    vol: np.ndarray,
    other: np.ndarray,
    other_cap: np.ndarray,
    other_w: np.ndarray,
    deadline: float,
) -> int:
    """Make the period volumes keep the flow rules, last period first; returns the moves.

    Going back from the last period, each period's volume is brought into the range the
    flow rules allow given the next period's volume, by moves that keep the flow rules
    among all later periods (shift, drop or add a harvest): what is fixed stays fixed, so
    a shortfall late in the horizon lowers the earlier periods by just that much instead
    of dragging a chain of rows towards zero. A move may not raise the excess of the
    other rows (``other``: ``(K, R')`` against the no-harvest prescription, ``other_cap``
    and ``other_w`` their limits and weights). ``PAIR_FIRSTS`` first moves are tried in
    pairs with a finer second one; a period more than ``LIFT_GAP`` (relative) below its
    bound is raised when that pays; volume the earlier periods must give up is priced at the
    mean value per m3 of the prescriptions.
    """
    P = prep.P
    ks_all = np.nonzero(prep.allowed)[0]
    sk_all = prep.stand_of[ks_all]
    rel = prep.rel_value
    V = vol[st.plan].sum(axis=0)
    oq = other[st.plan].sum(axis=0)
    unit_value = _unit_value(prep, vol, ks_all)
    moves = 0
    lifts = 0
    forced = 0
    q = P - 2
    while q >= 0:
        restart = -1
        for _ in range(4 * prep.n):
            if time.perf_counter() >= deadline:
                return moves
            ok_now = _flow_ok(prep, V[q:])
            if ok_now[0]:
                if lifts >= LIFT_MOVES * P or not _lift(
                    st,
                    prep,
                    vol,
                    V,
                    oq,
                    other,
                    other_cap,
                    other_w,
                    unit_value,
                    q,
                    ks_all,
                    sk_all,
                ):
                    break
                lifts += 1
                moves += 1
                continue
            cur_all = st.plan[sk_all]
            # Only moves that change period q's volume can help.
            sel = np.nonzero(vol[ks_all, q] != vol[cur_all, q])[0]
            ks, sk, cur = ks_all[sel], sk_all[sel], cur_all[sel]
            dV = vol[ks] - vol[cur]
            dO = other[ks] - other[cur]
            rloss = np.maximum(rel[cur] - rel[ks], 0.0)
            lo, hi = _bounds_of(prep, float(V[q + 1]))
            gap0 = max(V[q] - hi, lo - V[q])

            pair = _PairState(prep, V, q, lo, hi, gap0, ok_now, oq, other_cap, other_w, unit_value)
            mend, keep, loss, gain = pair.judge(dV, dO, rloss)
            idx = np.nonzero(keep)[0]
            if idx.size == 0 and not np.any(gain > 0):
                break
            # Moves that mend the pair come first, the cheapest; then the cheapest per unit.
            score = np.where(
                mend[idx], -1.0 / (1.0 + loss[idx]), loss[idx] / np.maximum(gain[idx], 1e-12)
            )
            order = idx[np.argsort(score, kind="stable")]
            tries: list[tuple[float, tuple[int, ...]]] = [
                (float(loss[t]), (int(t),)) for t in order[:64].tolist() if mend[t]
            ]
            # Pairs: one of the moves that go the right way for period q with a second,
            # finer move of another stand (a single stand's volume overshoots the bound by
            # far more than the pair needs, and under non-declining flow every earlier
            # period pays for it).
            # The first move comes from those that move period q the right way: the
            # cheapest that keep every other row, and those that change the later periods
            # least (the partner has to mend what they break).
            toward = idx[np.sign(gain[idx]) > 0]
            toward = toward[np.argsort(rloss[toward], kind="stable")][: PAIR_FIRSTS // 2]
            bold = np.nonzero((gain > 0) & ~keep)[0]
            if bold.size:
                spill = np.abs(dV[bold, q + 1 :]).sum(axis=1)
                bold = bold[np.argsort(spill + rloss[bold] / max(unit_value, 1e-12), kind="stable")]
                toward = np.concatenate([toward, bold[: PAIR_FIRSTS - toward.size]])
            for ta in toward.tolist():
                other_stand = sk != sk[ta]
                pm, _, pl, _ = pair.judge(dV[ta] + dV, dO[ta] + dO, rloss[ta] + rloss)
                good = np.nonzero(pm & other_stand)[0]
                for tb in good[np.argsort(pl[good], kind="stable")][:4].tolist():
                    tries.append((float(pl[tb]), (int(ta), int(tb))))
            # The mending moves and pairs, cheapest first; then single moves that bring
            # period q nearer its range (when the mending ones all break an opening).
            tries.sort(key=lambda x: x[0])
            seq = [ts for _, ts in tries[:64]]
            seq += [(int(t),) for t in order[:64].tolist() if not mend[t]]
            made = _apply_first(st, seq, sk, ks, cur, vol, other, V, oq)
            moves += made
            if not made:
                # Stuck: every move that mends the pair breaks a later one (the later
                # periods sit on their bounds). Mend it with the move that changes the
                # later periods least and sweep again from the latest broken pair.
                if forced < FORCED_MOVES and _force(
                    st, pair, vol, other, ks, sk, cur, dV, dO, rloss
                ):
                    forced += 1
                    moves += 1
                    broken = np.nonzero(~_flow_ok(prep, V))[0]
                    restart = int(broken.max()) if broken.size else -1
                break
        if restart > q:
            q = restart
        else:
            q -= 1
    return moves


def _force(
    st: SpatialState,
    pair: _PairState,
    vol: np.ndarray,
    other: np.ndarray,
    ks: np.ndarray,
    sk: np.ndarray,
    cur: np.ndarray,
    dV: np.ndarray,
    dO: np.ndarray,
    rloss: np.ndarray,
) -> bool:
    """Mend the pair of period ``pair.q`` with the move that changes later periods least.

    The candidate moves are ``ks`` (stands ``sk``, now on ``cur``; volume change ``dV``,
    other rows' change ``dO``, value lost ``rloss``). The move keeps the openings and
    does not raise the other rows' excess, but may break later pairs (the sweep goes back
    to them). True if a move was made; ``pair.V`` and ``pair.oq`` are updated in place.
    """
    V, oq, q, unit_value = pair.V, pair.oq, pair.q, pair.unit_value
    nV = V[q] + dV[:, q]
    fits = (nV <= pair.hi) & (nV >= pair.lo)
    if pair.other_cap.size:
        o_now = float(np.maximum(oq - pair.other_cap, 0.0) @ pair.other_w)
        nxt = np.maximum(oq + dO - pair.other_cap, 0.0) @ pair.other_w
        fits &= nxt <= o_now + 1e-9 * max(o_now, 1.0)
    idx = np.nonzero(fits)[0]
    if idx.size == 0:
        return False
    spill = np.abs(dV[idx, q + 1 :]).sum(axis=1)
    cost = spill + rloss[idx] / max(unit_value, 1e-12)
    order = idx[np.argsort(cost, kind="stable")][:32]
    return _apply_first(st, [(t,) for t in order.tolist()], sk, ks, cur, vol, other, V, oq) > 0


def _apply_first(
    st: SpatialState,
    seq: list[tuple[int, ...]],
    sk: np.ndarray,
    ks: np.ndarray,
    cur: np.ndarray,
    vol: np.ndarray,
    other: np.ndarray,
    V: np.ndarray,
    oq: np.ndarray,
) -> int:
    """Make the first move (or pair of moves) of ``seq`` that keeps the openings.

    Move ``t`` gives stand ``sk[t]`` (now on ``cur[t]``) prescription ``ks[t]``; a pair is
    made whole or not at all. The period volumes ``V`` and the other rows' quantities
    ``oq`` are updated in place. Returns the stand moves made (0 when none fits).
    """
    hm = st.prep.harvest_mask
    for ts in seq:
        applied: list[int] = []
        for t in ts:
            i, k = int(sk[t]), int(ks[t])
            st.unset(i)
            if hm[k] != 0 and not st.can_add(i, k):
                st.set(i, int(cur[t]))
                break
            st.set(i, k)
            applied.append(t)
        if len(applied) < len(ts):
            for t in applied:
                i = int(sk[t])
                st.unset(i)
                st.set(i, int(cur[t]))
            continue
        for t in ts:
            k, k0 = int(ks[t]), int(cur[t])
            V += vol[k] - vol[k0]
            oq += other[k] - other[k0]
        return len(ts)
    return 0


def _unit_value(prep: Prep, vol: np.ndarray, ks: np.ndarray) -> float:
    """Mean value per m3 over prescriptions ``ks`` (the sweep's price of volume)."""
    tv = float(vol[ks].sum())
    return float(np.maximum(prep.rel_value[ks], 0.0).sum() / tv) if tv > 0 else 0.0


def _lift(
    st: SpatialState,
    prep: Prep,
    vol: np.ndarray,
    V: np.ndarray,
    oq: np.ndarray,
    other: np.ndarray,
    other_cap: np.ndarray,
    other_w: np.ndarray,
    unit_value: float,
    q: int,
    ks_all: np.ndarray,
    sk_all: np.ndarray,
) -> bool:
    """Raise period ``q``'s volume towards its bound when that pays; True if a move was made.

    Period ``q``'s volume is the ceiling of every earlier period under non-declining
    flow: a move that raises it (keeping it in range, every later pair and the other rows)
    is worth its own value change plus the volume the earlier periods may then keep.
    ``V`` and ``oq`` are updated in place.
    """
    lo, hi = _bounds_of(prep, float(V[q + 1]))
    if V[q] >= hi - LIFT_GAP * max(hi, 1.0):
        return False
    cur_all = st.plan[sk_all]
    sel = np.nonzero(vol[ks_all, q] > vol[cur_all, q])[0]
    if sel.size == 0:
        return False
    ks, sk, cur = ks_all[sel], sk_all[sel], cur_all[sel]
    dV = vol[ks] - vol[cur]
    dO = other[ks] - other[cur]
    ok_now = _flow_ok(prep, V[q:])
    pair = _PairState(
        prep, V, q, lo, hi, 0.0, ok_now, oq, other_cap, other_w, unit_value, ref=float(V[q])
    )
    mend, _, loss, _ = pair.judge(dV, dO, prep.rel_value[cur] - prep.rel_value[ks])
    idx = np.nonzero(mend & (loss < 0.0))[0]
    order = idx[np.argsort(loss[idx], kind="stable")][:32]
    return _apply_first(st, [(t,) for t in order.tolist()], sk, ks, cur, vol, other, V, oq) > 0


def sweep_flow(prep: Prep, plan: np.ndarray, deadline: float) -> np.ndarray:
    """A plan near ``plan`` whose period volumes keep the flow rules (last period first).

    For a plan of a looser problem, such as one searched without the non-declining rows:
    :func:`_flow_sweep` brings every period's volume, from the last back, into the range
    the flow rules allow given the next period's, with moves of one or two stands that
    keep the openings and do not raise the excess of the other rule rows (raising a
    period towards its bound where that pays, and mending a pair at the price of a later
    one when nothing else does). While a pair is still broken, up to ``SWEEP_ROUNDS``
    rounds lower the excess of every row together (:func:`_descend`) and sweep again. The
    result is not checked: the caller checks it (a sweep can run out of moves or time).

    Parameters
    ----------
    prep
        The problem with its flow rules.
    plan
        (n,) prescription per stand; openings legal, other rows met.
    deadline
        ``time.perf_counter()`` value at which to stop.

    Returns
    -------
    numpy.ndarray
        (n,) the swept plan (a new array).
    """
    st = SpatialState(prep, np.asarray(plan, dtype=np.int64).copy())
    rows = _RowState(prep, st.plan)
    const = prep.rows.lhs(prep.null)
    cap = rows.rhs - rows.margin - const
    D = rows.D
    if D.shape[1] == 0 or prep.P < 2:
        return np.asarray(st.plan, dtype=np.int64).copy()
    w = 1.0 / _row_units(D[prep.allowed])
    other = np.array([r.family != "flow" for r in prep.rows], dtype=bool)
    vol = period_volumes(prep)
    _flow_sweep(st, prep, vol, D[:, other], cap[other], w[other], deadline)
    for _ in range(SWEEP_ROUNDS):
        if not np.any(D[st.plan].sum(axis=0) > cap + rows.margin):
            break
        # A pair the sweep could not mend without breaking a later one (the later
        # periods sit on their bounds): lower the excess of every row together, then
        # sweep again.
        _descend(st, prep, D, cap, w, deadline)
        _flow_sweep(st, prep, vol, D[:, other], cap[other], w[other], deadline)
    return np.asarray(st.plan, dtype=np.int64).copy()


@dataclass(frozen=True)
class _PairState:
    """Period ``q`` of a flow sweep: what a move (or pair of moves) does to the flow rules."""

    prep: Prep
    V: np.ndarray
    q: int
    lo: float
    hi: float
    gap0: float
    ok_now: np.ndarray
    oq: np.ndarray
    other_cap: np.ndarray
    other_w: np.ndarray
    unit_value: float
    ref: float | None = None  # ceiling the excess is measured against (default: hi)

    def judge(self, d: np.ndarray, d_other: np.ndarray, value_loss: np.ndarray) -> tuple:
        """(mends, keep, loss, gain) of moves changing the period volumes by ``d``.

        ``keep``: later pairs that hold keep holding, period ``q`` comes nearer its range
        and the other rows' excess does not rise; ``mends``: kept and period ``q`` in range.
        """
        prep, V, q, hi, gap0 = self.prep, self.V, self.q, self.hi, self.gap0
        nV = V[q:] + d[..., q:]
        ok = _flow_ok(prep, nV)
        later = np.all(ok[..., 1:] | ~self.ok_now[1:], axis=-1)
        gap1 = np.maximum(nV[..., 0] - hi, self.lo - nV[..., 0])
        keep = later & (ok[..., 0] | (gap1 < gap0 - 1e-9 * abs(gap0)))
        if self.other_cap.size:
            o_now = float(np.maximum(self.oq - self.other_cap, 0.0) @ self.other_w)
            nxt = np.maximum(self.oq + d_other - self.other_cap, 0.0) @ self.other_w
            keep &= nxt <= o_now + 1e-9 * max(o_now, 1.0)
        # Volume the earlier periods hold above the level they will have to keep (the
        # bound compounded back from period q's new volume) is likely lost later: price
        # it against landing period q exactly at its bound. This prices both volume
        # pushed into earlier periods and lowering period q further than it must (under
        # non-declining flow every earlier period follows it down).
        h_new = np.minimum(nV[..., 0], hi)
        h_old = hi if self.ref is None else self.ref
        excess = np.zeros(h_new.shape)
        excess_min = 0.0
        for p in range(q - 1, -1, -1):
            h_new = _bounds_of_many(prep, h_new)
            h_old = _bounds_of(prep, h_old)[1]
            excess += np.maximum(V[p] + d[..., p] - h_new, 0.0)
            excess_min += max(V[p] - h_old, 0.0)
        rise = excess - excess_min
        if self.ref is None:
            rise = np.maximum(rise, 0.0)
        loss = value_loss + self.unit_value * rise
        return ok[..., 0] & keep, keep, loss, np.minimum(gap0 - gap1, gap0)


def _bounds_of_many(prep: Prep, after: np.ndarray) -> np.ndarray:
    """Upper end of :func:`_bounds_of` for many next-period volumes at once."""
    fr = prep.problem.flow
    hi = np.full(after.shape, np.inf)
    t = fr.flow_tolerance
    if t is not None and t < 1.0:
        hi = after / (1.0 - t)
    if fr.non_declining:
        hi = np.minimum(hi, after)
    if fr.volume_max_m3 is not None:
        hi = np.minimum(hi, float(fr.volume_max_m3))
    return hi


def _bounds_of(prep: Prep, after: float) -> tuple[float, float]:
    """Range for a period's volume that keeps the flow rules with the next period (``after``)."""
    fr = prep.problem.flow
    lo, hi = 0.0, np.inf
    t = fr.flow_tolerance
    if t is not None:
        lo = after / (1.0 + t)
        hi = after / (1.0 - t) if t < 1.0 else np.inf
    if fr.non_declining:
        hi = min(hi, after)
    if fr.volume_min_m3 is not None:
        lo = max(lo, float(fr.volume_min_m3))
    if fr.volume_max_m3 is not None:
        hi = min(hi, float(fr.volume_max_m3))
    return lo, hi
