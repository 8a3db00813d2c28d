"""The workflow of the ``spatialplan`` commands as functions, for notebooks and scripts.

Everything here is re-exported flat from :mod:`spatialplan` (``spatialplan.plan(...)``)
and behaves as the command of the same job: the same validation, the same messages, the
same solver, the same independent check and the same files.

=========================  ==========================  =====================================
command                    function                    returns
=========================  ==========================  =====================================
(reading)                  :func:`read_inputs`         :class:`~spatialplan.pipeline.PlanInputs`
``check``                  :func:`check_inputs`        :class:`~spatialplan.summary.InputSummary`
``plan`` (solve, verify)   :func:`plan`                :class:`HarvestPlan`
``plan`` (files)           :func:`write_outputs`       list of paths written
``verify``                 :func:`verify_plan`         :class:`~spatialplan.verify.VerifyReport`
``map``                    :func:`render_review_files` paths of map, report, charts
``rotation``               :func:`rotation_table`      DataFrame
=========================  ==========================  =====================================

Stands may be a file or a GeoDataFrame, yields a CSV file or a DataFrame: frames are
written to a temporary GeoPackage/CSV and read back, so they are validated exactly as
files are (messages call them "stands GeoDataFrame" and "yields DataFrame").

Examples
--------
>>> import spatialplan
>>> from spatialplan.synthetic import synthetic_yield_table, voronoi_forest
>>> stands = voronoi_forest(12, seed=1)  # a GeoDataFrame of 12 invented stands
>>> summary = spatialplan.check_inputs(stands, synthetic_yield_table())
>>> summary.usable, summary.n_stands
(True, 12)

:func:`plan` shows a whole run on the same data.
"""

from __future__ import annotations

import contextlib
import dataclasses
import tempfile
import warnings
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeAlias

import geopandas as gpd
import pandas as pd

from spatialplan.errors import InputError, OutputError, SettingsError
from spatialplan.pipeline import PlanBundle, PlanInputs
from spatialplan.review import render_review_files
from spatialplan.settings import Settings, load_settings
from spatialplan.summary import InputSummary

__all__ = [
    "HarvestPlan",
    "InputSummary",
    "Settings",
    "check_inputs",
    "load_settings",
    "plan",
    "read_inputs",
    "read_yields",
    "render_review_files",
    "rotation_table",
    "verify_plan",
    "write_outputs",
]

STANDS_FRAME = "stands GeoDataFrame"  # how an in-memory stand layer is named in messages
YIELDS_FRAME = "yields DataFrame"

StandsSource: TypeAlias = str | Path | gpd.GeoDataFrame
YieldsSource: TypeAlias = str | Path | pd.DataFrame | None
SettingsSource: TypeAlias = Settings | str | Path | None


# ---------------------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------------------
def _settings(settings: SettingsSource) -> Settings:
    if isinstance(settings, Settings):
        return settings
    return load_settings(settings)


@contextlib.contextmanager
def _as_files(
    stands: StandsSource, yields: YieldsSource, layer: str | None
) -> Iterator[tuple[Path, Path | None, dict[str, str]]]:
    """Paths for the inputs, writing in-memory frames to a temporary folder.

    Yields the stand path, the yield path and ``{temporary path: label}`` for messages;
    errors raised inside name the frames by their labels instead of the temporary files.
    """
    with tempfile.TemporaryDirectory(prefix="spatialplan-") as tmp:
        labels: dict[str, str] = {}
        if isinstance(stands, gpd.GeoDataFrame):
            stands_path = Path(tmp) / "stands.gpkg"
            try:
                with warnings.catch_warnings():  # a missing CRS is reported by read_stands
                    warnings.filterwarnings("ignore", message="'crs' was not provided")
                    stands.to_file(stands_path, layer=layer or "stands", driver="GPKG")
            except Exception as exc:  # column types a GeoPackage cannot hold
                msg = f"the {STANDS_FRAME} cannot be stored as a GeoPackage layer: {exc}"
                raise InputError(msg) from exc
            labels[str(stands_path)] = STANDS_FRAME
        else:
            stands_path = Path(stands)
        yields_path: Path | None = None
        if isinstance(yields, pd.DataFrame):
            yields_path = Path(tmp) / "yields.csv"
            yields.to_csv(yields_path, index=False)
            labels[str(yields_path)] = YIELDS_FRAME
        elif yields is not None:
            yields_path = Path(yields)
        try:
            yield stands_path, yields_path, labels
        except (InputError, SettingsError) as exc:
            text = _relabel(str(exc), labels)
            if text == str(exc):
                raise
            raise type(exc)(text) from None


def _relabel(text: str, labels: Mapping[str, str]) -> str:
    for path, label in labels.items():
        text = text.replace(path, label)
    return text


def read_inputs(
    stands: StandsSource,
    yields: YieldsSource = None,
    settings: SettingsSource = None,
    *,
    strict: bool = True,
) -> PlanInputs:
    """Read and validate the stand layer, the yield table and the terrain inputs.

    Parameters
    ----------
    stands
        A polygon layer file (GeoPackage, Shapefile, ...) or a GeoDataFrame.
    yields
        A long-format yield-table CSV or DataFrame (key columns, age, volume, optional
        diameter); ``None`` when every stratum has a Chapman-Richards curve in ``[growth]``.
    settings
        :class:`Settings`, a TOML settings file, or ``None`` for the defaults.
    strict
        Raise on any error in the stand layer (as ``plan`` does); ``False`` keeps them
        in ``inventory.problems`` (as ``check`` does).

    Returns
    -------
    spatialplan.pipeline.PlanInputs
        ``inventory.stands`` is the validated stand GeoDataFrame in the working CRS;
        ``settings`` holds the field names as found in the layer.

    Raises
    ------
    InputError, SettingsError
        Naming the file (or frame), field, key or stand ids.

    Examples
    --------
    >>> from spatialplan.synthetic import synthetic_yield_table, voronoi_forest
    >>> inputs = read_inputs(voronoi_forest(12, seed=1), synthetic_yield_table())
    >>> len(inputs.inventory.stands), str(inputs.stands_path)
    (12, 'stands GeoDataFrame')
    """
    from spatialplan.pipeline import load_inputs

    s = _settings(settings)
    with _as_files(stands, yields, s.fields.layer) as (stands_path, yields_path, labels):
        inputs = load_inputs(stands_path, yields_path, s, strict=strict)
    if not labels:
        return inputs
    # The temporary files are gone: record the frames by their labels.
    inv = inputs.inventory
    problems = [dataclasses.replace(p, message=_relabel(p.message, labels)) for p in inv.problems]
    in_memory_stands = isinstance(stands, gpd.GeoDataFrame)
    inv = dataclasses.replace(
        inv, path=Path(STANDS_FRAME) if in_memory_stands else inv.path, problems=problems
    )
    return dataclasses.replace(
        inputs,
        inventory=inv,
        stands_path=Path(STANDS_FRAME) if in_memory_stands else inputs.stands_path,
        yields_path=None if isinstance(yields, pd.DataFrame) else inputs.yields_path,
        messages=[_relabel(m, labels) for m in inputs.messages],
    )


def read_yields(yields: str | Path | pd.DataFrame, settings: SettingsSource = None) -> Any:
    """Read and validate a long-format yield table.

    Parameters
    ----------
    yields
        CSV file or DataFrame: the key columns named in ``fields.yield_keys``, age,
        volume (m3/ha) and optionally mean diameter (cm).
    settings
        :class:`Settings`, a TOML file or ``None``; ``fields.yield_keys`` and ``yields``
        (column names) are used.

    Returns
    -------
    spatialplan.growth.YieldTable
        ``frame`` holds the cleaned table.

    Raises
    ------
    InputError
        Every problem at once, naming the file (or frame), key and CSV line.

    Examples
    --------
    >>> from spatialplan.synthetic import synthetic_yield_table
    >>> table = read_yields(synthetic_yield_table(["S1", "S2"]))
    >>> table.strata
    ['S1', 'S2']
    """
    from spatialplan.growth import load_yield_table, yield_table_from_csv_text

    s = _settings(settings)
    keys = s.fields.yield_keys
    if isinstance(yields, pd.DataFrame):
        # Through CSV text, so values are parsed and lines numbered as in a file.
        text = yields.to_csv(index=False)
        return yield_table_from_csv_text(text, keys, s.yields, source=YIELDS_FRAME)
    return load_yield_table(yields, keys, s.yields)


# ---------------------------------------------------------------------------------------
# check
# ---------------------------------------------------------------------------------------
def check_inputs(
    stands: StandsSource, yields: YieldsSource = None, settings: SettingsSource = None
) -> InputSummary:
    """Validate the inputs and summarise them, as ``spatialplan check`` does.

    Every problem of the stand layer is collected (none is raised); the summary's
    ``usable`` says whether planning can go ahead.

    Parameters
    ----------
    stands, yields, settings
        As for :func:`read_inputs`.

    Returns
    -------
    spatialplan.summary.InputSummary
        Areas (gross, stream buffers, net harvestable), age classes, strata, harvest
        systems, problems and notes.

    Raises
    ------
    InputError, SettingsError
        Inputs that cannot be read at all (a missing file, a missing field, no CRS).

    Examples
    --------
    >>> from spatialplan.synthetic import synthetic_yield_table, voronoi_forest
    >>> stands = voronoi_forest(12, seed=1, reserve_share=0.25)
    >>> settings = load_settings(None, {"fields.reserve_field": "reserve"})
    >>> summary = check_inputs(stands, synthetic_yield_table(), settings)
    >>> summary.usable, summary.n_stands, summary.reserve_stands
    (True, 12, 3)
    """
    from spatialplan.summary import summarise_inputs

    return summarise_inputs(read_inputs(stands, yields, settings, strict=False))


# ---------------------------------------------------------------------------------------
# plan
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class HarvestPlan:
    """A solved and independently checked plan, held in memory.

    Attributes
    ----------
    schedule
        The ``schedule`` layer: the stand attributes plus ``period`` (first harvest,
        empty when not harvested), ``harvest_count``, ``harvest_periods``,
        ``harvest_mid_year``, ``age_at_harvest_yr``, ``volume_m3``, ``npv`` (the stand's
        share of the plan NPV, ending value included), ``ending_value_npv``,
        ``opening_id`` ... in the input CRS.
    openings
        The ``openings`` layer: one polygon per opening and period.
    periods
        The ``periods`` table: area, volume, value, flow limits, largest opening.
    strata
        The ``strata`` table: harvest area and volume by stratum and period.
    run
        The rows of the ``run`` table (text), as :func:`write_outputs` records them.
    verify
        The independent check of the schedule.
    result
        The solver's :class:`spatialplan.schedule.PlanResult` (period per stand, status,
        NPV, bounds, statistics).
    inputs, bundle
        What the plan was built from (:func:`write_outputs` needs them).
    messages
        Notes from reading and building the problem.
    harvests
        The ``harvests`` table: one row per harvest (a stand may be cut more than once),
        with the age and stratum of the crop cut, volume, gross value and NPV.
    """

    schedule: gpd.GeoDataFrame
    openings: gpd.GeoDataFrame
    periods: pd.DataFrame
    strata: pd.DataFrame
    run: dict[str, str]
    verify: Any
    result: Any
    inputs: PlanInputs
    bundle: PlanBundle
    messages: tuple[str, ...] = ()
    harvests: pd.DataFrame | None = None

    @property
    def settings(self) -> Settings:
        """The settings the plan was made with."""
        return self.inputs.settings

    @property
    def npv(self) -> float:
        """Net present value of the plan."""
        return float(self.result.npv)

    @property
    def status(self) -> str:
        """Solver status: ``optimal``, ``feasible``, ``time_limit`` or ``interrupted``."""
        return str(self.result.status)

    @property
    def lp_bound(self) -> float:
        """Upper bound without the spatial rules (LP relaxation)."""
        return float(self.result.lp_bound)

    @property
    def cpsat_bound(self) -> float | None:
        """CP-SAT's upper bound on the full model (``None`` when not proven)."""
        return None if self.result.cpsat_bound is None else float(self.result.cpsat_bound)

    @property
    def gap(self) -> float:
        """Relative gap between the NPV and the tighter bound."""
        return float(self.result.gap)

    @property
    def verdict(self) -> str:
        """One line from the independent check: ``passed: ...`` or ``failed: ...`` with counts."""
        return str(self.verify.verdict)


def _with_settings(inputs: PlanInputs, settings: SettingsSource) -> PlanInputs:
    """``inputs`` planned under other rules; the reading settings must not change."""
    if settings is None:
        return inputs
    s = _settings(settings)
    fixed = ("fields", "yields", "growth", "terrain")
    changed = [k for k in fixed if getattr(s, k) != getattr(inputs.settings, k)]
    if changed:
        msg = (
            f"settings [{'], ['.join(changed)}] differ from those the inputs were read with; "
            "read them again with read_inputs(...), or derive the settings from "
            "inputs.settings.with_overrides({...})"
        )
        raise SettingsError(msg)
    return dataclasses.replace(inputs, settings=s)


def plan(
    stands: StandsSource | PlanInputs,
    yields: YieldsSource = None,
    settings: SettingsSource = None,
    *,
    on_progress: Callable[[Any], None] | None = None,
) -> HarvestPlan:
    """Schedule clear-cuts by period to maximise NPV under the rules, and check the plan.

    The same steps as ``spatialplan plan`` up to the files: build the problem, solve it
    (LP bound, heuristics, CP-SAT), check the schedule independently and build the
    layers and tables. Nothing is written; see :func:`write_outputs`.

    Parameters
    ----------
    stands
        As for :func:`read_inputs`, or inputs already read with it (then ``yields``
        must be ``None``; ``settings`` may change the rules, horizon, economics, solver
        and outputs but not how the inputs are read).
    yields, settings
        As for :func:`read_inputs`.
    on_progress
        Called with :class:`spatialplan.schedule.SolveProgress` while solving.

    Returns
    -------
    HarvestPlan

    Raises
    ------
    InputError, SettingsError
        Bad inputs or settings.
    InfeasibleError
        The rules admit no plan (``diagnosis`` says which rules conflict).
    NoSolutionError
        No plan was found within ``solver.time_limit_s``.

    Examples
    --------
    >>> from spatialplan.synthetic import synthetic_yield_table, voronoi_forest
    >>> settings = load_settings(None, {
    ...     "economics.price_per_m3": 40.0, "horizon.periods": 3,
    ...     "solver.time_limit_s": 1.0, "solver.workers": 1})
    >>> result = plan(voronoi_forest(12, seed=1), synthetic_yield_table(), settings)
    >>> result.verdict.startswith("passed"), result.npv <= result.lp_bound
    (True, True)
    >>> result.periods["period"].tolist()
    [1, 2, 3]
    """
    from spatialplan.pipeline import plan_layers, solve_plan

    if isinstance(stands, PlanInputs):
        if yields is not None:
            msg = "plan(inputs, ...): the yield table was read with the inputs; leave yields out"
            raise TypeError(msg)
        inputs = _with_settings(stands, settings)
    else:
        inputs = read_inputs(stands, yields, settings)
    bundle, result = solve_plan(inputs, on_progress=on_progress)
    # The same layers pipeline.write_plan writes, built in memory by the same function.
    layers, report = plan_layers(inputs, bundle, result)
    run = layers["run"]
    return HarvestPlan(
        schedule=layers["schedule"],
        openings=layers["openings"],
        periods=layers["periods"],
        strata=layers["strata"],
        run=dict(zip(run["key"], run["value"], strict=True)),
        verify=report,
        result=result,
        inputs=inputs,
        bundle=bundle,
        messages=tuple(inputs.messages + bundle.messages),
        harvests=layers["harvests"],
    )


def write_outputs(result: HarvestPlan, out: str | Path, *, overwrite: bool = False) -> list[Path]:
    """Write a plan as ``spatialplan plan`` does: the GeoPackage and the files beside it.

    The GeoPackage (layers ``schedule``, ``openings``, tables ``periods``, ``strata``,
    ``run``, with styles) and, unless ``output.no_map``, the map, report and charts;
    the period raster with ``output.raster_out``. Every path is checked first: nothing
    replaces an input, nor an earlier output unless ``overwrite``.

    Parameters
    ----------
    result
        From :func:`plan`.
    out
        The GeoPackage (``.gpkg``).
    overwrite
        Replace earlier outputs.

    Returns
    -------
    list of pathlib.Path
        The GeoPackage first, then the other files written.

    Raises
    ------
    OutputError
        A bad or taken output path, or write-back asked for stands that are not a file.
    """
    from spatialplan.output_paths import check_plan_outputs, plan_input_paths
    from spatialplan.pipeline import write_plan

    inputs = result.inputs
    s = inputs.settings
    stands_file = None if str(inputs.stands_path) == STANDS_FRAME else inputs.stands_path
    if s.output.write_back and stands_file is None:
        msg = f"output.write_back needs a stand GeoPackage file, not a {STANDS_FRAME}"
        raise OutputError(msg)
    out = check_plan_outputs(
        out, plan_input_paths(stands_file, inputs.yields_path, s), s, overwrite
    )
    outcome = write_plan(inputs, result.bundle, result.result, out, messages=list(result.messages))
    return [outcome.out_path, *outcome.extra_files]


# ---------------------------------------------------------------------------------------
# verify
# ---------------------------------------------------------------------------------------
def verify_plan(
    plan: HarvestPlan | gpd.GeoDataFrame | str | Path,
    settings: SettingsSource = None,
    yields: YieldsSource | Any = None,
    *,
    harvests: pd.DataFrame | None = None,
) -> Any:
    """Check every rule of a plan, independently of the solver, as ``spatialplan verify``.

    Parameters
    ----------
    plan
        A :class:`HarvestPlan`; a schedule GeoDataFrame (one row per stand with the
        fields of ``settings.fields`` and an integer ``period``, empty or 0 when not
        harvested); or a plan GeoPackage written by ``plan``.
    settings
        The rules to check. Default: the plan's own (a :class:`HarvestPlan`), the ones
        recorded in the GeoPackage, or the defaults for a GeoDataFrame.
    yields
        Yield table for the flow and ending-inventory checks (CSV, DataFrame, or a
        growth model). Default: the plan's own, or the table recorded in the GeoPackage.
    harvests
        A ``harvests`` table (one row per harvest: stand id, ``period`` ...) for a plan
        that cuts stands more than once. Default: the plan's own (a :class:`HarvestPlan`
        or the GeoPackage's ``harvests`` table); for a GeoDataFrame, its ``period``
        column.

    Returns
    -------
    spatialplan.verify.VerifyReport
        ``ok``, ``verdict``, ``violations`` (rule, period, stand ids, size) and notes.

    Examples
    --------
    Three 1 ha squares in a row; A and B, which touch, are cut in period 1 and make a
    2 ha opening, over a 1.5 ha limit:

    >>> import geopandas as gpd, shapely
    >>> from spatialplan.synthetic import synthetic_yield_table
    >>> squares = [shapely.box(100 * i, 0, 100 * (i + 1), 100) for i in range(3)]
    >>> schedule = gpd.GeoDataFrame(
    ...     {"stand_id": ["A", "B", "C"], "age": [80, 80, 80], "stratum": ["S1"] * 3,
    ...      "period": [1, 1, 0]}, geometry=squares, crs="EPSG:32610")
    >>> rules = load_settings(None, {"horizon.periods": 1, "rules.max_opening_ha": 1.5})
    >>> report = verify_plan(schedule, rules, synthetic_yield_table(["S1"]))
    >>> report.ok, [(v.rule, v.period, v.stand_ids) for v in report.violations]
    (False, [('max_opening', 1, ('A', 'B'))])
    """
    from spatialplan.growth import GrowthModel, YieldTable
    from spatialplan.verify import read_harvests, read_plan, verify_schedule

    s = None if settings is None else _settings(settings)
    if isinstance(plan, HarvestPlan):
        s = s or plan.settings
        table = plan.inputs.growth if yields is None else yields
        given = plan.harvests if harvests is None else harvests
        return verify_schedule(plan.schedule, s, _yields(table, s), harvests=given)
    if isinstance(plan, gpd.GeoDataFrame):
        s = s or Settings()
        return verify_schedule(plan, s, _yields(yields, s), harvests=harvests)
    yields_path = yields if isinstance(yields, (str, Path)) else None
    schedule, recorded, table = read_plan(plan, None, yields_path, settings=s)
    if isinstance(yields, (pd.DataFrame, YieldTable, GrowthModel)):
        table = yields
    if recorded is None:  # as the command's note says
        warnings.warn(f"{plan} records no settings; the defaults are used", stacklevel=2)
    rules = recorded or Settings()
    if harvests is None:
        harvests = read_harvests(plan)
    return verify_schedule(schedule, rules, _yields(table, rules), harvests=harvests)


def _yields(yields: Any, settings: Settings) -> Any:
    """A yield table for :func:`verify_schedule` from a path, frame or model."""
    if isinstance(yields, (str, Path, pd.DataFrame)):
        return read_yields(yields, settings)
    return yields


# ---------------------------------------------------------------------------------------
# rotation
# ---------------------------------------------------------------------------------------
def rotation_table(
    yields: str | Path | pd.DataFrame | None = None,
    settings: SettingsSource = None,
    *,
    max_age: int = 300,
) -> pd.DataFrame:
    """Rotation ages and land expectation value of every stratum, as ``spatialplan rotation``.

    Parameters
    ----------
    yields
        Yield-table CSV or DataFrame; ``None`` when every stratum has a Chapman-Richards
        curve in ``[growth]``.
    settings
        :class:`Settings`, a TOML file or ``None``; ``economics`` gives prices, costs and
        the discount rate.
    max_age
        Last age of the 1-year grid searched.

    Returns
    -------
    pandas.DataFrame
        Key columns, ``stratum``, ``mai_max_age``, ``mai_max_m3_ha_yr``,
        ``mai_max_age_exact``, ``value_mai_max_age``, ``fisher_age``, ``faustmann_age``,
        ``lev_per_ha``.

    Examples
    --------
    >>> settings = load_settings(None, {
    ...     "economics.price_per_m3": 35.0, "economics.discount_rate": 0.02,
    ...     "growth.chapman_richards": {"PP": {"A": 600.0, "k": 0.025, "c": 2.8}}})
    >>> row = rotation_table(None, settings, max_age=200).iloc[0]
    >>> row["stratum"], bool(row["faustmann_age"] <= row["fisher_age"])
    ('PP', True)
    """
    from spatialplan import rotation

    s = _settings(settings)
    table = None if yields is None else read_yields(yields, s)
    return rotation.rotation_table(table, s, max_age=max_age)
