"""Fast construction heuristic: LP-priced regret greedy with spatial checks, then flow repair.

1. *Assign.* Each stand ranks its periods by the LP price of the cell (objective minus the
   rule rows' dual prices times the cell's coefficients, so a period whose volume the LP
   finds scarce costs more). Stands are placed in order of regret (best price minus
   second best), each in its best period that still has room below the LP's volume for
   that period and where the new opening stays legal. Openings are checked incrementally:
   a search over the open stands of each period the harvest keeps open, stopped as soon as
   the group passes the maximum area.
2. *Trim.* While a rule row (flow, targets, ending inventory) is broken, the stand with the
   lowest loss of value per unit of excess on the broken row is left uncut.
3. *Fill.* Stands are added back wherever every row and the spatial rules still hold, last
   periods first (with a falling flow, the later periods bound the earlier ones).

Everything runs on plain arrays and small Python loops over stands; a 10,000-stand
instance takes a few seconds.
"""

from __future__ import annotations

import time

import numpy as np

from spatialplan.schedule.model import Prep, check_plan

__all__ = ["SpatialState", "greedy_plan"]


class SpatialState:
    """Open stands per period with an incremental legality test for one more harvest."""

    def __init__(self, prep: Prep, period: np.ndarray | None = None) -> None:
        self.prep = prep
        self.nbrs = [
            prep.indices[prep.indptr[i] : prep.indptr[i + 1]].tolist() for i in range(prep.n)
        ]
        self.area = prep.opening_area.tolist()
        self.fixed = prep.fixed_open
        self.open = prep.fixed_open.copy()
        self.period = np.zeros(prep.n, dtype=np.int64)
        if period is not None:
            for i in np.nonzero(period > 0)[0]:
                self.set(int(i), int(period[i]))

    def window(self, i: int, q: int) -> range:
        """0-based period columns a harvest of stand ``i`` in period ``q`` keeps open."""
        return range(q - 1, min(q - 1 + int(self.prep.green[i]), self.prep.P))

    def can_add(self, i: int, q: int) -> bool:
        """True when harvesting stand ``i`` (now uncut) in period ``q`` breaks no spatial rule."""
        prep = self.prep
        if not prep.spatial:
            return True
        mx = prep.max_opening
        for p in self.window(i, q):
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
                k = stack.pop()
                for j in self.nbrs[k]:
                    if j not in seen and col[j]:
                        seen.add(j)
                        total += self.area[j]
                        if total > mx:
                            return False
                        stack.append(j)
        return True

    def set(self, i: int, q: int) -> None:
        """Record a harvest of stand ``i`` in period ``q`` (``i`` must be uncut)."""
        self.period[i] = q
        for p in self.window(i, q):
            self.open[i, p] = True

    def unset(self, i: int) -> None:
        """Remove the harvest of stand ``i``."""
        q = int(self.period[i])
        if q == 0:
            return
        for p in self.window(i, q):
            self.open[i, p] = self.fixed[i, p]
        self.period[i] = 0


class _RowState:
    """Left-hand sides of the rule rows with O(rows) updates per move."""

    def __init__(self, prep: Prep, period: np.ndarray) -> None:
        n, P = prep.n, prep.P
        self.rows = prep.rows
        k = len(self.rows)
        self.const = np.zeros(k)
        self.rhs = np.array([r.rhs for r in self.rows])
        self.margin = np.array([1e-7 * max(abs(r.rhs), r.scale_ref) for r in self.rows])
        # _d[r] is the (n, P) change of row r when a stand goes from uncut to period p.
        self._d: list[np.ndarray] = []
        for j, r in enumerate(self.rows):
            d, c = r.x_coefs(n, P)
            self._d.append(d)
            self.const[j] = c
        self.lhs = self.const.copy()
        for i in np.nonzero(period > 0)[0]:
            self.lhs += self.delta(int(i), int(period[i]))

    def delta(self, i: int, q: int) -> np.ndarray:
        return np.array([d[i, q - 1] for d in self._d]) if self._d else np.zeros(0)

    def ok_after(self, dlt: np.ndarray) -> bool:
        return bool(np.all(self.lhs + dlt <= self.rhs - self.margin)) if dlt.size else True

    def violated(self) -> np.ndarray:
        return np.nonzero(self.lhs > self.rhs - self.margin)[0]


def _assign_regret(
    st: SpatialState, price: np.ndarray, vol: np.ndarray, target: np.ndarray, lp_x: np.ndarray
) -> int:
    n, P = price.shape
    order_p = np.argsort(-price, axis=1)  # best period first
    srt = np.take_along_axis(price, order_p, axis=1)
    best = srt[:, 0]
    second = np.where(np.isfinite(srt[:, 1]), srt[:, 1], 0.0) if P > 1 else np.zeros(n)
    second = np.maximum(second, 0.0)  # leaving the stand uncut is always an option
    regret = np.where(np.isfinite(best), best - second, -np.inf)
    cand = np.nonzero(np.isfinite(best) & (best > 0) & (lp_x.sum(axis=1) > 1e-6))[0]
    cand = cand[np.argsort(-regret[cand], kind="stable")]
    V = np.zeros(P)
    skips = 0
    for i in cand.tolist():
        for pc in order_p[i].tolist():
            if not np.isfinite(price[i, pc]) or price[i, pc] <= 0:
                break
            if V[pc] + vol[i, pc] > target[pc] + 0.5 * vol[i, pc]:
                continue
            if not st.can_add(i, pc + 1):
                skips += 1
                continue
            st.set(i, pc + 1)
            V[pc] += vol[i, pc]
            break
    return skips


def _loss(price: np.ndarray) -> np.ndarray:
    """Opportunity loss of each cell against the stand's best LP period (inf if ineligible)."""
    fin = np.isfinite(price)
    best = np.max(np.where(fin, price, -np.inf), axis=1, initial=-np.inf)
    best = np.where(np.isfinite(best), best, 0.0)
    return np.where(fin, best[:, None] - np.where(fin, price, 0.0), np.inf)


def _assign_balanced(
    st: SpatialState, price: np.ndarray, vol: np.ndarray, target: np.ndarray
) -> int:
    """Water-filling: always top up the period furthest below its LP volume."""
    P = price.shape[1]
    loss = _loss(price)
    lists = []
    for pc in range(P):
        ok = np.nonzero(np.isfinite(price[:, pc]) & (price[:, pc] > 0) & (vol[:, pc] > 0))[0]
        lists.append(ok[np.lexsort((-vol[ok, pc], loss[ok, pc]))].tolist())
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
            i = lst[ptr[pc]]
            ptr[pc] += 1
            if st.period[i]:
                continue
            if V[pc] >= target[pc] - 0.5 * vol[i, pc]:
                break
            if not st.can_add(i, pc + 1):
                skips += 1
                continue
            st.set(i, pc + 1)
            V[pc] += vol[i, pc]
            placed = True
            break
        if not placed:
            active[pc] = False
    return skips


def _assign_sequential(
    st: SpatialState, price: np.ndarray, vol: np.ndarray, target: np.ndarray, backward: bool = False
) -> int:
    P = price.shape[1]
    loss = _loss(price)
    skips = 0
    for pc in range(P - 1, -1, -1) if backward else range(P):
        ok = np.nonzero(np.isfinite(price[:, pc]) & (price[:, pc] > 0) & (vol[:, pc] > 0))[0]
        ok = ok[np.lexsort((-vol[ok, pc], loss[ok, pc]))]
        v = 0.0
        for i in ok.tolist():
            if st.period[i]:
                continue
            if v >= target[pc] - 0.5 * vol[i, pc]:
                break
            if not st.can_add(i, pc + 1):
                skips += 1
                continue
            st.set(i, pc + 1)
            v += vol[i, pc]
    return skips


def _assign_rounded(st: SpatialState, price: np.ndarray, lp_x: np.ndarray) -> int:
    """Round the LP (each stand to its largest share), keeping openings legal.

    Stands go in order of their LP share (whole shares first) and, within that, of price;
    a stand whose LP period would break an opening tries its other periods by price.
    """
    share = lp_x.max(axis=1)
    first = lp_x.argmax(axis=1)
    cand = np.nonzero(share > 0.5)[0]
    pf = price[cand, first[cand]]
    cand = cand[np.lexsort((-pf, -np.round(share[cand], 6)))]
    order_p = np.argsort(-price, axis=1)
    skips = 0
    for i in cand.tolist():
        q = int(first[i])
        if st.can_add(i, q + 1):
            st.set(i, q + 1)
            continue
        skips += 1
        for pc in order_p[i].tolist():
            if not np.isfinite(price[i, pc]) or price[i, pc] <= 0:
                break
            if pc != q and st.can_add(i, pc + 1):
                st.set(i, pc + 1)
                break
    return skips


def greedy_plan(
    prep: Prep,
    lp_x: np.ndarray,
    lp_price: np.ndarray | None,
    deadline: float,
    slack: float = 0.0,
    order: str = "sequential",
) -> tuple[np.ndarray, dict]:
    """Build a plan that satisfies every rule, guided by the LP solution.

    Parameters
    ----------
    prep
        Pre-computed problem.
    lp_x
        (n, P) LP solution; its period volumes are the targets.
    lp_price
        (n, P) LP cell prices (see :class:`~spatialplan.schedule.bound.LpResult`), or
        ``None`` to rank by objective value.
    deadline
        ``time.perf_counter()`` value after which the heuristic stops adding stands.
    slack
        Relative room above the LP volume of each period during assignment.
    order
        ``"sequential"``: fill period 1, then 2, ... each up to its LP volume with the
        stands that lose least against their best LP period; ``"regret"``: place stands
        in order of regret, each in its best period with room.

    Returns
    -------
    (period, info)
        The plan (all-zero when nothing legal was found) and counts of what each phase
        did. The plan is checked with :func:`~spatialplan.schedule.model.check_plan`;
        ``info["legal"]`` says whether it passed.
    """
    n, P = prep.n, prep.P
    pr = prep.problem
    elig = prep.eligible
    price = np.where(elig, prep.value if lp_price is None else lp_price, -np.inf)
    vol = np.where(elig, pr.area_ha[:, None] * pr.volume_m3_ha, 0.0)
    target = (vol * lp_x).sum(axis=0) * (1.0 + slack)
    info: dict = {}
    st = SpatialState(prep)
    rows = _RowState(prep, st.period)

    # ---- 1. assignment ------------------------------------------------------------------
    if order == "regret":
        n_spatial_skip = _assign_regret(st, price, vol, target, lp_x)
    elif order == "lp_round":
        n_spatial_skip = _assign_rounded(st, price, lp_x)
    elif order == "backward":
        n_spatial_skip = _assign_sequential(st, price, vol, target, backward=True)
    elif order == "balanced":
        n_spatial_skip = _assign_balanced(st, price, vol, target)
    else:
        n_spatial_skip = _assign_sequential(st, price, vol, target)
    rows = _RowState(prep, st.period)
    info["assigned"] = int((st.period > 0).sum())
    info["spatial_skips"] = n_spatial_skip

    # ---- 2. trim until every row holds --------------------------------------------------
    removed = 0
    for _ in range(4 * n + 10):
        bad = rows.violated()
        if bad.size == 0:
            break
        r = int(bad[np.argmax((rows.lhs - rows.rhs)[bad] / np.maximum(rows.margin[bad], 1e-12))])
        d = rows._d[r]
        cut = np.nonzero(st.period > 0)[0]
        if cut.size == 0:
            break
        red = d[cut, st.period[cut] - 1]  # removing the stand lowers the row by this
        helpful = red > 0
        if not helpful.any():
            break
        cut, red = cut[helpful], red[helpful]
        loss = prep.value[cut, st.period[cut] - 1]
        need = rows.lhs[r] - rows.rhs[r] + rows.margin[r]
        # Prefer stands that cover the excess on their own, then the cheapest per unit.
        score = np.maximum(loss, 0.0) / np.minimum(red, need)
        i = int(cut[np.argmin(score)])
        rows.lhs -= rows.delta(i, int(st.period[i]))
        st.unset(i)
        removed += 1
    info["trimmed"] = removed

    # ---- 3. fill: add wherever every rule still holds ---------------------------------
    added = 0
    if rows.violated().size == 0:
        prio = np.where(elig, prep.value if lp_price is None else lp_price, -np.inf)
        lists = []
        for pc in range(P):
            ok = np.nonzero(np.isfinite(prio[:, pc]) & (prep.value[:, pc] > 0))[0]
            lists.append(ok[np.argsort(-prio[ok, pc], kind="stable")].tolist())
        dead: list[set[int]] = [set() for _ in range(P)]
        progress = True
        while progress and time.perf_counter() < deadline:
            progress = False
            for pc in range(P - 1, -1, -1):
                lst = lists[pc]
                tried = 0
                for i in lst:
                    if st.period[i] or i in dead[pc]:
                        continue
                    tried += 1
                    if tried > 200:
                        break
                    dlt = rows.delta(i, pc + 1)
                    if not rows.ok_after(dlt):
                        continue
                    if not st.can_add(i, pc + 1):
                        dead[pc].add(i)  # openings only grow while filling
                        continue
                    st.set(i, pc + 1)
                    rows.lhs += dlt
                    added += 1
                    progress = True
                    break
                lists[pc] = [i for i in lst if not st.period[i] and i not in dead[pc]]
    info["filled"] = added
    period = st.period.copy()
    legal = not check_plan(prep, period)
    if not legal:
        period = np.zeros(n, dtype=np.int64)
    info["legal"] = legal
    return period, info
