"""Bad settings: the message names the TOML key, its line and the allowed values."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.robustness.conftest import GuardedCli, assert_user_error

CASES = [
    # (TOML text, pieces the one message must hold)
    (
        "[rules]\nmax_openng_ha = 30\n",
        ["unknown setting 'rules.max_openng_ha'", "line 2", "did you mean 'rules.max_opening_ha'"],
    ),
    (
        "# plan settings\n[rulez]\nmax_opening_ha = 30\n",
        ["unknown setting 'rulez'", "line 2", "did you mean 'rules'"],
    ),
    ("periods = 3\n", ["unknown setting 'periods'", "line 1", "did you mean 'horizon.periods'"]),
    (
        "[growth.chapman_richards.S1]\nA = 500\nkk = 0.03\n",
        ["'growth.chapman_richards.S1.kk'", "line 3", "'growth.chapman_richards.S1.k'"],
    ),
    ('[horizon]\nperiods = "ten"\n', ["'horizon.periods' must be a whole number", "line 2"]),
    ("[horizon]\nperiods = 2.5\n", ["'horizon.periods' must be a whole number", "line 2"]),
    ('[rules]\nnon_declining = "yes"\n', ["'rules.non_declining' must be true or false"]),
    ("rules = 5\n", ["'rules' must be a table", "line 1"]),
    ("[fields]\nyield_keys = 5\n", ["'fields.yield_keys' must be a list", "line 2"]),
    ("[rules]\nmax_opening_ha = nan\n", ["'rules.max_opening_ha' must be a finite number"]),
    ("[solver]\ntime_limit_s = inf\n", ["'solver.time_limit_s' must be a finite number"]),
    (
        "[economics]\ndiscount_rate = -0.02\n",
        ["'economics.discount_rate' = -0.02 is out of range", "line 2", "allowed [0, 1]"],
    ),
    ("[rules]\nflow_tolerance = 1.5\n", ["'rules.flow_tolerance' = 1.5", "allowed [0, 1]"]),
    ("[horizon]\nperiods = 0\n", ["'horizon.periods' = 0 is out of range", "allowed [1, 200]"]),
    ("[horizon]\nperiod_length_yr = 0\n", ["'horizon.period_length_yr'", "allowed (0, 100]"]),
    ("[solver]\ntime_limit_s = 0\n", ["'solver.time_limit_s'", "allowed (0, inf]"]),
    ("[rules]\nmax_opening_ha = -10\n", ["'rules.max_opening_ha'", "out of range"]),
    (
        "\n[rules]\nperiod_volume_min_m3 = 500\nperiod_volume_max_m3 = 100\n",
        [
            "contradictory rules",
            "period_volume_min_m3 = 500",
            "period_volume_max_m3 = 100",
            "line 3",
        ],
    ),
    (
        "[rules]\nperiod_area_min_ha = 50\nperiod_area_max_ha = 10\n",
        ["contradictory rules", "period_area_min_ha", "line 2"],
    ),
    (
        "[rules]\ngreen_up_years = 10\ngreen_up_height_m = 2\n",
        ["contradictory rules", "green_up_years", "green_up_height_m", "not both", "line 3"],
    ),
    (
        '[[terrain.slope_classes]]\nsystem = "cable"\nmax_slope_pct = 80\n'
        '[[terrain.slope_classes]]\nsystem = "ground"\nmax_slope_pct = 35\n',
        ["terrain.slope_classes must be ordered", "line 1"],
    ),
    ("[rules\nmax_opening_ha = 3\n", ["not valid TOML", "line 1"]),
    ("[rules]\nreharvest = true\n", ["'rules.reharvest'", "line 2", "was removed", "max_harvests"]),
    (
        "[economics]\ninclude_ending_value = true\n",
        ["'economics.include_ending_value'", "line 2", 'ending_value = "standing"'],
    ),
    (
        '[economics]\nending_value = "lev"\n',
        ["'economics.ending_value' = 'lev'", "line 2", '"faustmann", "standing", "none"'],
    ),
    (
        "[rules]\nold_forest_age_yr = 80\n",
        ["rules.old_forest_age_yr is set but rules.old_forest_min_share is not", "line 2"],
    ),
    ("[rules]\nmax_harvests = 0\n", ["'rules.max_harvests' = 0 is out of range", "[1, inf]"]),
]


@pytest.mark.parametrize(("toml", "needles"), CASES, ids=[c[1][0][:40] for c in CASES])
def test_bad_settings_file(
    run: GuardedCli, tmp_path: Path, stands: Path, yields: Path, toml: str, needles: list[str]
) -> None:
    s = tmp_path / "plan.toml"
    s.write_text(toml, encoding="utf-8")
    run.guard(stands, yields, s)
    for cmd in ("check", "plan"):
        extra = ["--out", tmp_path / "o.gpkg"] if cmd == "plan" else []
        res = run(cmd, stands, "--yields", yields, "--settings", s, *extra)
        assert_user_error(res, 1, str(s), *needles)
    assert not (tmp_path / "o.gpkg").exists()


def test_settings_file_not_utf8(
    run: GuardedCli, tmp_path: Path, stands: Path, yields: Path
) -> None:
    s = tmp_path / "plan.toml"
    s.write_bytes("[rules]\nmax_opening_ha = 30\n# Förster\n".encode("latin-1"))
    run.guard(stands, yields, s)
    res = run("check", stands, "--yields", yields, "--settings", s)
    assert_user_error(res, 1, str(s), "not UTF-8", "line 3")


@pytest.mark.parametrize(
    ("flag", "value", "needles"),
    [
        ("--periods", "0", ["'horizon.periods' = 0", "allowed [1, 200]", "given as --periods"]),
        ("--period-length", "-5", ["'horizon.period_length_yr'", "given as --period-length"]),
        ("--flow-tolerance", "2", ["'rules.flow_tolerance'", "given as --flow-tolerance"]),
        ("--discount-rate", "-0.1", ["'economics.discount_rate'", "given as --discount-rate"]),
        ("--time-limit", "0", ["'solver.time_limit_s'", "given as --time-limit"]),
        (
            "--max-harvests",
            "0",
            ["'rules.max_harvests' = 0", "[1, inf]", "given as --max-harvests"],
        ),
    ],
)
def test_bad_flag_values_name_the_flag(
    run: GuardedCli,
    tmp_path: Path,
    stands: Path,
    yields: Path,
    flag: str,
    value: str,
    needles: list[str],
) -> None:
    run.guard(stands, yields)
    res = run("plan", stands, "--yields", yields, "--out", tmp_path / "o.gpkg", flag, value)
    assert_user_error(res, 1, *needles)


def test_flag_of_wrong_type_is_bad_input(
    run: GuardedCli, tmp_path: Path, stands: Path, yields: Path
) -> None:
    run.guard(stands, yields)
    res = run("plan", stands, "--yields", yields, "--out", tmp_path / "o.gpkg", "--periods", "x")
    # Exit 1 like any bad input; 2 means the rules admit no plan.
    assert res.exit_code == 1 and "'x' is not a valid integer" in res.output


def test_subprocess_settings_error_has_no_traceback(
    tmp_path: Path, stands: Path, yields: Path
) -> None:
    from tests.robustness.conftest import TRACEBACK, run_subprocess

    s = tmp_path / "plan.toml"
    s.write_text("[rules]\nmax_openng_ha = 30\n")
    res = run_subprocess(
        ["plan", stands, "--yields", yields, "--settings", s, "--out", tmp_path / "o.gpkg"]
    )
    assert res.returncode == 1
    assert res.stderr.count("error:") == 1 and "did you mean 'rules.max_opening_ha'" in res.stderr
    assert TRACEBACK not in res.stderr + res.stdout
