"""Helpers shared inside the scenarios package: where a task ran and how it failed.

A task on a Dask worker never raises for a failed plan; it returns its error as a status
word and a message, and the client turns them back into the project's errors where a
caller expects an exception (``plan --by-unit``).
"""

from __future__ import annotations

import os
import socket

from spatialplan.errors import (
    InfeasibleError,
    InputError,
    NoSolutionError,
    OutputError,
    SettingsError,
    SpatialPlanError,
)

# Status word of a failed task per error type (the rest: "failed" or "error").
_STATUS: dict[type[SpatialPlanError], str] = {
    InfeasibleError: "infeasible",
    NoSolutionError: "no_solution",
    InputError: "input_error",
    SettingsError: "settings_error",
    OutputError: "output_error",
}


def where() -> str:
    """``host:pid`` of the process running the task."""
    return f"{socket.gethostname()}:{os.getpid()}"


def status_of(exc: BaseException) -> str:
    """Status word for an error: its type's word, ``failed`` (other project errors) or ``error``."""
    status = _STATUS.get(type(exc))  # type: ignore[arg-type]
    if status is None:
        status = "failed" if isinstance(exc, SpatialPlanError) else "error"
    return status


def error_text(exc: BaseException) -> str:
    """The message of a project error; type and message of anything else (a bug)."""
    return str(exc) if isinstance(exc, SpatialPlanError) else f"{type(exc).__name__}: {exc}"


def diagnosis_of(exc: BaseException) -> list[str]:
    """The diagnosis lines an :class:`InfeasibleError` carries (empty for other errors)."""
    return list(getattr(exc, "diagnosis", []) or [])


def error_for(status: str, message: str, diagnosis: list[str]) -> SpatialPlanError:
    """The project error for a status word (the inverse of :func:`status_of`)."""
    if status == "infeasible":
        return InfeasibleError(message, diagnosis)
    for cls, word in _STATUS.items():
        if word == status and cls is not InfeasibleError:
            return cls(message)
    return SpatialPlanError(message)
