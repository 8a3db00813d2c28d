"""Start plans of a solve: the construction runs and, under non-declining flow, the looser
construction swept back into the chain of rows.

:func:`start_plans` is step 2 of :func:`spatialplan.schedule.driver.solve`: the LP-guided
greedy construction (:func:`spatialplan.schedule.construct.greedy_plan`) in several
assignment orders, the best legal plan kept. Under non-declining flow it also runs the
slack ladder (targets below the LP's period volumes) and the construction on the problem
without the non-declining rows, whose plans :func:`spatialplan.schedule.repair.sweep_flow`
brings back under the chain (docs/methods.md, "Non-declining flow: the looser problem,
swept"; numbers in docs/benchmarks.md).
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from spatialplan.problem import PlanProblem
from spatialplan.schedule.bound import LpResult
from spatialplan.schedule.construct import greedy_plan
from spatialplan.schedule.model import Prep, plan_npv, prepare
from spatialplan.schedule.repair import sweep_flow
from spatialplan.schedule.windows import SearchCtx

# lp_round first: it gave the best start on every bench landscape of 2 December 2026 (500
# to 30,000 stands, single harvest and estate; 10,000 stands: 0.928 of the LP bound against
# 0.885 for balanced) and is the slowest, so it must not be the run the budget cuts.
HEURISTIC_ORDERS = ("lp_round", "balanced", "regret", "sequential")
# Non-declining flow: the construction also aims 1-4 % below the LP's period volumes
# (``greedy_plan(slack=...)``), which leaves its flow repair room to keep the chain of rows;
# at the LP's own volumes the repair often fails and the plan is trimmed to nothing
# (docs/benchmarks.md, "Construction targets below the LP volumes"). These variants run
# while the construction has used less than CONSTRUCT_SHARE of the time limit; the
# FALLBACK_SLACKS ones only while no plan that harvests was found.
CHAIN_SLACKS = (-0.02, -0.01, 0.0, -0.03, -0.04)
# The ladder's orders: balanced first, its -2 % run gives the first legal plan in seconds
# (demo: 0.961 of the bound at 8 s; lp_round at -2 %: 0.08).
CHAIN_ORDERS = ("balanced", "regret", "lp_round", "sequential")
FALLBACK_SLACKS = (-0.08, -0.15)
CONSTRUCT_SHARE = 0.3
SWEEP_SHARE = 0.1  # of the time limit, at most, for one sweep
# Slacks (below the LP's period volumes) of the looser construction's best order, each
# plan swept, while the construction budget lasts; under non-declining flow the two
# constructions (looser one swept, slack ladder) share CHAIN_CONSTRUCT_SHARE of the time
# limit (on the demo the searches after them gained 0-0.04 points of the bound).
RELAXED_SLACKS = (-0.02, -0.04, -0.01, -0.03)
CHAIN_CONSTRUCT_SHARE = 0.5

#: A start plan: ``(plan, npv, key)``, ``key`` naming the run that built it.
Start = tuple[np.ndarray, float, str]


@dataclass
class Starts:
    """What the construction step leaves for the search.

    Attributes
    ----------
    best
        The best legal plan of the problem itself, or ``None``.
    relaxed
        Under non-declining flow: the problem without those rows, prepared (else ``None``).
    relaxed_best
        The best plan of the looser construction (before its sweep), or ``None``.
    swept_npv
        The best looser NPV already swept back (``-inf`` when none was).
    """

    best: Start | None = None
    relaxed: Prep | None = None
    relaxed_best: Start | None = None
    swept_npv: float = -np.inf


def start_plans(ctx: SearchCtx, lp: LpResult, time_limit_s: float, stats: dict) -> Starts:
    """Step 2 of a solve: the construction runs, every better legal plan offered to ``ctx``.

    Several assignment orders (each a fraction of a second per 1,000 stands); the best
    legal plan is kept. Which order wins depends on the landscape. Under non-declining
    flow neither way of construction wins everywhere (on 150-stand landscapes the sweep
    often loses to the slack ladder, on the demo it wins by 2.5 points): the ladder's
    first run comes first (a legal plan within seconds), then the looser construction and
    its sweeps, then the rest of the ladder with what is left of the budget. Writes
    ``heuristic*`` and ``relaxed_heuristic*`` keys into ``stats``.
    """
    prep = ctx.prep
    problem = prep.problem
    th = time.perf_counter()
    budget = CONSTRUCT_SHARE * time_limit_s
    out = Starts()
    sweeps: dict = {"n": 0, "s": 0.0, "npv": -np.inf}
    ladder = construction_runs(problem)
    hinfo: dict = {}
    if problem.flow.non_declining and prep.P > 1:
        out.best, hinfo = construct_runs(
            prep, lp, ladder[:1], ctx.deadline, budget, lambda p: ctx.offer(p, "heuristic")
        )
        ladder = ladder[1:]
        out.relaxed = without_chain(prep)
        budget = CHAIN_CONSTRUCT_SHARE * time_limit_s
        out.relaxed_best, rinfo = looser_construction(
            ctx, out.relaxed, lp, time_limit_s, th + budget, sweeps
        )
        stats["relaxed_heuristic"] = rinfo
        stats["relaxed_heuristic_sweeps"] = {"runs": sweeps["n"], "seconds": round(sweeps["s"], 3)}
        out.swept_npv = sweeps["npv"]
    out.best, info_rest = construct_runs(
        prep,
        lp,
        ladder,
        ctx.deadline,
        max(budget - (time.perf_counter() - th), 0.0),
        lambda plan: ctx.offer(plan, "heuristic"),
        out.best,
    )
    hinfo.update(info_rest)
    stats["heuristic_time_s"] = round(time.perf_counter() - th, 3)
    stats["heuristic"] = hinfo
    if out.best is not None:
        ctx.offer(out.best[0], "heuristic")
        stats["heuristic_order"] = out.best[2]
    stats["heuristic_npv"] = None if out.best is None else out.best[1]
    return out


def construct_runs(
    prep: Prep,
    lp: LpResult,
    runs: list[tuple[str, float]],
    deadline: float,
    budget: float,
    on_plan: Callable[[np.ndarray], object],
    best: Start | None = None,
) -> tuple[Start | None, dict]:
    """The construction runs ``(order, slack)`` in turn: the best legal plan and each run's info.

    Every better legal plan goes to ``on_plan`` at once (several runs can take a third of
    the time limit). Once a plan that harvests was found, the runs stop when ``budget``
    seconds are used, and no run goes past it (a run cut short stops its repair and is kept
    only if its trimmed plan is better): on 30,000
    stands the four orders took 190 of a 300 s limit and left the annealing 22 s
    (docs/benchmarks.md). The fallback slacks of the non-declining ladder run only while
    no plan that harvests was found. ``best`` is the best plan of earlier runs
    (``(plan, npv, key)``), kept unless a run beats it.
    """
    problem = prep.problem
    th = time.perf_counter()
    hinfo: dict = {}
    best_h = best
    for order, slack in runs:
        now = time.perf_counter()
        found = best_h is not None and prep.harvests_any(best_h[0])
        if best_h is not None and (
            now >= deadline or (found and (now - th > budget or slack in FALLBACK_SLACKS))
        ):
            break
        # The first plan that harvests is built to the end; later runs within the budget.
        until = min(deadline, th + budget) if found else deadline
        if lp.status == "optimal" and lp.x_rx is not None:
            plan, info = greedy_plan(prep, lp.x_rx, lp.price, until, order=order, slack=slack)
        else:
            # No LP solution: spread every stand evenly over its harvest periods.
            even = np.where(prep.harvest_mask != 0, 1.0 / max(prep.P, 1), 0.0)
            plan, info = greedy_plan(prep, even, None, until, order=order)
        info["npv"] = plan_npv(problem, plan, prep.rx) if info.get("legal") else None
        info["seconds"] = round(time.perf_counter() - now, 3)
        key = order if slack == 0.0 else f"{order} {slack:+.0%}"
        hinfo[key] = info
        if info.get("legal") and (best_h is None or info["npv"] > best_h[1]):
            best_h = (plan, info["npv"], key)
            on_plan(plan)
    return best_h, hinfo


def sweep_deadline(ctx: SearchCtx, time_limit_s: float) -> float:
    """When a sweep started now must end (a sweep cut short returns a plan that is checked)."""
    return min(ctx.deadline, time.perf_counter() + SWEEP_SHARE * time_limit_s)


def looser_construction(
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
        ctx.offer(sweep_flow(prep, plan, sweep_deadline(ctx, time_limit_s)), "relaxed")
        sweeps["n"] += 1
        sweeps["s"] += time.perf_counter() - ts
        sweeps["npv"] = max(sweeps["npv"], plan_npv(prep.problem, plan, prep.rx))

    t = time.perf_counter()
    runs = construction_runs(relaxed.problem)
    rbest, rinfo = construct_runs(relaxed, lp, runs, ctx.deadline, until - t, lambda p: None)
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


def without_chain(prep: Prep) -> Prep:
    """The problem without its non-declining rows (every other rule kept), prepared."""
    problem = prep.problem
    return prepare(
        dataclasses.replace(problem, flow=dataclasses.replace(problem.flow, non_declining=False))
    )


def construction_runs(problem: PlanProblem) -> list[tuple[str, float]]:
    """(order, slack) of the construction runs, in the order tried."""
    if problem.flow.non_declining and problem.periods > 1:
        return [(o, s) for s in CHAIN_SLACKS + FALLBACK_SLACKS for o in CHAIN_ORDERS]
    return [(o, 0.0) for o in HEURISTIC_ORDERS]
