"""Solver outcomes a user can cause: infeasible rules, no plan in time, Ctrl-C."""

from __future__ import annotations

import os
import pty
import re
import select
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pyogrio
import pytest

from spatialplan import pipeline
from spatialplan.synthetic import synthetic_yield_table, voronoi_forest
from tests.robustness.conftest import TRACEBACK, GuardedCli, assert_user_error, run_subprocess

PLAN = ("--price", "40", "--periods", "3", "--workers", "1", "--no-map")


@pytest.fixture
def forest(tmp_path: Path) -> Path:
    p = tmp_path / "forest.gpkg"
    voronoi_forest(40, seed=2, mean_area_ha=10.0).to_file(p, layer="stands", driver="GPKG")
    return p


def _run_table(path: Path) -> dict[str, str]:
    with sqlite3.connect(path) as con:
        return dict(con.execute("select key, value from run").fetchall())


def test_infeasible_rules_exit_two_with_diagnosis(
    run: GuardedCli, tmp_path: Path, forest: Path, yields: Path
) -> None:
    s = tmp_path / "s.toml"
    s.write_text("[rules]\nperiod_volume_min_m3 = 1e9\n")  # far above any forest's volume
    out = tmp_path / "plan.gpkg"
    out.write_bytes(b"an earlier plan")
    run.guard(forest, yields, s)
    res = run(
        "plan",
        forest,
        "--yields",
        yields,
        "--out",
        out,
        "--overwrite",
        "--settings",
        s,
        *PLAN,
        "--time-limit",
        "5",
    )
    assert_user_error(
        res,
        2,
        "admit no harvest plan",
        "diagnosis:",
        "period volume minimum",
        "no plan was written",
    )
    assert out.read_bytes() == b"an earlier plan"


def test_no_plan_within_time_limit_exit_three(
    run: GuardedCli, tmp_path: Path, forest: Path, yields: Path
) -> None:
    # Zero flow tolerance with a volume floor: the empty plan is illegal and 10 ms is too
    # short for the heuristic or CP-SAT to find a legal one.
    s = tmp_path / "s.toml"
    s.write_text(
        "[rules]\nperiod_volume_min_m3 = 5000\nflow_tolerance = 0.0\nmax_opening_ha = 12\n"
    )
    out = tmp_path / "plan.gpkg"
    run.guard(forest, yields, s)
    res = run(
        "plan",
        forest,
        "--yields",
        yields,
        "--out",
        out,
        "--settings",
        s,
        *PLAN,
        "--time-limit",
        "0.01",
    )
    assert_user_error(
        res, 3, "no legal plan found within 0.01 s", "--time-limit", "no plan was written"
    )
    assert not out.exists()
    assert not list(tmp_path.glob(".plan.*"))  # no temporary left behind


def test_nothing_eligible_is_said(
    run: GuardedCli, tmp_path: Path, forest: Path, yields: Path
) -> None:
    out = tmp_path / "plan.gpkg"
    run.guard(forest, yields)
    res = run(
        "plan",
        forest,
        "--yields",
        yields,
        "--out",
        out,
        *PLAN,
        "--time-limit",
        "5",
        "--min-age",
        "900",
    )
    assert res.exit_code == 0, res.output
    assert "no stand may be harvested in any period" in res.output and "--min-age" in res.output


def test_keyboard_interrupt_while_writing_leaves_no_file(
    run: GuardedCli, tmp_path: Path, forest: Path, yields: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    real = pyogrio.write_dataframe
    calls = {"n": 0}

    def write_then_interrupt(*a: object, **k: object) -> None:
        calls["n"] += 1
        if calls["n"] == 2:  # the schedule layer is written, the next one is not
            raise KeyboardInterrupt
        real(*a, **k)

    monkeypatch.setattr(pyogrio, "write_dataframe", write_then_interrupt)
    out = tmp_path / "plan.gpkg"
    run.guard(forest, yields)
    res = run("plan", forest, "--yields", yields, "--out", out, *PLAN, "--time-limit", "1")
    assert res.exit_code == 130, res.output
    assert "interrupted" in res.output
    assert calls["n"] == 2
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["forest.gpkg", "yields.csv"]


_ANSI = re.compile(r"\x1b\[[0-9;?]*[A-Za-z]")
# The live progress line once the solver holds a plan: "solving  elapsed 6.1 s  best NPV 1,234".
_FIRST_PLAN = re.compile(r"solving\s+elapsed\s+[0-9.]+ s\s+best NPV ([0-9,]+)")


def _read_pty(fd: int, until: float) -> bytes | None:
    """What the child wrote to the terminal: ``None`` for nothing yet, ``b""`` at its end."""
    ready, _, _ = select.select([fd], [], [], max(0.0, min(1.0, until - time.monotonic())))
    if not ready:
        return None
    try:
        return os.read(fd, 65536)
    except OSError:  # EIO: the child closed the terminal
        return b""


def test_ctrl_c_during_solve_writes_plan_marked_interrupted(tmp_path: Path) -> None:
    # 1,500 stands and --stop-gap 0: the solve runs to its 120 s limit unless stopped. The
    # test waits until the terminal shows the solve holding a plan (the progress line a
    # user sees), then presses Ctrl-C: the outcome is fixed, exit 130 and the best plan
    # written, marked interrupted.
    stands = tmp_path / "forest.gpkg"
    voronoi_forest(1500, seed=1).to_file(stands, layer="stands", driver="GPKG")
    yields = tmp_path / "yields.csv"
    synthetic_yield_table().to_csv(yields, index=False)
    out = tmp_path / "plan.gpkg"
    # stderr on a pseudo-terminal so the progress display is drawn as for a user.
    master, slave = pty.openpty()
    # Variables that would tell the console library to ignore the terminal are dropped.
    quiet = {"TTY_COMPATIBLE", "TTY_INTERACTIVE", "FORCE_COLOR"}
    env = {k: v for k, v in os.environ.items() if k not in quiet}
    env.update(TERM="xterm", COLUMNS="200")
    proc = subprocess.Popen(
        [sys.executable, "-m", "spatialplan", "plan", str(stands), "--yields", str(yields),
         "--out", str(out), "--price", "40", "--periods", "5", "--time-limit", "120",
         "--stop-gap", "0", "--workers", "2", "--no-map"],
        stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=slave, env=env, text=True,
    )  # fmt: skip
    os.close(slave)
    seen = b""
    shown_npv = None
    until = time.monotonic() + 300.0  # a guard against a hang, not a measurement
    try:
        while True:
            chunk = _read_pty(master, until)
            if chunk == b"":
                break
            seen += chunk or b""
            if shown_npv is None:
                m = _FIRST_PLAN.search(_ANSI.sub("", seen.decode("utf-8", "replace")))
                if m:
                    shown_npv = float(m.group(1).replace(",", ""))
                    proc.send_signal(signal.SIGINT)
                    until = time.monotonic() + 60.0
            if time.monotonic() >= until:
                break
        try:
            proc.wait(timeout=max(until - time.monotonic(), 5.0))
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
            pytest.fail(
                "no plan was shown before the guard ran out"
                if shown_npv is None
                else "Ctrl-C was ignored: the solve went on for 60 s after SIGINT"
            )
        stdout = proc.stdout.read() if proc.stdout else ""
    finally:
        os.close(master)
        if proc.stdout:
            proc.stdout.close()
    stderr = _ANSI.sub("", seen.decode("utf-8", "replace"))
    assert shown_npv is not None, stderr[-2000:]
    assert proc.returncode == 130, stderr[-2000:]
    assert TRACEBACK not in stderr + stdout
    assert f"warning: interrupted: {out} holds the best plan found before Ctrl-C" in stderr
    assert re.search(r"│ solver status\s+│\s+interrupted │ best plan so far\s+│", stdout), stdout
    # The file holds the whole plan, marked, at least as good as the plan on screen (shown
    # rounded to whole units), and the independent checker passes it.
    run_table = _run_table(out)
    assert run_table["solver_status"] == "interrupted"
    assert float(run_table["npv"]) >= shown_npv - 0.5
    sched = pyogrio.read_dataframe(out, layer="schedule")
    assert len(sched) == 1500
    assert float(run_table["npv"]) == pytest.approx(sched["npv"].sum(), rel=1e-9)
    res = run_subprocess(["verify", out])
    assert res.returncode == 0, res.stdout[-2000:]
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith(".plan.")]


def test_ctrl_c_before_solving_writes_nothing(
    run: GuardedCli, tmp_path: Path, forest: Path, yields: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A real SIGINT while the model is being built, before the solver takes over Ctrl-C:
    # Python's default handler raises KeyboardInterrupt there (set explicitly, as in a
    # user's interpreter; a test runner's worker may have changed it).
    real = pipeline.build_problem
    built = {"n": 0}

    def build_then_ctrl_c(*a: object, **k: object) -> object:
        built["n"] += 1
        os.kill(os.getpid(), signal.SIGINT)
        return real(*a, **k)  # not reached: the signal lands first

    monkeypatch.setattr(pipeline, "build_problem", build_then_ctrl_c)
    previous = signal.signal(signal.SIGINT, signal.default_int_handler)
    out = tmp_path / "plan.gpkg"
    run.guard(forest, yields)
    try:
        res = run("plan", forest, "--yields", yields, "--out", out, *PLAN, "--time-limit", "60")
    finally:
        signal.signal(signal.SIGINT, previous)
    assert built["n"] == 1
    assert res.exit_code == 130, res.output
    assert "warning: interrupted (Ctrl-C); nothing further written" in res.output
    assert "Plan written" not in res.output
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["forest.gpkg", "yields.csv"]


def test_subprocess_infeasible_has_no_traceback(tmp_path: Path, forest: Path, yields: Path) -> None:
    s = tmp_path / "s.toml"
    s.write_text("[rules]\nperiod_area_min_ha = 1e6\n")  # more than the forest's area
    out = tmp_path / "plan.gpkg"
    res = run_subprocess(
        [
            "plan",
            forest,
            "--yields",
            yields,
            "--out",
            out,
            "--settings",
            s,
            *PLAN,
            "--time-limit",
            "5",
        ]
    )
    assert res.returncode == 2, res.stderr
    assert "diagnosis: period area minimum" in res.stderr
    assert TRACEBACK not in res.stderr + res.stdout
    assert not out.exists()
