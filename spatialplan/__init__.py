"""spatialplan: spatially feasible multi-period clear-cut harvest scheduling.

The workflow of the ``spatialplan`` commands is available as functions on GeoDataFrames
and DataFrames (see ``docs/python-api.md``)::

    import spatialplan

    settings = spatialplan.load_settings("plan.toml")
    summary = spatialplan.check_inputs("stands.gpkg", "yields.csv", settings)
    result = spatialplan.plan("stands.gpkg", "yields.csv", settings)
    result.schedule  # GeoDataFrame: harvest period of every stand
    spatialplan.write_outputs(result, "plan.gpkg")

The functions live in :mod:`spatialplan.api` and are imported on first use, so
``import spatialplan`` (and the command line) stays fast.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

# The flat API: names of spatialplan.api, loaded on first access (PEP 562).
__all__ = [
    "HarvestPlan",
    "InputSummary",
    "Settings",
    "__version__",
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

if TYPE_CHECKING:
    from spatialplan.api import (
        HarvestPlan,
        InputSummary,
        Settings,
        check_inputs,
        load_settings,
        plan,
        read_inputs,
        read_yields,
        render_review_files,
        rotation_table,
        verify_plan,
        write_outputs,
    )


def __getattr__(name: str) -> Any:
    if name in __all__:
        from spatialplan import api

        value = getattr(api, name)
        globals()[name] = value  # later lookups skip this function
        return value
    msg = f"module 'spatialplan' has no attribute {name!r}"
    raise AttributeError(msg)


def __dir__() -> list[str]:
    return sorted({*globals(), *__all__})
