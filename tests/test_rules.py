"""Rules as arrays: green-up delay, initial openness, eligibility."""

from __future__ import annotations

import math

import numpy as np
import pytest

from spatialplan.errors import SettingsError
from spatialplan.rules import (
    eligible_matrix,
    green_up_periods_for_stands,
    initially_open,
    rule_summary,
)
from spatialplan.settings import settings_from_dict

STRATA = np.array(["S1", "S2", "S1"], dtype=object)


def test_green_up_periods_default() -> None:
    s = settings_from_dict({})
    g, msgs = green_up_periods_for_stands(STRATA, s)
    # Default of 2 five-year periods (common practice, no single source): longer than
    # Oregon's 48 months after planting (ORS 527.740, from memory) and the 3 years of the
    # certification rule in Boston & Bettinger 2001, For. Ecol. Manage. 145:191-202
    assert g.tolist() == [2, 2, 2]
    assert msgs == []


@pytest.mark.parametrize(
    ("years", "length", "expected"),
    # ceil(years / L): 48 months = 4 years (ORS 527.740 green-up) in 5-year periods is 1;
    # 7 years in 5-year periods is 2; 10 years is exactly 2; 3 years in 1-year periods is 3
    [(4.0, 5.0, 1), (7.0, 5.0, 2), (10.0, 5.0, 2), (3.0, 1.0, 3)],
)
def test_green_up_years_rounded_up(years: float, length: float, expected: int) -> None:
    s = settings_from_dict(
        {"rules": {"green_up_years": years}, "horizon": {"period_length_yr": length}}
    )
    g, msgs = green_up_periods_for_stands(STRATA, s)
    assert g.tolist() == [expected] * 3
    assert expected == math.ceil(years / length)
    if years % length:
        assert any("rounded up" in m for m in msgs)


def test_green_up_by_height_chapman_richards() -> None:
    # Chapman-Richards height h(t) = A (1 - exp(-k t))^c (Richards 1959) inverted in
    # closed form: t* = -ln(1 - (h / A)^(1 / c)) / k; green-up is the first k L >= t*.
    curves = {"S1": {"A": 30.0, "k": 0.05, "c": 1.3}, "S2": {"A": 20.0, "k": 0.02, "c": 1.1}}
    s = settings_from_dict(
        {
            "rules": {"green_up_height_m": 3.0},
            "horizon": {"period_length_yr": 5.0},
            "growth": {"height_chapman_richards": curves},
        }
    )
    g, msgs = green_up_periods_for_stands(STRATA, s)
    exp = {}
    for lab, c in curves.items():
        t_star = -math.log(1 - (3.0 / c["A"]) ** (1 / c["c"])) / c["k"]
        exp[lab] = math.ceil(t_star / 5.0)
    assert g.tolist() == [exp["S1"], exp["S2"], exp["S1"]]
    assert exp["S1"] != exp["S2"]
    assert any("green-up by height" in m for m in msgs)


def test_green_up_by_height_table() -> None:
    # linear interpolation between tabulated heights, 0 m at age 0 assumed (common
    # practice, no source):
    # heights 1 m at 5, 2 m at 10, 4 m at 15 -> 1.4 m (the height in Boston & Bettinger
    # 2001) is first reached at the 10-year mid-period age -> 2 periods of 5 years
    s = settings_from_dict(
        {
            "rules": {"green_up_height_m": 1.4},
            "growth": {
                "height_by_age": {
                    "S1": {"ages": [5, 10, 15], "values": [1, 2, 4]},
                    "S2": {"ages": [5, 10], "values": [1.5, 3]},
                }
            },
        }
    )
    g, _ = green_up_periods_for_stands(STRATA, s)
    assert g.tolist() == [2, 1, 2]


def test_green_up_by_height_missing_curve_names_stratum() -> None:
    s = settings_from_dict(
        {
            "rules": {"green_up_height_m": 1.4},
            "growth": {"height_by_age": {"S1": {"ages": [5, 10], "values": [1, 2]}}},
        }
    )
    with pytest.raises(SettingsError, match="S2"):
        green_up_periods_for_stands(STRATA, s)
    s2 = settings_from_dict({"rules": {"green_up_height_m": 1.4}})
    with pytest.raises(SettingsError, match="height curves"):
        green_up_periods_for_stands(STRATA, s2)


def test_initially_open_hand_example() -> None:
    # open while age + (p - 0.5) L < G L (common practice, no source): G = 2, L = 5 ->
    # threshold 10 years; mid-period ages for age 1: 3.5, 8.5, 13.5; age 4: 6.5, 11.5
    ages = np.array([1.0, 4.0, 8.0, 12.0])
    got = initially_open(ages, 2, 3, 5.0)
    exp = np.array(
        [[True, True, False], [True, False, False], [False, False, False], [False, False, False]]
    )
    np.testing.assert_array_equal(got, exp)
    # per-stand delays: G = 0 is never open, G = 3 keeps age 4 open in period 2 (11.5 < 15)
    got = initially_open(ages, np.array([0, 3, 3, 3]), 3, 5.0)
    assert not got[0].any()
    assert got[1].tolist() == [True, True, False]


def test_eligible_matrix_hand_example() -> None:
    ages = np.array([37.5, 30.0, 60.0, 60.0])
    reserve = np.array([False, False, True, False])
    operable = np.array([True, True, True, False])
    got = eligible_matrix(ages, reserve, 40.0, 3, 5.0, operable)
    # mid-period ages: 40, 45, 50 (exactly 40 is old enough); 32.5, 37.5, 42.5
    exp = np.array(
        [[True, True, True], [False, False, True], [False, False, False], [False, False, False]]
    )
    np.testing.assert_array_equal(got, exp)
    per_period = np.ones((4, 3), bool)
    per_period[0, 1] = False
    assert not eligible_matrix(ages, None, 0.0, 3, 5.0, per_period)[0, 1]


def test_rule_summary_lists_rules_in_force() -> None:
    # 48.6 ha = 120 acres, Oregon's clearcut limit (ORS 527.740, from memory)
    s = settings_from_dict({"rules": {"max_opening_ha": 48.6, "unit_restriction": True}})
    text = "\n".join(rule_summary(s))
    assert "48.6 ha" in text
    assert "unit restriction" in text
    assert "10%" in text
    assert "green-up 2 period(s)" in text
