"""Settings: TOML loading, validation messages that name key and line, overrides."""

from __future__ import annotations

from pathlib import Path

import pytest

from spatialplan.errors import SettingsError
from spatialplan.settings import Settings, load_settings, settings_from_dict


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
