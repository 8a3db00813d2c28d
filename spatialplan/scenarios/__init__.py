"""Scenario sets: many plans of one forest under different settings, run as Dask tasks.

The parts of the job, one module each:

* ``scenario_file`` - read and validate a scenario file (:func:`load_scenarios`,
  :class:`Scenario`, :class:`ScenarioSet`) and carry its input files to the workers
  (:class:`InputFiles`: shared paths or shipped bytes);
* ``units`` - management units (``plan --by-unit``, :func:`plan_by_unit`): the inputs are
  read once, cut per unit, and every unit runs the solve step of ``plan``
  (:func:`spatialplan.pipeline.solve_plan`); :func:`merge_unit_plans` writes one plan;
* ``tasks`` - what runs on a worker: one scenario (:func:`run_scenario_task`), or the
  load and merge tasks of a by-unit scenario, each returning a :class:`ScenarioResult`;
* ``cluster`` - the Dask client (:class:`dask_client`, :func:`split_threads`);
* ``comparison`` - run a scenario set and write the comparison table with the cost of
  each rule (:func:`run_comparison`, :func:`comparison_table`, :func:`rule_costs`,
  :func:`best_bound`); plain column names (:func:`column_name`) and the same columns in
  words (:func:`setting_label`, :func:`column_labels`).

Settings overrides as written in scenario files (dotted keys, ``"off"``) are applied by
:func:`spatialplan.settings.apply_overrides`.
"""

from spatialplan.scenarios.cluster import dask_client, split_threads
from spatialplan.scenarios.comparison import (
    RELAX_DIRECTION,
    SPATIAL_COST_LABELS,
    ComparisonResult,
    best_bound,
    check_outputs,
    column_labels,
    column_name,
    comparison_table,
    rule_costs,
    run_comparison,
    scenario_labels,
    setting_label,
)
from spatialplan.scenarios.scenario_file import (
    DEFAULT_SHIP_LIMIT_MB,
    InputFiles,
    Scenario,
    ScenarioSet,
    load_scenarios,
)
from spatialplan.scenarios.tasks import ScenarioResult, ScenarioTask, run_scenario_task
from spatialplan.scenarios.units import (
    UnitSolve,
    check_units_settings,
    cross_unit_edges,
    merge_unit_plans,
    plan_by_unit,
    solve_unit,
    subset_inputs,
    units_for,
)

__all__ = [
    "DEFAULT_SHIP_LIMIT_MB",
    "RELAX_DIRECTION",
    "SPATIAL_COST_LABELS",
    "ComparisonResult",
    "InputFiles",
    "Scenario",
    "ScenarioResult",
    "ScenarioSet",
    "ScenarioTask",
    "UnitSolve",
    "best_bound",
    "check_outputs",
    "check_units_settings",
    "column_labels",
    "column_name",
    "comparison_table",
    "cross_unit_edges",
    "dask_client",
    "load_scenarios",
    "merge_unit_plans",
    "plan_by_unit",
    "rule_costs",
    "run_comparison",
    "run_scenario_task",
    "scenario_labels",
    "setting_label",
    "solve_unit",
    "split_threads",
    "subset_inputs",
    "units_for",
]
