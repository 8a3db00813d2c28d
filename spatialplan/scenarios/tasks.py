"""The tasks of a comparison, as they run on a Dask worker (or in-process).

A scenario is one task, :func:`run_scenario_task`: ``load_inputs`` then ``run_plan``,
exactly as ``plan``. With ``--by-unit`` a scenario is a small graph: one
:func:`load_scenario_inputs` task reads the inputs once, one
:func:`spatialplan.scenarios.units.solve_unit` task per unit takes them, and
:func:`merge_units_task` writes the merged plan. Output files come back as bytes in the
:class:`ScenarioResult`; no task raises for a failed plan.
"""

from __future__ import annotations

import tempfile
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from spatialplan.scenarios._worker import diagnosis_of, error_text, status_of, where
from spatialplan.scenarios.scenario_file import InputFiles
from spatialplan.scenarios.units import UnitSolve, merge_unit_plans
from spatialplan.settings import Settings

if TYPE_CHECKING:
    from spatialplan.pipeline import PlanInputs, PlanOutcome

__all__ = [
    "ScenarioResult",
    "ScenarioTask",
    "load_scenario_inputs",
    "merge_units_task",
    "run_scenario_task",
]


@dataclass
class ScenarioTask:
    """Everything a worker needs to plan one scenario (picklable)."""

    name: str
    settings: Settings
    files: InputFiles


@dataclass
class ScenarioResult:
    """What one scenario (or one merged by-unit plan) produced, or why it failed.

    Attributes
    ----------
    name
        Scenario name.
    ok
        A plan was found and written (it may still have failed verification).
    status
        Solver status (``optimal``, ``feasible``, ``time_limit``, ``interrupted``), or
        ``infeasible``, ``no_solution``, ``input_error``, ``settings_error``, ``error``.
    error, diagnosis
        Message and, for infeasible rules, the diagnosis lines.
    npv, lp_bound, cpsat_bound, gap, solve_time_s, cover_bound
        From :class:`spatialplan.schedule.PlanResult` (NaN when failed).
    verify_ok, verify_verdict
        Independent verification of the written plan.
    periods
        Per period: ``period``, ``volume_m3``, ``area_ha``, ``largest_opening_ha``.
    stand_ids, period
        Harvest period per stand (0 = not harvested), by position.
    files
        Output files relative to the output folder -> bytes (emptied once written).
    messages
        Notes of the run.
    wall_s, worker
        Wall time of the task and where it ran.
    """

    name: str
    ok: bool
    status: str
    error: str | None = None
    diagnosis: list[str] = field(default_factory=list)
    npv: float = float("nan")
    lp_bound: float = float("nan")
    cpsat_bound: float | None = None
    gap: float = float("nan")
    solve_time_s: float = float("nan")
    verify_ok: bool = False
    verify_verdict: str = ""
    periods: pd.DataFrame | None = None
    stand_ids: np.ndarray | None = None
    period: np.ndarray | None = None
    files: dict[str, bytes] = field(default_factory=dict)
    messages: list[str] = field(default_factory=list)
    wall_s: float = float("nan")
    worker: str = ""
    cover_bound: float | None = None

    @property
    def succeeded(self) -> bool:
        """Ran, and the plan passed verification."""
        return self.ok and self.verify_ok

    @classmethod
    def from_outcome(
        cls, name: str, inputs: PlanInputs, outcome: PlanOutcome, t0: float
    ) -> ScenarioResult:
        """The result of a written plan (``t0``: ``time.perf_counter()`` at the start)."""
        r = outcome.result
        return cls(
            name,
            True,
            str(r.status),
            npv=float(r.npv),
            lp_bound=float(r.lp_bound),
            cpsat_bound=None if r.cpsat_bound is None else float(r.cpsat_bound),
            cover_bound=None if r.cover_bound is None else float(r.cover_bound),
            gap=float(r.gap),
            solve_time_s=float(r.solve_time_s),
            verify_ok=bool(outcome.verify.ok),
            verify_verdict=str(outcome.verify.verdict),
            periods=_period_summary(outcome.periods),
            stand_ids=inputs.inventory.stands["stand_id"].to_numpy(dtype=object),
            period=np.asarray(r.period, dtype=np.int64),
            messages=list(outcome.messages) + [str(w) for w in r.stats.get("warnings", [])],
            wall_s=time.perf_counter() - t0,
            worker=where(),
        )

    @classmethod
    def from_error(cls, name: str, exc: BaseException, t0: float) -> ScenarioResult:
        """The result of a scenario that failed with ``exc`` (a traceback for a bug)."""
        res = cls(
            name,
            False,
            status_of(exc),
            error=error_text(exc),
            diagnosis=diagnosis_of(exc),
            wall_s=time.perf_counter() - t0,
            worker=where(),
        )
        if res.status == "error":
            res.messages.append(traceback.format_exc(limit=8))
        return res


def _col(df: pd.DataFrame, *names: str) -> np.ndarray:
    for n in names:
        if n in df.columns:
            return df[n].to_numpy(dtype=float)
    return np.full(len(df), np.nan)


def _period_summary(periods: pd.DataFrame) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "period": periods["period"].to_numpy(dtype=int),
            "volume_m3": _col(periods, "volume_m3", "harvest_volume_m3"),
            "area_ha": _col(periods, "harvest_net_area_ha", "harvest_area_ha"),
            "largest_opening_ha": _col(periods, "largest_opening_ha", "max_opening_ha"),
        }
    )


def _read_tree(folder: Path) -> dict[str, bytes]:
    return {
        str(q.relative_to(folder)): q.read_bytes() for q in sorted(folder.rglob("*")) if q.is_file()
    }


def run_scenario_task(task: ScenarioTask, files: InputFiles | None = None) -> ScenarioResult:
    """Plan one scenario exactly as ``plan`` does; never raises for a failed plan.

    Runs on a Dask worker (or in-process). Output files are written in a temporary folder
    and returned as bytes in :attr:`ScenarioResult.files`. ``files`` replaces
    ``task.files`` (Dask passes a scattered :class:`InputFiles` here).
    """
    from spatialplan.pipeline import load_inputs, run_plan

    t0 = time.perf_counter()
    try:
        with tempfile.TemporaryDirectory(prefix="spatialplan-") as td:
            tdp = Path(td)
            paths, settings = (files or task.files).for_worker(tdp / "in", task.settings)
            out_dir = tdp / "out"
            out_dir.mkdir()
            inputs = load_inputs(paths["stands"], paths.get("yields"), settings)
            outcome = run_plan(inputs, out_dir / f"{task.name}.gpkg")
            res = ScenarioResult.from_outcome(task.name, inputs, outcome, t0)
            res.files = _read_tree(out_dir)
        return res
    except Exception as exc:  # reported per scenario; the other scenarios go on
        return ScenarioResult.from_error(task.name, exc, t0)


def load_scenario_inputs(task: ScenarioTask, files: InputFiles | None = None) -> PlanInputs:
    """Read one scenario's inputs (:func:`spatialplan.pipeline.load_inputs`) on a worker.

    The first task of a by-unit scenario: the unit tasks and the merge task take its
    result, so the layer is read and the terrain computed once per scenario. Errors are
    raised (Dask hands them to the merge task, which reports them).
    """
    from spatialplan.pipeline import load_inputs

    with tempfile.TemporaryDirectory(prefix="spatialplan-") as td:
        paths, settings = (files or task.files).for_worker(Path(td) / "in", task.settings)
        return load_inputs(paths["stands"], paths.get("yields"), settings)


def merge_units_task(
    name: str, inputs: PlanInputs, files: InputFiles, *solves: UnitSolve
) -> ScenarioResult:
    """Merge the unit plans of one scenario, write them and return the files as bytes.

    The input files are put in place again (shipped bytes into a temporary folder) so the
    run table fingerprints the files the plan was read from.
    """
    import dataclasses

    t0 = time.perf_counter()
    try:
        with tempfile.TemporaryDirectory(prefix="spatialplan-") as td:
            tdp = Path(td)
            paths, settings = files.for_worker(tdp / "in", inputs.settings)
            inputs = dataclasses.replace(
                inputs,
                settings=settings,
                stands_path=paths["stands"],
                yields_path=paths.get("yields"),
            )
            out_dir = tdp / "out"
            out_dir.mkdir()
            outcome = merge_unit_plans(inputs, list(solves), out_dir / f"{name}.gpkg")
            res = ScenarioResult.from_outcome(name, inputs, outcome, t0)
            res.files = _read_tree(out_dir)
        # Flow rules were verified per unit, the rest on the merged plan: both must pass.
        res.verify_ok = res.verify_ok and all(u.verify_ok for u in solves)
        return res
    except Exception as exc:
        return ScenarioResult.from_error(name, exc, t0)
