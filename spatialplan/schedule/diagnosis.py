"""Why a problem is infeasible: relax one rule family at a time, then bisect its setting.

Families: flow (tolerance, non-declining), openings (maximum opening size, unit
restriction), minimum age (needs ``PlanProblem.eligible_no_min_age`` and the
single-harvest model, whose prescriptions follow ``eligible``), ending inventory (volume
floor, mean-age floor), old forest (the retained share) and targets (per-period
volume/area bounds). A family that
makes the problem feasible when dropped is then relaxed only as far as needed, found by
bisection on a feasibility check: the aspatial LP first (LP-infeasible means infeasible),
then the greedy heuristic (a legal plan means feasible), then CP-SAT on the full model
with lazy covers and no objective.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable
from typing import Any

import numpy as np

from spatialplan.problem import FlowRules, PlanProblem
from spatialplan.settings import SolverSettings

__all__ = ["diagnose", "is_feasible"]


def is_feasible(problem: PlanProblem, time_limit_s: float = 5.0, workers: int = 2) -> bool | None:
    """Quick feasibility check: ``True``, ``False`` or ``None`` (undecided in time)."""
    from spatialplan.schedule.bound import solve_lp
    from spatialplan.schedule.construct import greedy_plan
    from spatialplan.schedule.cpsat import CoverPool, SubModel, make_scaling
    from spatialplan.schedule.model import check_plan, prepare
    from spatialplan.schedule.windows import SearchCtx, lazy_rounds, seed_pair_covers

    t0 = time.perf_counter()
    prep = prepare(problem)
    zero = np.zeros(prep.n_rx)
    lp = solve_lp(
        problem,
        rows=prep.rows,
        allowed=prep.allowed,
        objective=zero,
        time_limit_s=time_limit_s,
        rx=prep.rx,
    )
    if lp.status == "infeasible":
        return False
    if not check_plan(prep, prep.empty_plan()):
        return True
    lp2 = solve_lp(
        problem, rows=prep.rows, allowed=prep.allowed, time_limit_s=time_limit_s, rx=prep.rx
    )
    if lp2.status == "optimal" and lp2.x_rx is not None:
        _, info = greedy_plan(prep, lp2.x_rx, lp2.price, t0 + time_limit_s, order="balanced")
        if info.get("legal"):
            return True
    left = time_limit_s - (time.perf_counter() - t0)
    if left <= 0.05:
        return None
    scaling = make_scaling(prep)
    # Pure feasibility: objective 0.
    scaling.int_value[:] = 0
    pool = CoverPool()
    seed_pair_covers(prep, pool)
    ctx = SearchCtx(
        prep=prep,
        scaling=scaling,
        pool=pool,
        workers=workers,
        seed=0,
        deadline=time.perf_counter() + left,
        t0=t0,
        lp_value=float("inf"),
    )
    sub = SubModel(prep, np.nonzero(prep.has_choice)[0], prep.empty_plan(), scaling)
    res = lazy_rounds(ctx, sub, left, "diagnose", first_slice_s=max(left / 4, 0.2))
    if res == "infeasible":
        return False
    if ctx.best is not None:
        return True
    return None


def _flow(problem: PlanProblem, **kw: Any) -> PlanProblem:
    return dataclasses.replace(problem, flow=dataclasses.replace(problem.flow, **kw))


def _with_min_age(problem: PlanProblem, age: float) -> PlanProblem:
    base = np.asarray(problem.eligible_no_min_age, dtype=bool)
    t = (np.arange(1, problem.periods + 1) - 0.5) * problem.period_length_yr
    old = problem.age_start_yr[:, None] + t[None, :] >= age - 1e-9
    return dataclasses.replace(problem, eligible=base & old, min_age_yr=age)


def _flow_check(
    feas: Callable[[PlanProblem], bool | None], pr: PlanProblem, key: str
) -> Callable[[float], bool | None]:
    """Feasibility of ``pr`` with flow setting ``key`` at a value."""
    return lambda x: feas(_flow(pr, **{key: x}))


def _bisect(
    check: Callable[[float], bool | None],
    bad: float,
    good: float,
    steps: int = 7,
    integer: bool = False,
) -> float:
    """Closest value to ``bad`` that ``check`` accepts, between ``bad`` and ``good``."""
    for _ in range(steps):
        mid = (bad + good) / 2
        if integer:
            mid = round(mid)
            if mid in (bad, good):
                break
        if check(mid):
            good = mid
        else:
            bad = mid
    return good


def _fmt(v: float) -> str:
    return f"{v:.3g}" if abs(v) < 1000 else f"{v:,.0f}"


def diagnose(problem: PlanProblem, settings: SolverSettings) -> list[str]:
    """Say which rule family makes the problem infeasible and how far to relax it.

    Parameters
    ----------
    problem
        An instance that :func:`spatialplan.schedule.solve` found infeasible.
    settings
        Only the time limit (split over the checks, at most 60 s in all) and workers are
        used.

    Returns
    -------
    list of str
        One line per rule family, e.g. ``"flow tolerance 0.10 is infeasible, 0.18 is
        feasible"``; the first lines name the families whose relaxation alone works.
    """
    budget = min(max(float(settings.time_limit_s), 5.0), 60.0)
    t_end = time.perf_counter() + budget
    workers = int(settings.workers)

    def feas(pr: PlanProblem) -> bool | None:
        left = t_end - time.perf_counter()
        return is_feasible(pr, time_limit_s=max(min(left / 6, 10.0), 0.5), workers=workers)

    fr = problem.flow
    out: list[str] = []
    works: list[str] = []
    fails: list[str] = []
    families: list[tuple[str, PlanProblem]] = []
    if fr.flow_tolerance is not None or fr.non_declining:
        families.append(("flow", _flow(problem, flow_tolerance=None, non_declining=False)))
    if problem.max_opening_ha is not None or problem.unit_restriction:
        families.append(
            ("openings", dataclasses.replace(problem, max_opening_ha=None, unit_restriction=False))
        )
    if (
        problem.eligible_no_min_age is not None
        and (problem.min_age_yr or 0) > 0
        and problem.prescriptions is None
    ):
        families.append(("minimum age", _with_min_age(problem, 0.0)))
    if fr.ending_volume_min_m3 is not None or fr.ending_mean_age_min_yr is not None:
        families.append(
            (
                "ending inventory",
                _flow(problem, ending_volume_min_m3=None, ending_mean_age_min_yr=None),
            )
        )
    if fr.old_forest_min_share is not None:
        families.append(("old forest", _flow(problem, old_forest_min_share=None)))
    if any(
        v is not None for v in (fr.volume_min_m3, fr.volume_max_m3, fr.area_min_ha, fr.area_max_ha)
    ):
        families.append(
            (
                "targets",
                _flow(
                    problem,
                    volume_min_m3=None,
                    volume_max_m3=None,
                    area_min_ha=None,
                    area_max_ha=None,
                ),
            )
        )
    for name, relaxed in families:
        ok = feas(relaxed)
        if ok:
            works.append(name)
            out.extend(_detail(name, problem, feas))
        elif ok is False:
            fails.append(name)
        else:
            fails.append(name + " (undecided in time)")
    if not works:
        out.append("no single rule family, relaxed alone, makes the rules feasible")
        both = _flow(
            problem,
            **{f.name: None for f in dataclasses.fields(FlowRules) if f.name != "non_declining"},
            non_declining=False,
        )
        if feas(both):
            out.append("dropping flow, targets and ending inventory together makes it feasible")
    for name in fails:
        out.append(f"relaxing {name} alone does not make the rules feasible")
    return out


def _detail(
    name: str, problem: PlanProblem, feas: Callable[[PlanProblem], bool | None]
) -> list[str]:
    fr = problem.flow
    msgs: list[str] = []
    if name == "flow":
        if fr.flow_tolerance is not None:
            t = float(fr.flow_tolerance)
            nd = _flow(problem, non_declining=False)
            hi = 1.0
            if feas(_flow(nd, flow_tolerance=hi)):
                v = _bisect(lambda x: feas(_flow(nd, flow_tolerance=x)), t, hi)
                msgs.append(f"flow tolerance {t:.2f} is infeasible, {v:.2f} is feasible")
            else:
                msgs.append(
                    f"flow tolerance {t:.2f} is infeasible; even 1.00 is not enough, "
                    "drop the even-flow rule"
                )
        if fr.non_declining:
            msgs.append(
                "or drop the non-declining rule"
                if msgs
                else "non-declining flow is infeasible; drop it"
            )
        return msgs or ["drop the flow rules"]
    if name == "openings":
        if problem.unit_restriction and feas(dataclasses.replace(problem, unit_restriction=False)):
            msgs.append("the unit restriction is infeasible; without it the rules are feasible")
        if problem.max_opening_ha is not None:
            m = float(problem.max_opening_ha)
            top = max(float(np.sum(problem.opening_area_ha)), m * 2)
            pr = dataclasses.replace(problem, unit_restriction=False)
            if feas(dataclasses.replace(pr, max_opening_ha=top)):
                v = _bisect(lambda x: feas(dataclasses.replace(pr, max_opening_ha=x)), m, top)
                msgs.append(f"maximum opening {_fmt(m)} ha is infeasible, {_fmt(v)} ha is feasible")
        return msgs or ["drop the opening rules"]
    if name == "minimum age":
        a = float(problem.min_age_yr or 0.0)
        v = _bisect(lambda x: feas(_with_min_age(problem, x)), a, 0.0)
        return [f"minimum age {_fmt(a)} yr is infeasible, {_fmt(v)} yr is feasible"]
    if name == "ending inventory":
        if fr.ending_volume_min_m3 is not None:
            e = float(fr.ending_volume_min_m3)
            pr = _flow(problem, ending_mean_age_min_yr=None)
            if feas(_flow(pr, ending_volume_min_m3=0.0)):
                v = _bisect(lambda x: feas(_flow(pr, ending_volume_min_m3=x)), e, 0.0)
                msgs.append(
                    f"ending volume floor {_fmt(e)} m3 is infeasible, {_fmt(v)} m3 is feasible"
                )
        if fr.ending_mean_age_min_yr is not None:
            e = float(fr.ending_mean_age_min_yr)
            pr = _flow(problem, ending_volume_min_m3=None)
            if feas(_flow(pr, ending_mean_age_min_yr=0.0)):
                v = _bisect(lambda x: feas(_flow(pr, ending_mean_age_min_yr=x)), e, 0.0)
                msgs.append(f"ending mean age {_fmt(e)} yr is infeasible, {_fmt(v)} yr is feasible")
        return msgs or ["drop the ending-inventory rules"]
    if name == "old forest":
        sh = float(fr.old_forest_min_share or 0.0)
        if feas(_flow(problem, old_forest_min_share=0.0)):
            v = _bisect(lambda x: feas(_flow(problem, old_forest_min_share=x)), sh, 0.0)
            return [f"old-forest share {sh:.3g} is infeasible, {v:.3g} is feasible"]
        return ["drop the old-forest rule"]
    # targets
    pairs = [
        ("volume_min_m3", "period volume minimum", "m3", 0.0),
        ("area_min_ha", "period area minimum", "ha", 0.0),
    ]
    tops = [
        ("volume_max_m3", "period volume maximum", "m3"),
        ("area_max_ha", "period area maximum", "ha"),
    ]
    for key, label, unit, lo in pairs:
        cur = getattr(fr, key)
        if cur is None:
            continue
        others = {k: None for k, *_ in pairs + tops if k != key}
        pr = _flow(problem, **others)
        if feas(_flow(pr, **{key: lo})):
            v = _bisect(_flow_check(feas, pr, key), float(cur), lo)
            msgs.append(f"{label} {_fmt(cur)} {unit} is infeasible, {_fmt(v)} {unit} is feasible")
    for key, label, unit in tops:
        cur = getattr(fr, key)
        if cur is None:
            continue
        others = {k: None for k, *_ in pairs + tops if k != key}
        pr = _flow(problem, **others)
        a_ha = np.asarray(problem.area_ha, float)
        if unit != "m3":
            total = float(a_ha.sum()) * problem.periods
        elif problem.prescriptions is None:
            total = float((a_ha[:, None] * problem.volume_m3_ha).sum())
        else:
            # Above every harvest of every prescription: no period can hold more.
            rx = problem.rx()
            owner = np.repeat(np.arange(rx.n_prescriptions), np.diff(rx.harvest_start))
            total = float((a_ha[rx.stand_of[owner]] * rx.harvest_volume_m3_ha).sum())
        big = float(total) + 1.0
        if feas(_flow(pr, **{key: big})):
            v = _bisect(_flow_check(feas, pr, key), float(cur), big)
            msgs.append(f"{label} {_fmt(cur)} {unit} is infeasible, {_fmt(v)} {unit} is feasible")
    return msgs or ["drop the period targets"]
