"""Error types raised by spatialplan.

Every user mistake surfaces as a :class:`SpatialPlanError` subclass whose message names
the file, field, setting key or stand ids involved; the CLI prints it without a traceback
and exits with :attr:`SpatialPlanError.exit_code`.
"""

from __future__ import annotations

__all__ = [
    "InfeasibleError",
    "InputError",
    "NoSolutionError",
    "OutputError",
    "SettingsError",
    "SpatialPlanError",
]


class SpatialPlanError(Exception):
    """Root of all errors spatialplan reports to a user."""

    exit_code: int = 1


class InputError(SpatialPlanError, ValueError):
    """A stand layer, yield table, raster or other input cannot be used as given."""


class SettingsError(SpatialPlanError, ValueError):
    """A settings file or flag has an unknown key, wrong type or out-of-range value."""


class OutputError(SpatialPlanError, OSError):
    """An output cannot be written (folder missing, read-only, would overwrite input)."""


class InfeasibleError(SpatialPlanError):
    """The planning rules admit no schedule; ``diagnosis`` says which rules conflict."""

    exit_code = 2

    def __init__(self, msg: str, diagnosis: list[str] | None = None) -> None:
        super().__init__(msg)
        self.diagnosis = diagnosis or []


class NoSolutionError(SpatialPlanError):
    """The solver stopped (time limit, interrupt) before it found any feasible plan."""

    exit_code = 3
