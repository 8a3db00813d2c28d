"""Harvest system and operability of a stand from its shares of area by slope class.

Each :class:`~spatialplan.settings.SlopeClass` is a harvest system that works up to its
``max_slope_pct``; classes are ordered, and slope above the last class is inoperable. A
stand is *inoperable* when more than ``max_inoperable_share`` of its area is above the last
class. Otherwise its system is the lowest class that covers at least ``system_cover_share``
of its area (i.e. the class of the stand's ``system_cover_share`` quantile of slope); when
no class covers that share, the last (steepest) class is used.
"""

from __future__ import annotations

import numpy as np

from spatialplan.errors import SettingsError
from spatialplan.settings import TerrainSettings
from spatialplan.terrain._common import INOPERABLE, UNKNOWN

__all__ = ["INOPERABLE", "UNKNOWN", "check_slope_classes", "harvest_systems"]


def check_slope_classes(settings: TerrainSettings) -> None:
    """Raise :class:`~spatialplan.errors.SettingsError` unless the slope classes are usable."""
    classes = settings.slope_classes
    if not classes:
        msg = "terrain.slope_classes is empty; give at least one harvest system"
        raise SettingsError(msg)
    names = [c.system for c in classes]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        msg = f"terrain.slope_classes: system names must be unique, repeated: {', '.join(dup)}"
        raise SettingsError(msg)
    reserved = [n for n in names if n in (INOPERABLE, UNKNOWN)]
    if reserved:
        msg = f"terrain.slope_classes: '{reserved[0]}' is reserved; choose another system name"
        raise SettingsError(msg)
    ms = [c.max_slope_pct for c in classes]
    if ms != sorted(ms):
        msg = "terrain.slope_classes must be ordered by increasing max_slope_pct"
        raise SettingsError(msg)


def harvest_systems(
    shares: np.ndarray, outside: np.ndarray, settings: TerrainSettings
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Harvest system, its cost and operability of each stand.

    Parameters
    ----------
    shares
        (n, k + 1) share of each stand's area in each of the ``k`` slope classes, and in
        the last column the share steeper than the last class.
    outside
        True for stands without any DEM cell with a slope (their system is ``"unknown"``).
    settings
        ``terrain`` settings (slope classes, ``max_inoperable_share``,
        ``system_cover_share``).

    Returns
    -------
    (numpy.ndarray, numpy.ndarray, numpy.ndarray)
        The system name of each stand (a class's ``system``, ``"inoperable"`` or
        ``"unknown"``), its harvest cost per m3 (NaN: the ``[economics]`` cost applies) and
        a boolean mask of the inoperable stands.

    Examples
    --------
    >>> from spatialplan.settings import SlopeClass
    >>> s = TerrainSettings(slope_classes=(SlopeClass("ground", 35.0), SlopeClass("cable", 80.0)))
    >>> shares = np.array([[0.9, 0.1, 0.0], [0.2, 0.7, 0.1], [0.0, 0.2, 0.8]])
    >>> system, cost, inop = harvest_systems(shares, np.zeros(3, dtype=bool), s)
    >>> system.tolist(), inop.tolist()
    (['ground', 'cable', 'inoperable'], [False, False, True])
    """
    classes = settings.slope_classes
    k = len(classes)
    inoperable = ~outside & (shares[:, k] > settings.max_inoperable_share + 1e-12)
    cum = np.cumsum(shares[:, :k], axis=1)
    covers = cum >= settings.system_cover_share - 1e-9
    first = np.where(covers.any(axis=1), covers.argmax(axis=1), k - 1)
    systems = np.array([c.system for c in classes] + [INOPERABLE, UNKNOWN], dtype=object)
    # A class without a cost (None) gives NaN: the economics cost applies.
    costs = np.array(
        [np.nan if c.harvest_cost_per_m3 is None else c.harvest_cost_per_m3 for c in classes]
        + [np.nan, np.nan]
    )
    which = np.where(outside, k + 1, np.where(inoperable, k, first))
    return systems[which], costs[which], inoperable
