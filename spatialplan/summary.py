"""What ``check`` reports about validated inputs: areas, age classes, strata, terrain.

Takes :class:`spatialplan.pipeline.PlanInputs` (read with ``strict=False`` so every
problem is listed) and returns plain numbers and frames; printing is the CLI's job. The
net harvestable area uses :func:`spatialplan.pipeline.stand_areas`, the same per-stand
rules the planning problem is built with, so ``check`` and ``plan`` agree on the land base.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

__all__ = ["InputSummary", "summarise_inputs"]


@dataclass(frozen=True)
class InputSummary:
    """A summary of validated inputs.

    Attributes
    ----------
    stands_path, layer
        Where the stands came from.
    source_crs, working_crs
        CRS of the layer and the projected CRS used for areas and distances.
    n_stands
        Stands kept.
    total_area_ha
        Gross area of all stands.
    reserve_stands
        Stands flagged as reserve in the layer.
    stream_buffer_ha
        Area inside stream buffers (``None`` without streams).
    inoperable_stands
        Stands the terrain rules out (``None`` without a DEM).
    harvestable_net_area_ha
        Net area (of stream buffers) of the stands that are neither reserved nor
        inoperable: the land base the plan can cut.
    age_classes
        ``age_class``, ``area_ha`` (classes ``output.age_class_width_yr`` years wide, as in
        the charts).
    strata
        ``stratum``, ``stands``, ``area_ha``.
    harvest_systems
        ``harvest_system``, ``stands``, ``area_ha``, ``mean_slope_pct`` (``None``
        without a DEM).
    problems
        Every finding about the stand layer (:class:`spatialplan.inventory.Problem`),
        errors first.
    messages
        Notes from the terrain and net-area steps.
    """

    stands_path: Path
    layer: str | None
    source_crs: str
    working_crs: str
    n_stands: int
    total_area_ha: float
    reserve_stands: int
    stream_buffer_ha: float | None
    inoperable_stands: int | None
    harvestable_net_area_ha: float
    age_classes: pd.DataFrame
    strata: pd.DataFrame
    harvest_systems: pd.DataFrame | None
    problems: tuple[Any, ...]
    messages: tuple[str, ...]

    @property
    def errors(self) -> list[Any]:
        """Problems that make the inputs unusable for planning."""
        return [p for p in self.problems if p.severity == "error"]

    @property
    def usable(self) -> bool:
        """True when the inputs can be planned (no errors)."""
        return not self.errors


def summarise_inputs(inputs: Any) -> InputSummary:
    """Summarise validated inputs for ``check``.

    Parameters
    ----------
    inputs
        :class:`spatialplan.pipeline.PlanInputs`, from
        :func:`spatialplan.pipeline.load_inputs` (``strict=False`` keeps the errors as
        problems instead of raising).

    Returns
    -------
    InputSummary
    """
    from spatialplan.inventory import age_class_table
    from spatialplan.pipeline import stand_areas

    inv = inputs.inventory
    st = inv.stands
    areas = stand_areas(inputs)
    total = float(areas.area_ha.sum())
    if len(st):
        ages = age_class_table(st, width_yr=inputs.settings.output.age_class_width_yr)
        strata = (
            st.groupby("stratum")["area_ha"]
            .agg(stands="count", area_ha="sum")
            .reset_index()
            .astype({"stands": int})
        )
    else:
        ages = pd.DataFrame({"age_class": [], "area_ha": []})
        strata = pd.DataFrame({"stratum": [], "stands": [], "area_ha": []})
    systems = None
    if inputs.terrain is not None:
        tf = inputs.terrain.stands.assign(area_ha=areas.area_ha)
        systems = (
            tf.groupby("harvest_system")
            .agg(
                stands=("area_ha", "size"),
                area_ha=("area_ha", "sum"),
                mean_slope_pct=("slope_pct_mean", "mean"),
            )
            .reset_index()
        )
    return InputSummary(
        stands_path=inv.path,
        layer=inv.layer,
        source_crs=inv.source_crs.to_string(),
        working_crs=inv.working_crs.to_string(),
        n_stands=len(st),
        total_area_ha=total,
        reserve_stands=int(st["reserve"].sum()) if len(st) else 0,
        stream_buffer_ha=None if inputs.net is None else total - float(areas.net_area_ha.sum()),
        inoperable_stands=None if inputs.terrain is None else int((~areas.operable).sum()),
        harvestable_net_area_ha=areas.harvestable_net_area_ha,
        age_classes=ages,
        strata=strata,
        harvest_systems=systems,
        problems=tuple(inv.problems),
        messages=tuple(inputs.messages),
    )
