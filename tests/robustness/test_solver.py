"""Solver outcomes a user can cause: infeasible rules, no plan in time, Ctrl-C."""

from __future__ import annotations

import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pyogrio
import pytest

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
        "No plan was written",
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
        res, 3, "no legal plan found within 0.01 s", "--time-limit", "No plan was written"
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
    assert "Interrupted" in res.output
    assert calls["n"] == 2
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["forest.gpkg", "yields.csv"]


def test_ctrl_c_during_solve_writes_marked_plan_or_nothing(tmp_path: Path) -> None:
    stands = tmp_path / "forest.gpkg"
    voronoi_forest(1500, seed=1).to_file(stands, layer="stands", driver="GPKG")
    yields = tmp_path / "yields.csv"
    synthetic_yield_table().to_csv(yields, index=False)
    out = tmp_path / "plan.gpkg"
    proc = subprocess.Popen(
        [sys.executable, "-m", "spatialplan", "plan", str(stands), "--yields", str(yields),
         "--out", str(out), "--price", "40", "--periods", "5", "--time-limit", "120",
         "--workers", "2", "--no-map"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    time.sleep(6.0)  # reading and the model take ~2 s here; the solve is under way
    proc.send_signal(signal.SIGINT)
    try:
        stdout, stderr = proc.communicate(timeout=30)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.communicate()
        pytest.fail("Ctrl-C was ignored: the solve went on for 30 s after SIGINT")
    assert proc.returncode == 130, stderr[-2000:]
    assert TRACEBACK not in stderr + stdout
    assert "Interrupted" in stderr
    if out.exists():  # the best plan so far, complete and marked
        assert _run_table(out)["solver_status"] == "interrupted"
        assert len(pyogrio.read_dataframe(out, layer="schedule")) == 1500
        res = run_subprocess(["verify", out])
        assert res.returncode == 0, res.stdout[-2000:]
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith(".plan.")]


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
