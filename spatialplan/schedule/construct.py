"""Fast construction heuristic: LP-priced greedy with spatial checks, then trim and fill.

Every stand starts on its no-harvest prescription; the construction gives some stands a
harvesting prescription.

1. *Assign.* Each prescription has an LP price (objective minus the quantities' dual prices
   times its contributions, so a period whose volume the LP finds scarce costs more),
   taken against the stand's no-harvest prescription. Stands are placed in one of four
   orders (below), each on a prescription whose harvest periods still have room below the
   LP's volume and where every new opening stays legal. Openings are checked
   incrementally: a search over the open stands of each period the prescription keeps
   open, stopped as soon as the group passes the maximum area.
2. *Repair.* Stands move between prescriptions until the rule rows hold
   (:func:`_repair`). With a flow rule, each period's volume is first steered towards its
   LP volume (which decouples the periods: one move changes a few periods, each judged on
   its own), then a sweep from the last period back brings every period into the range
   the flow rules allow given the next one, by moves that keep every later pair legal.
   Only what cannot be mended that way falls to a joint descent on all rows (the moves
   live in :mod:`spatialplan.schedule.repair`). Dropping
   stands alone cannot repair a chained rule (non-declining flow, even flow over many
   periods): one period short forces every earlier one down with it.
3. *Trim.* While a rule row (flow, targets, ending inventory, old forest) is still broken,
   the stand with the lowest loss of value per unit of excess on the broken row goes back
   to its no-harvest prescription.
4. *Fill.* Uncut stands get a prescription wherever every row and the spatial rules still
   hold, last periods first (with a falling flow, the later periods bound the earlier ones).

Everything runs on plain arrays and small Python loops over stands; a 10,000-stand
instance takes a few seconds.
"""

from __future__ import annotations

import time

import numpy as np

from spatialplan.schedule.model import Prep, check_plan
from spatialplan.schedule.repair import (
    SpatialState,
    _descend,
    _flow_sweep,
    _row_units,
    _RowState,
    period_volumes,
    sweep_flow,
)

__all__ = ["SpatialState", "greedy_plan", "period_volumes", "sweep_flow"]


class _Cands:
    """Candidate prescriptions: harvest lists, volumes and stand rankings by price."""

    def __init__(self, prep: Prep, price: np.ndarray, lp_x: np.ndarray) -> None:
        rx = prep.rx
        K, P = prep.n_rx, prep.P
        self.price = price  # (K,) against the no-harvest prescription; -inf = not a candidate
        hk = np.repeat(np.arange(K), np.diff(rx.harvest_start))
        hp = np.asarray(rx.harvest_period, dtype=np.int64) - 1
        area = np.asarray(prep.problem.area_ha, dtype=np.float64)
        hv = area[prep.stand_of[hk]] * np.asarray(rx.harvest_volume_m3_ha, dtype=np.float64)
        self.hk, self.hp, self.hv = hk, hp, hv
        self.hs = rx.harvest_start.tolist()
        self.hp_l, self.hv_l = hp.tolist(), hv.tolist()
        self.target: np.ndarray = np.bincount(hp, weights=hv * lp_x[hk], minlength=P)[:P]
        fin = np.isfinite(price)
        best = np.full(prep.n, -np.inf)
        np.maximum.at(best, prep.stand_of[fin], price[fin])
        self.best = best  # best candidate price of every stand
        # Loss of each prescription against the stand's best (inf when not a candidate).
        self.loss = np.where(
            fin, np.where(np.isfinite(best), best, 0.0)[prep.stand_of] - price, np.inf
        )

    def harvests(self, k: int) -> zip:
        a, b = self.hs[k], self.hs[k + 1]
        return zip(self.hp_l[a:b], self.hv_l[a:b], strict=True)

    def period_lists(self, need_volume: bool = True) -> list[list[int]]:
        """Per period, candidate prescriptions harvesting in it, least loss then most volume."""
        ok = np.isfinite(self.price[self.hk]) & (self.price[self.hk] > 0)
        if need_volume:
            ok &= self.hv > 0
        out = []
        hk, hp, hv = self.hk[ok], self.hp[ok], self.hv[ok]
        loss = self.loss[hk]
        for pc in range(len(self.target)):
            s = hp == pc
            order = np.lexsort((-hv[s], loss[s]))
            out.append(hk[s][order].tolist())
        return out

    def room(self, V: np.ndarray, k: int, skip: int = -1) -> bool:
        """No harvest period of ``k`` (other than ``skip``) goes past its LP volume by half."""
        for p, v in self.harvests(k):
            if p != skip and V[p] + v > self.target[p] + 0.5 * v:
                return False
        return True

    def add(self, V: np.ndarray, k: int) -> None:
        for p, v in self.harvests(k):
            V[p] += v

    def vol_in(self, k: int, pc: int) -> float:
        return sum(v for p, v in self.harvests(k) if p == pc)


def _repair(
    st: SpatialState, rows: _RowState, prep: Prep, target: np.ndarray, deadline: float
) -> int:
    """Repair the rule rows by moving stands between prescriptions; returns the moves.

    With a flow rule (even flow or non-declining): first every period's volume is steered
    towards its target (the LP's volume) together with the other rows, which decouples
    the periods; then :func:`_flow_sweep` makes the volumes keep the flow rules exactly.
    Last, whatever rows are still broken are lowered together. ``rows`` is brought up to
    date with the plan.
    """
    R = len(rows.rhs)
    if R == 0:
        return 0
    const = prep.rows.lhs(prep.null)
    cap = rows.rhs - rows.margin - const
    D = rows.D
    w = 1.0 / _row_units(D[prep.allowed])
    moves = 0
    fr = prep.problem.flow
    if (fr.flow_tolerance is not None or fr.non_declining) and prep.P > 1:
        vol = period_volumes(prep)
        other = np.array([r.family != "flow" for r in prep.rows], dtype=bool)
        d_other = D[:, other]
        wv = 1.0 / _row_units(vol[prep.allowed]).mean()
        G = np.hstack([d_other, vol, -vol])
        capg = np.concatenate([cap[other], target, -target])
        wg = np.concatenate([w[other], np.full(2 * prep.P, wv)])
        moves += _descend(st, prep, G, capg, wg, deadline)
        moves += _flow_sweep(st, prep, vol, d_other, cap[other], w[other], deadline)
    rows.lhs = const + D[st.plan].sum(axis=0)
    if rows.violated().size:
        moves += _descend(st, prep, D, cap, w, deadline)
        rows.lhs = const + D[st.plan].sum(axis=0)
    return moves


def _by_stand(prep: Prep, price: np.ndarray) -> list[list[int]]:
    """Per stand, its candidate prescriptions with a positive price, best first."""
    ks = np.nonzero(np.isfinite(price) & (price > 0))[0]
    ks = ks[np.lexsort((-price[ks], prep.stand_of[ks]))]
    split = np.searchsorted(prep.stand_of[ks], np.arange(1, prep.n))
    return [a.tolist() for a in np.split(ks, split)]


def _assign_regret(st: SpatialState, c: _Cands, lp_x: np.ndarray, prep: Prep) -> int:
    lists = _by_stand(prep, c.price)
    n = prep.n
    best = np.full(n, -np.inf)
    second = np.zeros(n)
    for i, lst in enumerate(lists):
        if lst:
            best[i] = c.price[lst[0]]
            # Leaving the stand uncut (price 0) is always an option.
            second[i] = max(c.price[lst[1]], 0.0) if len(lst) > 1 else 0.0
    share = np.bincount(prep.stand_of, weights=lp_x * (prep.harvest_mask != 0), minlength=n)
    regret = np.where(np.isfinite(best), best - second, -np.inf)
    cand = np.nonzero(np.isfinite(best) & (best > 0) & (share > 1e-6))[0]
    cand = cand[np.argsort(-regret[cand], kind="stable")]
    V = np.zeros(prep.P)
    skips = 0
    for i in cand.tolist():
        for k in lists[i]:
            if not c.room(V, k):
                continue
            if not st.can_add(i, k):
                skips += 1
                continue
            st.set(i, k)
            c.add(V, k)
            break
    return skips


def _assign_balanced(st: SpatialState, c: _Cands, P: int) -> int:
    """Water-filling: always top up the period furthest below its LP volume."""
    lists = c.period_lists()
    target = c.target
    ptr = [0] * P
    V = np.zeros(P)
    skips = 0
    active = [target[pc] > 0 for pc in range(P)]
    while any(active):
        ratio = [V[pc] / target[pc] if active[pc] else np.inf for pc in range(P)]
        pc = int(np.argmin(ratio))
        lst = lists[pc]
        placed = False
        while ptr[pc] < len(lst):
            k = lst[ptr[pc]]
            ptr[pc] += 1
            i = int(st.prep.stand_of[k])
            if st.cut[i]:
                continue
            v = c.vol_in(k, pc)
            if V[pc] >= target[pc] - 0.5 * v:
                break
            if not c.room(V, k, skip=pc):
                continue
            if not st.can_add(i, k):
                skips += 1
                continue
            st.set(i, k)
            c.add(V, k)
            placed = True
            break
        if not placed:
            active[pc] = False
    return skips


def _assign_sequential(st: SpatialState, c: _Cands, P: int, backward: bool = False) -> int:
    lists = c.period_lists()
    V = np.zeros(P)
    skips = 0
    for pc in range(P - 1, -1, -1) if backward else range(P):
        for k in lists[pc]:
            i = int(st.prep.stand_of[k])
            if st.cut[i]:
                continue
            v = c.vol_in(k, pc)
            if V[pc] >= c.target[pc] - 0.5 * v:
                break
            if not c.room(V, k, skip=pc):
                continue
            if not st.can_add(i, k):
                skips += 1
                continue
            st.set(i, k)
            c.add(V, k)
    return skips


def _assign_rounded(st: SpatialState, c: _Cands, lp_x: np.ndarray, prep: Prep) -> int:
    """Round the LP (each stand to its largest harvesting share), keeping openings legal.

    Stands go in order of their LP share (whole shares first) and, within that, of price;
    a stand whose LP prescription would break an opening tries its others by price.
    """
    lists = _by_stand(prep, c.price)
    xs = np.where(prep.choice, lp_x, -1.0)
    n = prep.n
    share = np.full(n, -1.0)
    np.maximum.at(share, prep.stand_of, xs)
    # The first prescription of each stand reaching its largest share.
    hit = np.nonzero((xs == share[prep.stand_of]) & (xs > 0.5))[0]
    stands, pos = np.unique(prep.stand_of[hit], return_index=True)
    first = hit[pos]
    pf = np.where(np.isfinite(c.price[first]), c.price[first], -np.inf)
    order = np.lexsort((-pf, -np.round(share[stands], 6)))
    skips = 0
    for i, k in zip(stands[order].tolist(), first[order].tolist(), strict=True):
        if st.can_add(i, k):
            st.set(i, k)
            continue
        skips += 1
        for k2 in lists[i]:
            if k2 != k and st.can_add(i, k2):
                st.set(i, k2)
                break
    return skips


def _as_shares(prep: Prep, lp_x: np.ndarray) -> np.ndarray:
    """(K,) prescription shares; an (n, P) array of period shares is accepted when every
    prescription harvests at most once (the single-harvest model)."""
    x = np.asarray(lp_x, dtype=np.float64)
    if x.shape == (prep.n_rx,):
        return x
    if x.shape != (prep.n, prep.P):
        msg = f"LP shares must have shape ({prep.n_rx},) or ({prep.n}, {prep.P})"
        raise ValueError(msg)
    rx = prep.rx
    counts = np.diff(rx.harvest_start)
    if np.any(counts > 1):
        msg = "(n, P) LP shares need single-harvest prescriptions; pass (K,) shares"
        raise ValueError(msg)
    out = np.zeros(prep.n_rx)
    one = counts == 1
    out[one] = x[prep.stand_of[one], rx.harvest_period[rx.harvest_start[:-1][one]] - 1]
    return out


def greedy_plan(
    prep: Prep,
    lp_x: np.ndarray,
    lp_price: np.ndarray | None,
    deadline: float,
    slack: float = 0.0,
    order: str = "sequential",
    repair: bool = True,
) -> tuple[np.ndarray, dict]:
    """Build a plan that satisfies every rule, guided by the LP solution.

    Parameters
    ----------
    prep
        Pre-computed problem.
    lp_x
        (K,) LP share of every prescription (an (n, P) array of period shares is accepted
        for single-harvest prescriptions); its period volumes are the targets.
    lp_price
        (K,) LP prices (see :class:`~spatialplan.schedule.bound.LpResult`), or ``None``
        to rank by objective value.
    deadline
        ``time.perf_counter()`` value after which the heuristic stops adding stands.
    slack
        Relative room above the LP volume of each period during assignment.
    order
        ``"sequential"``: fill period 1, then 2, ... each up to its LP volume with the
        prescriptions that lose least against their stand's best; ``"balanced"``: always
        top up the period furthest below its LP volume; ``"regret"``: place stands in
        order of regret, each on its best prescription with room; ``"lp_round"``: round
        the LP; ``"backward"``: sequential from the last period.

    Returns
    -------
    (plan, info)
        The plan (prescription per stand; all no-harvest when nothing legal was found)
        and counts of what each phase did. The plan is checked with
        :func:`~spatialplan.schedule.model.check_plan`; ``info["legal"]`` says whether it
        passed.
    """
    n, P = prep.n, prep.P
    x = _as_shares(prep, lp_x)
    raw = prep.value if lp_price is None else np.asarray(lp_price, dtype=np.float64)
    # Prices against the no-harvest prescription; only allowed harvesting ones compete.
    with np.errstate(invalid="ignore"):
        base = raw[prep.null][prep.stand_of]
        price = np.where(
            prep.choice & np.isfinite(raw), raw - np.where(np.isfinite(base), base, 0.0), -np.inf
        )
    c = _Cands(prep, price, x)
    c.target = c.target * (1.0 + slack)
    info: dict = {}
    st = SpatialState(prep)

    # ---- 1. assignment ------------------------------------------------------------------
    if order == "regret":
        n_spatial_skip = _assign_regret(st, c, x, prep)
    elif order == "lp_round":
        n_spatial_skip = _assign_rounded(st, c, x, prep)
    elif order == "backward":
        n_spatial_skip = _assign_sequential(st, c, P, backward=True)
    elif order == "balanced":
        n_spatial_skip = _assign_balanced(st, c, P)
    else:
        n_spatial_skip = _assign_sequential(st, c, P)
    rows = _RowState(prep, st.plan)
    info["assigned"] = int(st.cut.sum())
    info["spatial_skips"] = n_spatial_skip
    if repair:
        info["repaired"] = _repair(st, rows, prep, c.target, deadline)

    # ---- 2. trim until every row holds --------------------------------------------------
    removed = 0
    rel = prep.rel_value
    for _ in range(4 * n + 10):
        bad = rows.violated()
        if bad.size == 0:
            break
        r = int(bad[np.argmax((rows.lhs - rows.rhs)[bad] / np.maximum(rows.margin[bad], 1e-12))])
        cut = np.nonzero(st.cut)[0]
        if cut.size == 0:
            break
        ks = st.plan[cut]
        red = rows.D[ks, r]  # going back to no harvest lowers the row by this
        helpful = red > 0
        if not helpful.any():
            break
        cut, ks, red = cut[helpful], ks[helpful], red[helpful]
        loss = rel[ks]
        need = rows.lhs[r] - rows.rhs[r] + rows.margin[r]
        # Prefer stands that cover the excess on their own, then the cheapest per unit.
        score = np.maximum(loss, 0.0) / np.minimum(red, need)
        j = int(np.argmin(score))
        i = int(cut[j])
        rows.lhs -= rows.delta(int(ks[j]))
        st.unset(i)
        removed += 1
    info["trimmed"] = removed

    # ---- 3. fill: add wherever every rule still holds ---------------------------------
    added = 0
    if rows.violated().size == 0:
        ok_k = np.isfinite(price) & (rel > 0)
        lists = []
        for pc in range(P):
            s = (c.hp == pc) & ok_k[c.hk]
            ks = c.hk[s]
            lists.append(ks[np.argsort(-price[ks], kind="stable")].tolist())
        dead: list[set[int]] = [set() for _ in range(P)]
        stand_of = prep.stand_of
        progress = True
        while progress and time.perf_counter() < deadline:
            progress = False
            for pc in range(P - 1, -1, -1):
                lst = lists[pc]
                tried = 0
                for k in lst:
                    i = int(stand_of[k])
                    if st.cut[i] or k in dead[pc]:
                        continue
                    tried += 1
                    if tried > 200:
                        break
                    dlt = rows.delta(k)
                    if not rows.ok_after(dlt):
                        continue
                    if not st.can_add(i, k):
                        dead[pc].add(k)  # openings only grow while filling
                        continue
                    st.set(i, k)
                    rows.lhs += dlt
                    added += 1
                    progress = True
                    break
                lists[pc] = [k for k in lst if not st.cut[stand_of[k]] and k not in dead[pc]]
    info["filled"] = added
    plan = st.plan.copy()
    legal = not check_plan(prep, plan)
    if not legal:
        plan = prep.empty_plan()
    info["legal"] = legal
    return plan, info
