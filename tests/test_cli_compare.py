"""``spatialplan compare`` end to end: embedded local cluster and a separately started
``dask scheduler`` + ``dask worker`` on localhost."""

from __future__ import annotations

import contextlib
import re
import socket
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner

from spatialplan.cli import cli
from spatialplan.synthetic import synthetic_yield_table, voronoi_forest

SCENARIOS = """
[inputs]
stands = "stands.gpkg"
yields = "yields.csv"

[base]
"solver.workers" = 1
"solver.stop_gap" = 0.0
"solver.time_limit_s" = 20
"horizon.periods" = 3
"economics.price_per_m3" = 50.0
"rules.min_age_yr" = 30

[[sweep]]
vary = { "rules.max_opening_ha" = [15, "off"] }
labels = { "rules.max_opening_ha" = "open" }
"""


def _tiny(folder: Path, extra: str = "") -> Path:
    voronoi_forest(20, seed=5, mean_area_ha=8).to_file(
        folder / "stands.gpkg", layer="stands", driver="GPKG"
    )
    synthetic_yield_table().to_csv(folder / "yields.csv", index=False)
    p = folder / "scenarios.toml"
    p.write_text(SCENARIOS + extra, encoding="utf-8")
    return p


def _check_outputs(out: Path, names: list[str]) -> pd.DataFrame:
    table = pd.read_csv(out / "comparison.csv")
    assert table["scenario"].tolist() == names
    png = (out / "comparison.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)
    return table


def test_compare_local_cluster_writes_table_and_chart(tmp_path: Path) -> None:
    p = _tiny(tmp_path)
    out = tmp_path / "cmp"
    r = CliRunner().invoke(cli, ["compare", str(p), "--out", str(out)])
    assert r.exit_code == 0, r.output
    t = _check_outputs(out, ["open15", "openoff"])
    assert (t["status"] == "optimal").all()
    assert (t["verification"] == "passed").all()
    # Plain column names (letters, digits, "_"): what spreadsheets, GIS field names and
    # SQL identifiers accept (common practice, no source).
    assert all(re.fullmatch(r"[a-z][a-z0-9_]*", c) for c in t.columns), list(t.columns)
    # The varied setting under its plain name, with the value each scenario ran with.
    assert t["rules_max_opening_ha"].astype(str).tolist() == ["15.0", "off"]
    # A tighter opening limit cannot raise the optimal NPV (relaxation argument), so its
    # cost against the rule switched off is >= 0.
    t = t.set_index("scenario")
    assert t.loc["open15", "cost_rules_max_opening_ha"] >= 0
    assert t.loc["open15", "ref_rules_max_opening_ha"] == "openoff"
    # The optimum lies between the NPV and the best proven bound, so the lower estimate of
    # the cost of the spatial rules never exceeds the upper one.
    assert (t["cost_spatial_rules_lower"] <= t["cost_spatial_rules_upper"] + 1e-6).all()
    assert {f"volume_m3_p{k}" for k in (1, 2, 3)} <= set(t.columns)
    assert (out / "open15.gpkg").is_file()
    assert (out / "openoff.gpkg").is_file()
    assert not (out / "open15.map.html").exists()  # --no-maps is the default
    # Outputs are not replaced silently.
    r2 = CliRunner().invoke(cli, ["compare", str(p), "--out", str(out)])
    assert r2.exit_code == 1
    assert "--overwrite" in r2.output


def test_compare_failed_scenario_exit_code(tmp_path: Path) -> None:
    p = _tiny(tmp_path, '\n[scenarios.impossible]\n"rules.period_volume_min_m3" = 1e9\n')
    out = tmp_path / "cmp"
    r = CliRunner().invoke(cli, ["compare", str(p), "--out", str(out), "--ship-inputs"])
    assert r.exit_code == 1, r.output
    assert "impossible" in r.output
    assert "infeasible" in r.output
    assert "inputs: shipped" in r.output
    # One message style: lowercase prefixes, "failed:" for a scenario without a plan.
    assert "failed: impossible: infeasible" in r.output
    assert "failed: 1 of 3 scenario(s) did not produce a verified plan: impossible" in r.output
    assert "FAIL" not in r.output and "Error:" not in r.output
    t = _check_outputs(out, ["impossible", "open15", "openoff"]).set_index("scenario")
    assert t.loc["impossible", "status"] == "infeasible"
    assert t.loc["open15", "status"] == "optimal"
    # Verification in words; empty for a scenario without a plan.
    assert t.loc["open15", "verification"] == "passed"
    assert pd.isna(t.loc["impossible", "verification"])


def test_compare_bad_key_names_it(tmp_path: Path) -> None:
    p = _tiny(tmp_path, '\n[scenarios.typo]\n"rules.max_opening" = 30\n')
    r = CliRunner().invoke(cli, ["compare", str(p), "--out", str(tmp_path / "cmp")])
    assert r.exit_code == 1
    assert "rules.max_opening" in r.output
    assert "rules.max_opening_ha" in r.output


def _shown(values: pd.Series) -> list[str]:
    """The console form of a money column: whole numbers with thousands separators; the
    whole column in k (thousand) once its largest value has 7 digits, in M (million)
    from 10 digits (SI prefixes k and M, BIPM SI Brochure, 9th ed., table 7)."""
    top = values.abs().max()
    div, unit = (1e6, " M") if top >= 1e9 else (1e3, " k") if top >= 1e6 else (1.0, "")
    return ["-" if pd.isna(v) else f"{v / div:,.0f}".replace("-0", "0") + unit for v in values]


@pytest.mark.parametrize("columns", [80, 60])
def test_compare_console_never_cuts_a_number(tmp_path: Path, monkeypatch, columns: int) -> None:
    from spatialplan.cli import _common

    # A sweep name makes long scenario names; the price makes NPVs of 7 digits.
    p = _tiny(tmp_path)
    text = p.read_text(encoding="utf-8").replace(
        "[[sweep]]\n", '[[sweep]]\nname = "opening_limit"\n'
    )
    p.write_text(text.replace('price_per_m3" = 50.0', 'price_per_m3" = 80.0'), encoding="utf-8")
    out = tmp_path / "cmp"
    monkeypatch.setenv("COLUMNS", str(columns))  # rich reads the terminal width from it
    _common.console.cache_clear()  # the console is made once per process: make it anew
    try:
        r = CliRunner().invoke(cli, ["compare", str(p), "--out", str(out)])
    finally:
        _common.console.cache_clear()
    assert r.exit_code == 0, r.output
    t = pd.read_csv(out / "comparison.csv")
    assert t["npv"].max() >= 1e6  # the abbreviation is exercised
    assert "…" not in r.output  # rich marks a cut cell with an ellipsis
    table_lines = [ln for ln in r.output.splitlines() if ln[:1] in "┏┃┡│└"]
    assert table_lines
    assert max(len(ln) for ln in table_lines) <= columns
    cells = {c.strip() for ln in table_lines for c in re.split("[┃│]", ln)}
    for v in _shown(t["npv"]):
        assert v in cells, (v, r.output)
    for g in t["gap"]:
        assert f"{100 * g:.2f} %" in cells
    both = _shown(pd.concat([t["cost_spatial_rules_lower"], t["cost_spatial_rules_upper"]]))
    lo, hi = both[: len(t)], both[len(t) :]
    for a, b in zip(lo, hi, strict=True):
        assert (b if a == b else f"{a} – {b}") in cells, (a, b, r.output)
    for v in _shown(t["cost_rules_max_opening_ha"]):
        assert v in cells
    for s in t["scenario"]:
        assert s in cells
    assert {"passed"} <= cells
    # The words beside the numbers: the cost of the spatial rules includes the solver gap.
    assert "cost of spatial rules + solver gap (upper estimate)" in " ".join(r.output.split())
    assert "k = thousand" in r.output


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _worker_joined(distributed: object, addr: str) -> bool:
    with contextlib.suppress(OSError, TimeoutError), distributed.Client(addr, timeout="5s") as c:  # type: ignore[attr-defined]
        c.wait_for_workers(1, timeout=10)
        return True
    return False


def _stop(proc: subprocess.Popen | None) -> None:
    if proc is None or proc.poll() is not None:
        return
    proc.terminate()
    try:
        proc.wait(timeout=15)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(timeout=5)


def test_compare_on_separately_started_scheduler(tmp_path: Path) -> None:
    distributed = pytest.importorskip("distributed")
    p = _tiny(tmp_path)
    port = _free_port()
    addr = f"tcp://127.0.0.1:{port}"
    sched = worker = None
    logs = tmp_path / "dask.log"
    with open(logs, "wb") as log:
        try:
            sched = subprocess.Popen(
                [
                    sys.executable,
                    "-m",
                    "distributed.cli.dask_scheduler",
                    "--host",
                    "127.0.0.1",
                    "--port",
                    str(port),
                    "--no-dashboard",
                ],
                stdout=log,
                stderr=log,
            )
            worker = subprocess.Popen(
                [
                    sys.executable,
                    "-m",
                    "distributed.cli.dask_worker",
                    addr,
                    "--nworkers",
                    "1",
                    "--nthreads",
                    "1",
                    "--no-dashboard",
                    "--host",
                    "127.0.0.1",
                ],
                stdout=log,
                stderr=log,
            )
            deadline = time.monotonic() + 90
            while not _worker_joined(distributed, addr):  # bounded wait for the worker
                assert time.monotonic() < deadline, logs.read_text(errors="replace")
                assert sched.poll() is None, logs.read_text(errors="replace")
                assert worker.poll() is None, logs.read_text(errors="replace")
                time.sleep(0.5)
            out = tmp_path / "cmp"
            r = CliRunner().invoke(cli, ["compare", str(p), "--out", str(out), "--scheduler", addr])
            assert r.exit_code == 0, r.output
            assert "inputs: shared" in r.output  # the worker sees the same files
            t = _check_outputs(out, ["open15", "openoff"])
            assert (t["status"] == "optimal").all()
            # Every scenario ran on the external worker, not in this process.
            import os

            assert all(not str(w).endswith(f":{os.getpid()}") for w in t["worker"])
        finally:
            _stop(worker)
            _stop(sched)


def test_compare_by_unit_cli(tmp_path: Path) -> None:
    # Two units 500 m apart: by-unit planning is exact (no shared rule, no adjacency).
    a = voronoi_forest(10, seed=3, mean_area_ha=8)
    b = voronoi_forest(10, seed=4, mean_area_ha=8)
    b["geometry"] = b.geometry.translate(xoff=float(a.total_bounds[2] - a.total_bounds[0]) + 500)
    a["stand_id"] = "N" + a["stand_id"]
    b["stand_id"] = "S" + b["stand_id"]
    a["block"], b["block"] = "North", "South"
    pd.concat([a, b], ignore_index=True).to_file(
        tmp_path / "stands.gpkg", layer="stands", driver="GPKG"
    )
    synthetic_yield_table().to_csv(tmp_path / "yields.csv", index=False)
    p = tmp_path / "scenarios.toml"
    p.write_text(
        SCENARIOS.replace("[base]\n", '[base]\n"fields.unit_field" = "block"\n')
        + '\n[units.South]\n"rules.flow_tolerance" = 0.3\n',
        encoding="utf-8",
    )
    out = tmp_path / "cmp"
    r = CliRunner().invoke(cli, ["compare", str(p), "--out", str(out), "--by-unit"])
    assert r.exit_code == 0, r.output
    assert "different units" not in r.output
    t = _check_outputs(out, ["open15", "openoff"])
    assert (t["verification"] == "passed").all()
    import geopandas as gpd

    sched = gpd.read_file(out / "open15.gpkg", layer="schedule")
    assert len(sched) == 20  # both units merged into one layer
    run = gpd.read_file(out / "open15.gpkg", layer="run").set_index("key")["value"]
    assert run["planned_by_unit"] == "true"
