"""Where outputs may go: checked before any work, so a bad path never costs a solve.

An output must not be an input (inputs are never modified), must not replace an earlier
output unless asked to, and must go into an existing folder the process can write to.
``plan`` (and ``demo``, and :func:`spatialplan.write_outputs`) also need a ``.gpkg`` name
and free room for the raster and the review files written beside the GeoPackage.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from spatialplan.errors import OutputError

__all__ = ["check_output_path", "check_plan_outputs", "plan_input_paths"]


def check_output_path(
    out: str | Path,
    inputs: Iterable[str | Path | None],
    overwrite: bool,
    flag: str = "--out",
) -> None:
    """Refuse an output that is an input, a folder, in a missing or read-only folder,
    or that exists while ``overwrite`` is off.

    Parameters
    ----------
    out
        The output file.
    inputs
        Input files of the run (``None`` entries are skipped).
    overwrite
        Allow replacing an existing output.
    flag
        The option that named ``out``, used in messages.

    Raises
    ------
    OutputError
        Naming the output, the clashing input or the folder.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> with tempfile.TemporaryDirectory() as d:
    ...     stands = Path(d) / "stands.gpkg"
    ...     _ = stands.write_bytes(b"input")
    ...     check_output_path(Path(d) / "plan.gpkg", [stands], overwrite=False)
    ...     check_output_path(stands, [stands], overwrite=True)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    spatialplan.errors.OutputError: output ...stands.gpkg is the same file as input ...
    """
    out = Path(out)
    out_r = out.resolve()
    for p in inputs:
        if p is None:
            continue
        p = Path(p)
        if p.exists() and (p.resolve() == out_r or (out.exists() and os.path.samefile(p, out))):
            msg = f"output {out} is the same file as input {p}; choose another {flag}"
            raise OutputError(msg)
    if out.is_dir():
        msg = f"output {out} is a folder; give a file name such as {out / 'plan.gpkg'}"
        raise OutputError(msg)
    if out.exists() and not overwrite:
        msg = f"output {out} exists; pass --overwrite to replace it"
        raise OutputError(msg)
    parent = out_r.parent
    # A file where a folder should be (plan.txt/out.gpkg): "create it first" would mislead.
    existing = next(a for a in (parent, *parent.parents) if a.exists())
    if not existing.is_dir():
        msg = (
            f"{existing} is a file, not a folder, so {out} cannot be written; choose another {flag}"
        )
        raise OutputError(msg)
    if not parent.is_dir():
        msg = f"output folder {parent} does not exist; create it first"
        raise OutputError(msg)
    # Try it: permission bits say nothing for root, read-only mounts or ACLs.
    try:
        with tempfile.TemporaryFile(dir=parent):
            pass
    except OSError as exc:
        msg = (
            f"output folder {parent} is not writable ({exc.strerror or exc}); choose another {flag}"
        )
        raise OutputError(msg) from None


def plan_input_paths(
    stands: str | Path | None, yields: str | Path | None, settings: Any
) -> list[Path]:
    """The input files of a plan: stand layer, yield table, DEM and streams when given."""
    paths = [Path(p) for p in (stands, yields) if p is not None]
    paths += [Path(p) for p in (settings.terrain.dem, settings.terrain.streams) if p]
    return paths


def check_plan_outputs(
    out: str | Path,
    inputs: Iterable[str | Path | None],
    settings: Any,
    overwrite: bool,
) -> Path:
    """Check every file a plan will write before anything is read or solved.

    The GeoPackage must end in ``.gpkg``; it and the raster (``output.raster_out``) pass
    :func:`check_output_path`; unless ``output.no_map``, the map, report and chart folder
    beside it (:func:`spatialplan.review.review_paths`) must not exist without ``overwrite``.

    Parameters
    ----------
    out
        The plan GeoPackage.
    inputs
        Input files of the run (see :func:`plan_input_paths`).
    settings
        Run settings (the ``output`` section is read).
    overwrite
        Allow replacing earlier outputs.

    Returns
    -------
    pathlib.Path
        ``out`` as a path.

    Raises
    ------
    OutputError
        Naming the file and what to do.
    """
    from spatialplan.review import review_paths

    out = Path(out)
    inputs = [Path(p) for p in inputs if p is not None]
    if out.suffix.lower() != ".gpkg":
        msg = f"--out {out} must be a GeoPackage file name ending in .gpkg, e.g. {out.stem}.gpkg"
        raise OutputError(msg)
    check_output_path(out, inputs, overwrite)
    if settings.output.raster_out:
        check_output_path(
            Path(settings.output.raster_out), [*inputs, out], overwrite, flag="--raster-out"
        )
    if not settings.output.no_map and not overwrite:
        for side in review_paths(out).values():
            if side.exists():
                msg = f"output {side} exists; pass --overwrite to replace it (or --no-map)"
                raise OutputError(msg)
    return out
