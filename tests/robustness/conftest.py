"""Shared pieces of the bad-input suite: run the real CLI, guard the inputs, judge messages.

Every case goes through :func:`spatialplan.cli.cli` (click's CliRunner, or a subprocess
where stderr must be seen as a user sees it). A user mistake must give a non-zero exit
code and one clear ``error:`` line, never a Python traceback or the "internal error"
message kept for bugs (exit code 70). Input files are fingerprinted with SHA-256 before
each command and compared after it.
"""

from __future__ import annotations

import subprocess
import sys
from collections.abc import Iterator, Sequence
from pathlib import Path

import pytest
from click.testing import CliRunner, Result

from spatialplan.cli import cli
from spatialplan.synthetic import synthetic_yield_table
from tests.conftest import grid_stands, sha256, write_layer

TRACEBACK = "Traceback (most recent call last)"
INTERNAL = "internal error"
# Small, quick solves: the bad-input cases are about messages, not plan quality.
FAST = ("--price", "40", "--periods", "3", "--time-limit", "3", "--workers", "1")


class GuardedCli:
    """Run ``spatialplan`` commands and check that guarded input files never change."""

    def __init__(self) -> None:
        self.digests: dict[Path, str] = {}

    def guard(self, *paths: Path) -> None:
        """Fingerprint files (every file of a Shapefile set) that must stay unchanged."""
        for p in paths:
            p = Path(p)
            group = sorted(p.parent.glob(p.stem + ".*")) if p.suffix.lower() == ".shp" else [p]
            for f in group:
                if f.is_file():
                    self.digests[f] = sha256(f)

    def check_inputs(self) -> None:
        """Assert every guarded file still exists with its original SHA-256."""
        for f, digest in self.digests.items():
            assert f.is_file(), f"input {f} was removed"
            assert sha256(f) == digest, f"input {f} was modified"

    def __call__(self, *args: object) -> Result:
        """Invoke the CLI in-process; assert no traceback, no internal error, inputs intact."""
        res = CliRunner().invoke(cli, [str(a) for a in args])
        self.check_inputs()
        assert TRACEBACK not in res.output, res.output
        assert INTERNAL not in res.output, res.output
        assert res.exit_code != 70, res.output
        # An exception other than a clean exit means click saw an unhandled error.
        if res.exception is not None and not isinstance(res.exception, SystemExit):
            raise AssertionError(f"unhandled {res.exception!r}\n{res.output}")
        return res


@pytest.fixture
def run() -> Iterator[GuardedCli]:
    """A :class:`GuardedCli`; guarded inputs are checked once more at teardown."""
    g = GuardedCli()
    yield g
    g.check_inputs()


def assert_user_error(res: Result, code: int, *needles: str) -> None:
    """A user error: exit ``code``, one ``error:`` message holding every needle."""
    assert res.exit_code == code, res.output
    assert res.output.count("error:") == 1, res.output
    for n in needles:
        assert n in res.output, f"{n!r} not in:\n{res.output}"


def run_subprocess(args: Sequence[object], timeout: float = 300) -> subprocess.CompletedProcess:
    """``python -m spatialplan ARGS`` as a user runs it (stdout and stderr kept apart)."""
    return subprocess.run(
        [sys.executable, "-m", "spatialplan", *map(str, args)],
        capture_output=True, text=True, check=False, timeout=timeout,
    )  # fmt: skip


@pytest.fixture
def yields(tmp_path: Path) -> Path:
    """Yield table for strata S1..S5 (invented Chapman-Richards curves)."""
    p = tmp_path / "yields.csv"
    synthetic_yield_table().to_csv(p, index=False)
    return p


@pytest.fixture
def stands(tmp_path: Path) -> Path:
    """A 4 x 3 grid of 4 ha stands S01..S12 in a one-layer GeoPackage."""
    return write_layer(grid_stands(), tmp_path / "stands.gpkg")
