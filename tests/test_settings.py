"""Settings: TOML loading, validation messages that name key and line, overrides."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pytest

from spatialplan.errors import SettingsError
from spatialplan.settings import (
    Settings,
    SettingsNote,
    apply_overrides,
    flatten_overrides,
    load_settings,
    settings_from_dict,
)


def _toml(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "plan.toml"
    p.write_text(text)
    return p


def test_defaults_match_the_documented_rules() -> None:
    s = Settings()
    # 40 ha maximum opening and 2 five-year periods of green-up, as README.md and
    # docs/methods.md state (40 ha is the coastal cutblock maximum of British Columbia's
    # former Forest Practices Code, from memory); +-10 % flow, 10 periods and a 4 %
    # discount rate (common practice, no source).
    assert s.rules.max_opening_ha == 40.0
    assert s.rules.green_up_periods == 2
    assert s.horizon.periods == 10 and s.horizon.period_length_yr == 5.0
    assert s.rules.flow_tolerance == 0.10
    assert s.economics.discount_rate == 0.04


def test_unknown_key_suggests_nearest_and_line(tmp_path: Path) -> None:
    p = _toml(tmp_path, "[rules]\nmin_age_yr = 40\nmax_openng_ha = 60\n")
    with pytest.raises(
        SettingsError,
        match=r"unknown setting 'rules.max_openng_ha' \(.*line 3\).*did you mean 'rules.max_opening_ha'",
    ):
        load_settings(p)


def test_out_of_range_names_key_line_and_range(tmp_path: Path) -> None:
    p = _toml(tmp_path, "[rules]\nflow_tolerance = 1.5\n")
    with pytest.raises(
        SettingsError, match=r"rules.flow_tolerance' = 1.5 is out of range .*line 2.*\[0, 1\]"
    ):
        load_settings(p)
    p = _toml(tmp_path, "[economics]\ndiscount_rate = -0.02\n")
    with pytest.raises(SettingsError, match="economics.discount_rate"):
        load_settings(p)
    p = _toml(tmp_path, "[horizon]\nperiods = 0\n")
    with pytest.raises(SettingsError, match="horizon.periods"):
        load_settings(p)


def test_wrong_type(tmp_path: Path) -> None:
    p = _toml(tmp_path, '[horizon]\nperiods = "ten"\n')
    with pytest.raises(SettingsError, match="horizon.periods' must be a whole number, got 'ten'"):
        load_settings(p)


def test_contradictory_rules(tmp_path: Path) -> None:
    p = _toml(tmp_path, "[rules]\nperiod_volume_min_m3 = 500\nperiod_volume_max_m3 = 100\n")
    with pytest.raises(SettingsError, match="contradictory rules"):
        load_settings(p)


def test_invalid_toml(tmp_path: Path) -> None:
    p = _toml(tmp_path, "[rules\nmax = 1\n")
    with pytest.raises(SettingsError, match="not valid TOML"):
        load_settings(p)


def test_overrides_and_round_trip(tmp_path: Path) -> None:
    p = _toml(tmp_path, '[fields]\nyield_keys = ["species", "site"]\n[terrain]\ndem = "dem.tif"\n')
    s = load_settings(p, {"rules.max_opening_ha": 60, "solver.seed": None})
    assert s.rules.max_opening_ha == 60.0
    assert s.fields.yield_keys == ("species", "site")
    # Paths in a settings file are relative to the file.
    assert Path(s.terrain.dem) == (tmp_path / "dem.tif").resolve()
    again = settings_from_dict(s.to_dict())
    assert again == s
    with pytest.raises(SettingsError, match="did you mean 'rules.max_opening_ha'"):
        s.with_overrides({"rules.max_openng_ha": 1})


def test_green_up_years_round_up_to_periods() -> None:
    s = Settings().with_overrides({"rules.green_up_years": 6, "horizon.period_length_yr": 5})
    assert s.green_up_periods_effective == 2


# ---------------------------------------------------------------------------------------
# overrides as written in scenario files (moved here from the scenarios package)
# ---------------------------------------------------------------------------------------
def test_flatten_overrides_agrees_with_toml_dotted_keys() -> None:
    import tomllib

    from spatialplan.settings import flatten_overrides

    # TOML v1.0.0, "Keys" and "Table": a [table] header, an unquoted dotted key and
    # nested inline tables define the same nested table (parsed by the stdlib tomllib);
    # a quoted "a.b" is one key that flatten_overrides reads as the same dotted key.
    forms = [
        "[rules]\nmax_opening_ha = 40\n[economics]\nprices = [1, 2]\n",
        "rules.max_opening_ha = 40\neconomics.prices = [1, 2]\n",
        "rules = { max_opening_ha = 40 }\neconomics = { prices = [1, 2] }\n",
        '"rules.max_opening_ha" = 40\n"economics.prices" = [1, 2]\n',
    ]
    want = {"rules.max_opening_ha": 40, "economics.prices": [1, 2]}  # lists stay values
    for text in forms:
        assert flatten_overrides(tomllib.loads(text)) == want, text


def test_apply_overrides_off_switches_optional_rules_only() -> None:
    from spatialplan.settings import OFF, apply_overrides

    base = Settings()
    s = apply_overrides(base, {"rules.max_opening_ha": OFF, "rules.flow_tolerance": 0.2})
    assert s.rules.max_opening_ha is None
    assert s.rules.flow_tolerance == 0.2
    assert base.rules.max_opening_ha == 40.0  # the starting settings are left as they were
    # green_up_periods is a plain int (no "rule off"): the message names the key and "off".
    with pytest.raises(SettingsError, match=r"rules\.green_up_periods.*'off' only switches"):
        apply_overrides(base, {"rules.green_up_periods": OFF})
    with pytest.raises(SettingsError, match=r"unknown setting 'rules\.no_such_rule'"):
        apply_overrides(base, {"rules.no_such_rule": OFF})
    with pytest.raises(SettingsError, match=r"did you mean 'rules\.max_opening_ha'"):
        apply_overrides(base, {"rules.max_openng_ha": 30})


def test_override_paths_resolve_like_settings_file_paths(tmp_path: Path) -> None:
    import os

    from spatialplan.settings import resolve_override_paths

    sub = tmp_path / "scen"
    sub.mkdir()
    ov = {
        "terrain.dem": "../dem.tif",
        "terrain.streams": "off",
        "rules.min_age_yr": 30,
        "output.basemap": "tiles/x.png",  # not a file setting: left alone
    }
    got = resolve_override_paths(ov, sub)
    # Reference: os.path joins and normalises the same relative path.
    assert got["terrain.dem"] == os.path.realpath(os.path.join(sub, "../dem.tif"))
    assert got["terrain.streams"] == "off"
    assert got["rules.min_age_yr"] == 30
    assert got["output.basemap"] == "tiles/x.png"
    assert ov["terrain.dem"] == "../dem.tif"  # input mapping not modified
    # The same relative path in a settings file in that folder resolves to the same file.
    p = sub / "plan.toml"
    p.write_text('[terrain]\ndem = "../dem.tif"\n', encoding="utf-8")
    assert load_settings(p).terrain.dem == got["terrain.dem"]


def test_check_refused_names_key_and_reason() -> None:
    from spatialplan.settings import check_refused

    refused = {"output.write_back": "it would modify the input layer"}
    for off in (None, False, "off"):
        check_refused({"output.write_back": off}, refused, "s.toml [base]")
    check_refused({"rules.min_age_yr": 30}, refused, "s.toml [base]")
    with pytest.raises(
        SettingsError, match=r"s\.toml \[base\]: setting 'output\.write_back'.*modify the input"
    ):
        check_refused({"output.write_back": True}, refused, "s.toml [base]")


# prescriptions, regeneration, ending value, old forest
# ---------------------------------------------------------------------------------------
def test_prescription_settings_defaults_and_overrides(tmp_path: Path) -> None:
    s = Settings()
    assert s.rules.max_harvests is None  # as many as the minimum age allows
    assert s.economics.ending_value == "faustmann"
    assert s.regeneration.delay_yr == 0.0 and s.regeneration.stratum_map == {}
    p = _toml(
        tmp_path,
        "[rules]\nmax_harvests = 2\nold_forest_age_yr = 80\nold_forest_min_share = 0.15\n"
        '[economics]\nending_value = "standing"\n'
        '[regeneration]\ndelay_yr = 2\n[regeneration.stratum_map]\n"DF/2.0" = "DFp/2"\n',
    )
    s = load_settings(p)
    assert s.rules.max_harvests == 2
    assert (s.rules.old_forest_age_yr, s.rules.old_forest_min_share) == (80.0, 0.15)
    assert s.economics.ending_value == "standing"
    assert s.regeneration.delay_yr == 2.0
    assert s.regeneration.stratum_map == {"DF/2.0": "DFp/2"}
    assert settings_from_dict(s.to_dict()) == s
    s2 = s.with_overrides({"rules.max_harvests": 1, "regeneration.stratum_map.PP/1": "PP/2"})
    assert s2.rules.max_harvests == 1 and s2.regeneration.stratum_map["PP/1"] == "PP/2"


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("[rules]\nmax_harvests = 0\n", r"'rules.max_harvests' = 0 is out of range.*line 2"),
        ("[rules]\nmax_harvests = 1.5\n", r"'rules.max_harvests' must be a whole number"),
        (
            '[economics]\nending_value = "Faustmann"\n',
            r"'economics.ending_value' = 'Faustmann' is not allowed.*line 2.*\"faustmann\", "
            r"\"standing\", \"none\"",
        ),
        (
            "[rules]\nold_forest_min_share = 0.2\n",
            r"rules.old_forest_min_share is set but rules.old_forest_age_yr is not.*line 2",
        ),
        ("[rules]\nold_forest_min_share = 1.2\n", r"'rules.old_forest_min_share' = 1.2.*\[0, 1\]"),
        ("[rules]\nold_forest_age_yr = 0\n", r"'rules.old_forest_age_yr' = 0.*\(0, 1000\]"),
        ("[regeneration]\ndelay_yr = -1\n", r"'regeneration.delay_yr' = -1.*\[0, 1000\]"),
        (
            "[regeneration.stratum_map]\nS1 = 2\n",
            r"'regeneration.stratum_map.S1' must be a text string",
        ),
        (
            '[regeneration.stratum_map]\nS1 = ""\n',
            r"'regeneration.stratum_map' maps 'S1' to ''",
        ),
    ],
)
def test_prescription_settings_validation(tmp_path: Path, text: str, pattern: str) -> None:
    with pytest.raises(SettingsError, match=pattern):
        load_settings(_toml(tmp_path, text))


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        (
            "[economics]\ninclude_ending_value = false\n",
            r"'economics.include_ending_value' \(.*line 2\) was removed: use "
            r"economics.ending_value = \"standing\" for true or \"none\" for false",
        ),
        (
            "[economics]\ninclude_land_value = true\n",
            r"'economics.include_land_value' .*was removed: .*Faustmann ending value",
        ),
        ("[rules]\nreharvest = false\n", r"'rules.reharvest' .*was removed: .*rules.max_harvests"),
    ],
)
def test_retired_keys_name_their_replacement(tmp_path: Path, text: str, pattern: str) -> None:
    with pytest.raises(SettingsError, match=pattern):
        load_settings(_toml(tmp_path, text))
    key = pattern.split("'")[1]
    with pytest.raises(SettingsError, match="was removed"):
        Settings().with_overrides({key: True})


def test_settings_recorded_by_an_earlier_version_still_load() -> None:
    # A plan's run table records every key, retired ones included: verify and map must
    # still read it, with the meaning it had.
    old = Settings().to_dict()
    del old["economics"]["ending_value"], old["rules"]["max_harvests"]
    old["economics"].update(include_ending_value=False, include_land_value=False)
    old["rules"]["reharvest"] = False
    s = settings_from_dict(old)
    assert s.economics.ending_value == "none" and s.rules.max_harvests == 1
    old["economics"]["include_ending_value"] = True
    assert settings_from_dict(old).economics.ending_value == "standing"
    old["economics"]["include_land_value"] = True
    assert settings_from_dict(old).economics.ending_value == "faustmann"


def test_new_flags_map_to_settings() -> None:
    from spatialplan.cli._common import settings_from_flags

    s = settings_from_flags(None, {"max_harvests": 1, "ending_value": "none"})
    assert s.rules.max_harvests == 1 and s.economics.ending_value == "none"
    with pytest.raises(SettingsError, match=r"'rules.max_harvests' = 0.*given as --max-harvests"):
        settings_from_flags(None, {"max_harvests": 0})


# ---- renamed keys: read under the new name wherever the old one appears ----------------
def test_renamed_keys_in_a_settings_file_are_read_with_a_note(tmp_path: Path) -> None:
    p = _toml(tmp_path, "[solver]\ngap = 0.02\n[adjacency]\ngap_tolerance_m = 2.0\n")
    with pytest.warns(SettingsNote) as notes:
        s = load_settings(p)
    assert s.solver.stop_gap == 0.02 and s.adjacency.digitising_tolerance_m == 2.0
    text = [str(n.message) for n in notes]
    # Each note names the old key, where it stands and the new key with the value read.
    assert any(
        "'solver.gap'" in t and "line 2" in t and "solver.stop_gap = 0.02" in t for t in text
    )
    assert any("'adjacency.gap_tolerance_m'" in t and "line 4" in t for t in text)
    # The settings record only the new names.
    flat = flatten_overrides(s.to_dict())
    assert "solver.stop_gap" in flat and "solver.gap" not in flat
    assert "adjacency.gap_tolerance_m" not in flat


def test_new_keys_load_without_a_note(tmp_path: Path) -> None:
    p = _toml(tmp_path, "[solver]\nstop_gap = 0.02\n[adjacency]\ndigitising_tolerance_m = 2.0\n")
    with warnings.catch_warnings():
        warnings.simplefilter("error", SettingsNote)  # a note would fail the test
        s = load_settings(p, {"solver.stop_gap": 0.03})
        again = settings_from_dict(s.to_dict())
    assert s.solver.stop_gap == 0.03 and s.adjacency.digitising_tolerance_m == 2.0
    assert again == s


def test_renamed_key_errors_name_the_new_key_and_the_old_line(tmp_path: Path) -> None:
    p = _toml(tmp_path, "[rules]\nmin_age_yr = 40\n[solver]\ngap = 5\n")
    with (
        pytest.warns(SettingsNote),
        pytest.raises(SettingsError, match=r"'solver.stop_gap' = 5.0 is out of range .*line 4"),
    ):
        load_settings(p)
    p = _toml(tmp_path, "[solver]\ngap = 0.1\nstop_gap = 0.2\n")
    with pytest.raises(SettingsError, match=r"'solver.gap' .* old name of 'solver.stop_gap'"):
        load_settings(p)
    with pytest.raises(SettingsError, match="keep only 'adjacency.digitising_tolerance_m'"):
        Settings().with_overrides(
            {"adjacency.gap_tolerance_m": 1.0, "adjacency.digitising_tolerance_m": 2.0}
        )


def test_renamed_keys_as_overrides_and_in_scenario_tables() -> None:
    with pytest.warns(SettingsNote, match="'solver.gap' is now called 'solver.stop_gap'"):
        s = Settings().with_overrides({"solver.gap": 0.0})
    assert s.solver.stop_gap == 0.0
    # A scenario file's nested or quoted dotted keys come out under the new names, so the
    # comparison table's columns carry them too.
    with pytest.warns(SettingsNote):
        flat = flatten_overrides({"adjacency": {"gap_tolerance_m": 3.0}, "solver.gap": 0.01})
    assert flat == {"adjacency.digitising_tolerance_m": 3.0, "solver.stop_gap": 0.01}
    with pytest.warns(SettingsNote):
        s = apply_overrides(Settings(), {"adjacency.gap_tolerance_m": 3.0})
    assert s.adjacency.digitising_tolerance_m == 3.0


def test_scenario_file_with_old_keys(tmp_path: Path) -> None:
    from spatialplan.scenarios import load_scenarios
    from spatialplan.synthetic import synthetic_yield_table, voronoi_forest

    voronoi_forest(6, seed=1).to_file(tmp_path / "stands.gpkg", layer="stands", driver="GPKG")
    synthetic_yield_table().to_csv(tmp_path / "yields.csv", index=False)
    p = tmp_path / "scen.toml"
    p.write_text(
        '[inputs]\nstands = "stands.gpkg"\nyields = "yields.csv"\n'
        '[base]\n"solver.gap" = 0.0\n'
        "[[sweep]]\nvary = { adjacency = { gap_tolerance_m = [0.5, 2.0] } }\n",
        encoding="utf-8",
    )
    with pytest.warns(SettingsNote) as notes:
        scen = load_scenarios(p)
    text = " ".join(str(n.message) for n in notes)
    assert "now called 'solver.stop_gap'" in text
    assert "now called 'adjacency.digitising_tolerance_m'" in text
    tol = [s.settings.adjacency.digitising_tolerance_m for s in scen.scenarios]
    assert tol == [0.5, 2.0]
    assert all(s.settings.solver.stop_gap == 0.0 for s in scen.scenarios)
    assert all(set(s.varied) == {"adjacency.digitising_tolerance_m"} for s in scen.scenarios)


def test_settings_recorded_with_old_keys_still_load() -> None:
    # A plan written before the renames records solver.gap and adjacency.gap_tolerance_m in
    # its run table; verify and map read them as the new keys.
    old = Settings().to_dict()
    old["solver"]["gap"] = old["solver"].pop("stop_gap")
    old["adjacency"]["gap_tolerance_m"] = 1.5
    del old["adjacency"]["digitising_tolerance_m"]
    with pytest.warns(SettingsNote) as notes:
        s = settings_from_dict(old, path="old.gpkg:run.settings_json")
    text = [str(n.message) for n in notes]
    assert any("read as adjacency.digitising_tolerance_m = 1.5" in t for t in text)
    assert any("'solver.gap' (in old.gpkg:run.settings_json)" in t for t in text)
    assert s.adjacency.digitising_tolerance_m == 1.5
    assert s.solver.stop_gap == Settings().solver.stop_gap


# ---- a single price given as a flag or override replaces the price schedule ------------
SCHEDULE_TOML = (
    "[[economics.price_schedule]]\nproduct = 'pulp'\nmin_diameter_cm = 0\nprice_per_m3 = 18\n"
    "[[economics.price_schedule]]\nproduct = 'saw'\nmin_diameter_cm = 25\nprice_per_m3 = 70\n"
)


def test_price_override_replaces_the_schedule(tmp_path: Path) -> None:
    from spatialplan.economics import stumpage_price

    p = _toml(tmp_path, SCHEDULE_TOML)
    d = np.array([5.0, 24.9, 25.0, 60.0])
    # The file alone prices by diameter class (docs/methods.md: the class with the
    # highest threshold not above the diameter).
    assert stumpage_price(d, load_settings(p).economics).tolist() == [18.0, 18.0, 70.0, 70.0]
    with pytest.warns(SettingsNote, match=r"price_per_m3 = 50 replaces the price schedule"):
        s = load_settings(p, {"economics.price_per_m3": 50.0})
    assert s.economics.price_schedule == ()
    assert stumpage_price(d, s.economics).tolist() == [50.0] * 4


def test_price_in_the_file_stays_the_fallback_of_its_schedule(tmp_path: Path) -> None:
    p = _toml(tmp_path, "[economics]\nprice_per_m3 = 30\n" + SCHEDULE_TOML)
    with warnings.catch_warnings():
        warnings.simplefilter("error", SettingsNote)
        s = load_settings(p)
        both = Settings().with_overrides(
            {
                "economics.price_per_m3": 30.0,
                "economics.price_schedule": s.to_dict()["economics"]["price_schedule"],
            }
        )
    assert len(s.economics.price_schedule) == 2 and s.economics.price_per_m3 == 30.0
    assert both.economics == s.economics


def test_price_flag_replaces_the_schedule_end_to_end(tmp_path: Path) -> None:
    # `rotation --price 50` with a settings file holding a schedule gives the same table
    # as --price 50 without any schedule, and says so.
    from click.testing import CliRunner

    from spatialplan.cli import cli
    from spatialplan.synthetic import synthetic_yield_table

    yields = tmp_path / "y.csv"
    synthetic_yield_table().to_csv(yields, index=False)
    with_schedule = _toml(tmp_path, SCHEDULE_TOML)
    base = ["rotation", "--yields", str(yields), "--price", "50", "--no-charts"]
    a = CliRunner().invoke(
        cli, [*base, "--settings", str(with_schedule), "--out", str(tmp_path / "a.csv")]
    )
    b = CliRunner().invoke(cli, [*base, "--out", str(tmp_path / "b.csv")])
    assert a.exit_code == 0 and b.exit_code == 0, a.output + b.output
    assert "note: economics.price_per_m3 = 50 replaces the price schedule" in a.output
    assert "price schedule" not in b.output
    assert (tmp_path / "a.csv").read_text() == (tmp_path / "b.csv").read_text()


# ---- renamed flags ---------------------------------------------------------------------
def test_renamed_flags_still_work_with_a_note_and_are_hidden() -> None:
    import click
    from click.testing import CliRunner

    from spatialplan.cli import cli
    from spatialplan.cli._common import settings_from_flags

    s = settings_from_flags(None, {"gap": 0.0, "gap_tolerance": 2.0})
    assert s.solver.stop_gap == 0.0 and s.adjacency.digitising_tolerance_m == 2.0
    with pytest.raises(click.UsageError, match="--gap is the old name of --stop-gap"):
        settings_from_flags(None, {"gap": 0.0, "stop_gap": 0.1})
    helptext = " ".join(CliRunner().invoke(cli, ["plan", "--help"]).output.split())
    assert "--stop-gap" in helptext and "--digitising-tolerance" in helptext
    assert "--gap " not in helptext and "--gap-tolerance" not in helptext
    assert "replaces a price schedule" in helptext  # what --price does to a schedule


def test_off_switches_optional_rules_off_in_files_and_flags(tmp_path: Path) -> None:
    # TOML has no null: "off" switches an optional rule off, as in scenario files; a rule
    # that cannot be off (minimum age) names the key.
    p = _toml(tmp_path, '[rules]\nflow_tolerance = "off"\nmax_opening_ha = "Off"\n')
    s = load_settings(p)
    assert s.rules.flow_tolerance is None and s.rules.max_opening_ha is None
    with pytest.raises(SettingsError, match=r"rules\.min_age_yr"):
        load_settings(_toml(tmp_path, '[rules]\nmin_age_yr = "off"\n'))
    from click.testing import CliRunner

    from spatialplan.cli import cli

    res = CliRunner().invoke(cli, ["plan", "x.gpkg", "--out", "y.gpkg", "--flow-tolerance", "lots"])
    assert res.exit_code != 0 and "is not a number or 'off'" in res.output, res.output
    from spatialplan.cli._common import settings_from_flags

    kw = {"flow_tolerance": "off", "max_opening": 25.0}
    s = settings_from_flags(None, kw)
    assert s.rules.flow_tolerance is None and s.rules.max_opening_ha == 25.0
