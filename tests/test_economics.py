"""Tests of spatialplan.economics: discounting, prices, harvest values, rotation rules."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import numpy_financial as npf
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import brentq

from spatialplan.economics import (
    LTSY_COLUMNS,
    discount_factor,
    ending_value_per_ha,
    faustmann_rotation,
    fisher_rotation,
    harvest_cost_per_stand,
    harvest_values,
    land_expectation_values,
    lev,
    long_term_sustained_yield,
    mid_period_times,
    net_value_per_ha,
    npv,
    rotation_curves,
    rotation_table,
    stumpage_price,
    value_mai_rotation,
)
from spatialplan.errors import InputError, SettingsError
from spatialplan.growth import (
    build_growth_model,
    chapman_richards,
    cr_mai_culmination_age,
    yield_table_from_frame,
)
from spatialplan.settings import (
    ChapmanRichards,
    Economics,
    GrowthSettings,
    Horizon,
    PriceClass,
    Regeneration,
    Settings,
)
from spatialplan.synthetic import synthetic_yield_table

CR = ChapmanRichards(A=550.0, k=0.035, c=3.2)  # an invented curve with a clear MAI peak


def _cr_model():
    return build_growth_model(None, GrowthSettings(chapman_richards={"X": CR}), ["stratum"])


def _table_model():
    tab = yield_table_from_frame(synthetic_yield_table(), ["stratum"])
    return build_growth_model(tab, GrowthSettings(), ["stratum"])


def _settings(**econ):
    return Settings(economics=Economics(**econ), horizon=Horizon(periods=6, period_length_yr=5))


# ---------------------------------------------------------------------------------------
# discounting
# ---------------------------------------------------------------------------------------
def test_npv_numpy_financial_documentation_example():
    # numpy-financial documentation: npv(0.08, [-40000, 5000, 8000, 12000, 30000])
    # = 3065.22267 (first flow at t = 0, undiscounted).
    flows = [-40_000, 5_000, 8_000, 12_000, 30_000]
    assert npv(flows, 0.08) == pytest.approx(3065.22267, abs=1e-5)
    assert npv(flows, 0.08) == pytest.approx(npf.npv(0.08, flows), rel=1e-13)


@settings(max_examples=60, deadline=None)
@given(
    st.floats(0.0, 0.3),
    st.lists(st.floats(-1e5, 1e5, allow_nan=False), min_size=1, max_size=25),
)
def test_npv_equals_numpy_financial(rate, flows):
    # Reference library: numpy_financial.npv.
    assert npv(flows, rate) == pytest.approx(float(npf.npv(rate, flows)), rel=1e-10, abs=1e-6)


def test_mid_period_times_and_discount():
    # Timing convention: harvest at mid-period t = (p - 0.5) L (common practice in
    # harvest-scheduling models, no single source); discount (1 + r)^-t (annual compounding).
    t = mid_period_times(4, 10.0)
    assert t.tolist() == [5.0, 15.0, 25.0, 35.0]
    assert mid_period_times(np.array([2, 3]), 5.0).tolist() == [7.5, 12.5]
    # (1 + r)^-t equals the present value of 1 by numpy_financial.pv (reference library)
    for ti in (5.0, 15.0):
        assert float(discount_factor(ti, 0.04)) == pytest.approx(-npf.pv(0.04, ti, 0, 1), rel=1e-13)


# ---------------------------------------------------------------------------------------
# prices and costs
# ---------------------------------------------------------------------------------------
SCHEDULE = (
    PriceClass("sawlog_large", 40.0, 95.0),
    PriceClass("pulp", 8.0, 22.0),  # deliberately unsorted
    PriceClass("sawlog_small", 20.0, 60.0),
)


def test_price_schedule_by_diameter():
    # Product classes keyed on mean diameter (common practice, no source): the highest
    # class whose minimum diameter is not above the stand's diameter.
    e = Economics(price_per_m3=30.0, price_schedule=SCHEDULE)
    d = np.array([5.0, 8.0, 19.99, 20.0, 39.0, 40.0, 80.0, np.nan])
    assert stumpage_price(d, e).tolist() == [0.0, 22.0, 22.0, 60.0, 60.0, 95.0, 95.0, 30.0]
    assert stumpage_price(d, Economics(price_per_m3=41.0)).tolist() == [41.0] * 8


def test_price_missing_raises_settings_error():
    with pytest.raises(SettingsError, match=r"economics\.price_per_m3"):
        stumpage_price(np.array([10.0]), Economics())
    with pytest.raises(SettingsError, match=r"economics\.price_per_m3"):
        stumpage_price(np.array([np.nan]), Economics(price_schedule=SCHEDULE))


def test_harvest_cost_precedence_and_unknown_class():
    e = Economics(harvest_cost_per_m3=10.0, harvest_cost_by_class={"steep": 25.0, "flat": 8.0})
    cls = np.array(["steep", None, "flat", "", "steep"], dtype=object)
    over = np.array([np.nan, np.nan, np.nan, np.nan, 40.0])
    assert harvest_cost_per_stand(5, e, None, cls).tolist() == [25.0, 10.0, 8.0, 10.0, 25.0]
    assert harvest_cost_per_stand(5, e, over, cls).tolist() == [25.0, 10.0, 8.0, 10.0, 40.0]
    with pytest.raises(InputError, match=r"'swamp'.*valid classes: flat, steep"):
        harvest_cost_per_stand(2, e, None, np.array(["flat", "swamp"], dtype=object))


# ---------------------------------------------------------------------------------------
# Faustmann LEV
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("S", "T", "r", "C", "a"),
    [
        (12_000.0, 60, 0.03, 1_500.0, 0.0),
        (30_000.0, 45, 0.05, 2_000.0, 15.0),
        (5_000.0, 90, 0.02, 0.0, 5.0),
    ],
)
def test_lev_closed_form_and_truncated_series(S, T, r, C, a):
    # Faustmann (1849): bare land worth the sum over rotations j = 0, 1, ... of
    # (-C + S (1+r)^-T) (1+r)^-(jT), minus annual costs a paid at the end of every year.
    # Independent check: sum the series explicitly, truncated far out (error < 1e-9).
    rot = sum((-C + S * (1 + r) ** -T) * (1 + r) ** (-j * T) for j in range(2000))
    ann = sum(a * (1 + r) ** -t for t in range(1, 20_000))
    closed = (S - C * (1 + r) ** T) / ((1 + r) ** T - 1) - a / r
    assert float(lev(S, T, r, C, a)) == pytest.approx(closed, rel=1e-12)
    assert float(lev(S, T, r, C, a)) == pytest.approx(rot - ann, rel=1e-9, abs=1e-6)


@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.floats(0, 1e5, allow_nan=False), min_size=1, max_size=12),
    st.floats(0.005, 0.15),
    st.floats(0, 5000),
    st.floats(0, 50),
)
def test_lev_vectorised_equals_scalar(values, r, C, a):
    # Scalar closed form of Faustmann (1849), evaluated one rotation length at a time.
    T = np.arange(1, len(values) + 1, dtype=float) * 7.0
    vec = lev(np.array(values), T, r, C, a)
    for s, t, v in zip(values, T, vec, strict=True):
        g = (1 + r) ** t
        assert v == pytest.approx((s - C * g) / (g - 1) - a / r, rel=1e-9, abs=1e-6)


def test_lev_needs_positive_rate():
    with pytest.raises(SettingsError, match="discount_rate"):
        lev(1.0, 10.0, 0.0)


@pytest.mark.parametrize("r", [0.01, 0.02, 0.04, 0.07])
@pytest.mark.parametrize("C", [0.0, 1500.0])
def test_faustmann_shorter_than_fisher_when_lev_positive(r, C):
    # Faustmann-Pressler-Ohlin: the optimal rotation with positive land value is shorter
    # than the single-rotation (Fisher 1930) age (Samuelson 1976, Economic Inquiry 14:466-492).
    g = _cr_model()
    rc = rotation_curves(
        g, "X", _settings(discount_rate=r, price_per_m3=40.0, regeneration_cost_per_ha=C)
    )
    if (r, C) == (0.07, 1500.0):
        # a negative land value reverses the order (same condition: the threshold
        # r (1 + LEV/S) is then below r)
        assert rc.lev_per_ha < 0
        assert rc.faustmann_age > rc.fisher_age
    else:
        assert rc.lev_per_ha > 0
        assert rc.faustmann_age < rc.fisher_age


def test_faustmann_first_order_condition_brentq():
    # Independent check of the grid search: with constant price p and C = 0, dLEV/dT = 0 gives
    # S'(T) ((1+r)^T - 1) = S(T) ln(1+r) (1+r)^T (Faustmann-Pressler-Ohlin condition under
    # annual compounding; derivation). Solved with scipy.optimize.brentq.
    r, p = 0.03, 40.0
    g = _cr_model()
    rc = rotation_curves(g, "X", _settings(discount_rate=r, price_per_m3=p))

    def foc(T):
        V = p * CR.A * (1 - math.exp(-CR.k * T)) ** CR.c
        dV = p * CR.A * CR.c * CR.k * math.exp(-CR.k * T) * (1 - math.exp(-CR.k * T)) ** (CR.c - 1)
        return dV * ((1 + r) ** T - 1) - V * math.log(1 + r) * (1 + r) ** T

    t_star = brentq(foc, 5, 200)
    assert abs(rc.faustmann_age - t_star) <= 1.0
    # Fisher rule: value growth rate S'(T)/S(T) = ln(1+r) (derivation), also with brentq
    t_fisher = brentq(
        lambda T: CR.c * CR.k * math.exp(-CR.k * T) / (1 - math.exp(-CR.k * T)) - math.log(1 + r),
        1,
        300,
    )
    assert abs(rc.fisher_age - t_fisher) <= 1.0


def test_faustmann_tends_to_max_mai_as_rate_to_zero():
    # Samuelson (1976, Economic Inquiry 14:466-492): with C = 0 and constant price, the
    # Faustmann rotation tends to the maximum-MAI rotation as r -> 0.
    g = _cr_model()
    exact = cr_mai_culmination_age(CR.k, CR.c)
    ages = []
    for r in (0.03, 0.01, 1e-3, 1e-5):
        rc = rotation_curves(g, "X", _settings(discount_rate=r, price_per_m3=40.0))
        ages.append(rc.faustmann_age)
    assert ages == sorted(ages)  # lengthens as r falls
    assert abs(ages[-1] - exact) <= 0.5 + 1e-9  # grid age next to the exact culmination
    assert ages[-1] == rc.mai_max_age
    # the same on a tabulated stratum (piecewise linear): equal grid ages
    t = _table_model()
    for s in ("S1", "S4"):
        rc = rotation_curves(t, s, _settings(discount_rate=1e-6, price_per_m3=40.0))
        assert rc.faustmann_age == rc.mai_max_age


def test_rotation_rules_on_brute_force_grid():
    # Each rule recomputed by brute force from its definition (Fisher 1930 single rotation:
    # max S(T)(1+r)^-T; Faustmann 1849: max LEV; forest rent: max (S - C)/T; MAI: max V/T).
    g = _table_model()
    st_ = _settings(
        discount_rate=0.035,
        price_per_m3=50.0,
        harvest_cost_per_m3=12.0,
        regeneration_cost_per_ha=900.0,
        annual_cost_per_ha=8.0,
    )
    ages = np.arange(1, 301, dtype=float)
    df = rotation_table(g, ["S2", "S5"], st_)
    assert list(df.columns) == [
        "stratum",
        "mai_max_age",
        "mai_max_m3_ha_yr",
        "mai_max_age_exact",
        "value_mai_max_age",
        "fisher_age",
        "faustmann_age",
        "lev_per_ha",
    ]
    for row in df.itertuples(index=False):
        vol = g.volume(np.full(300, row.stratum, dtype=object), ages)
        S = (50.0 - 12.0) * vol
        levs = [(S[i] - 900 * 1.035**t) / (1.035**t - 1) - 8 / 0.035 for i, t in enumerate(ages)]
        assert row.faustmann_age == ages[int(np.argmax(levs))]
        assert row.lev_per_ha == pytest.approx(max(levs), rel=1e-12)
        assert row.fisher_age == ages[int(np.argmax(S * 1.035**-ages))]
        assert row.value_mai_max_age == ages[int(np.argmax((S - 900) / ages))]
        assert row.mai_max_age == ages[int(np.argmax(vol / ages))]
        assert math.isnan(row.mai_max_age_exact)
        # Fisher: value growth is above r before and not above r at the age (discrete rule)
        i = int(row.fisher_age) - 1
        assert S[i + 1] / S[i] - 1 <= 0.035 <= S[i] / S[i - 1] - 1


def test_rules_without_positive_value_and_zero_rate():
    ages = np.arange(1, 50, dtype=float)
    assert math.isnan(fisher_rotation(np.zeros(49), ages, 0.03))
    assert math.isnan(value_mai_rotation(-np.ones(49), ages))
    age, val = faustmann_rotation(np.full(49, 100.0), ages, 0.0, 0.0)
    assert age == 1.0  # limit rule max (S - C)/T picks the shortest age for a flat value
    assert math.isnan(val)


def test_key_columns_in_rotation_table(tmp_path):
    df = pd.DataFrame(
        {"sp": ["DF"] * 3, "site": ["2"] * 3, "age": [20, 40, 60], "volume": [100, 300, 400]}
    )
    tab = yield_table_from_frame(df, ["sp", "site"])
    g = build_growth_model(tab, GrowthSettings(), ["sp", "site"])
    out = rotation_table(g, g.strata, _settings(price_per_m3=30.0), max_age=120)
    assert out[["sp", "site", "stratum"]].values.tolist() == [["DF", "2", "DF/2"]]
    # MAI of the piecewise-linear table peaks at the tabulated age 40 (300/40 = 7.5)
    assert out.loc[0, "mai_max_age"] == 40
    assert out.loc[0, "mai_max_m3_ha_yr"] == pytest.approx(7.5)


# ---------------------------------------------------------------------------------------
# harvest values for the scheduler
# ---------------------------------------------------------------------------------------
def test_harvest_values_single_price_exact_npv():
    # npv = V(age0 + t) p (1+r)^-t with t = (p - 0.5) L (mid-period harvest: common practice
    # in harvest-scheduling models, no source; annual compounding as numpy_financial.npv);
    # must hold exactly with one price and no costs.
    g = _table_model()
    st_ = _settings(discount_rate=0.04, price_per_m3=45.0)
    strata = np.array(["S1", "S3", "S5", "S3"], dtype=object)
    a0 = np.array([0.0, 35.0, 90.0, 140.0])
    hv = harvest_values(strata, a0, g, st_)
    P, L = 6, 5.0
    assert hv.npv_per_ha.shape == (4, P)
    for p in range(1, P + 1):
        t = (p - 0.5) * L
        vol = g.volume(strata, a0 + t)
        assert np.array_equal(hv.volume_m3_ha[:, p - 1], vol)
        assert np.array_equal(hv.npv_per_ha[:, p - 1], vol * 45.0 * (1.04) ** -((p - 0.5) * L))
    assert np.array_equal(hv.harvest_age_yr, a0[:, None] + (np.arange(1, P + 1) - 0.5) * L)
    # ending layout: column 0 = not harvested, column p = regrown since mid-period p
    assert hv.ending_age_yr[:, 0].tolist() == (a0 + P * L).tolist()
    assert hv.ending_age_yr[0, 1:].tolist() == [27.5, 22.5, 17.5, 12.5, 7.5, 2.5]
    assert np.array_equal(hv.ending_volume_m3_ha, g.volume(strata, hv.ending_age_yr))
    assert np.array_equal(hv.ending_value_per_ha, hv.ending_volume_m3_ha * 45.0)
    assert hv.ending_discount == pytest.approx(1.04**-30)
    assert hv.annual_cost_pv_per_ha == 0.0


def test_harvest_values_costs_and_schedule():
    g = _table_model()  # synthetic table has a diameter column
    st_ = _settings(
        discount_rate=0.03,
        price_schedule=SCHEDULE,
        harvest_cost_per_m3=9.0,
        harvest_cost_by_class={"cable": 20.0},
        regeneration_cost_per_ha=1200.0,
        annual_cost_per_ha=10.0,
    )
    strata = np.array(["S2", "S2", "S4"], dtype=object)
    a0 = np.array([30.0, 30.0, 60.0])
    cls = np.array([None, "cable", None], dtype=object)
    hv = harvest_values(strata, a0, g, st_, cost_class=cls)
    assert hv.harvest_cost_per_m3.tolist() == [9.0, 20.0, 9.0]
    price = stumpage_price(g.diameter(strata, hv.harvest_age_yr), st_.economics)
    assert np.array_equal(hv.price_per_m3, price)
    net = hv.volume_m3_ha * price - hv.harvest_cost_per_m3[:, None] * hv.volume_m3_ha - 1200.0
    assert np.allclose(hv.net_value_per_ha, net, rtol=1e-13)
    assert np.allclose(hv.npv_per_ha, net * 1.03**-hv.times_yr, rtol=1e-12)
    # annual costs over 30 years, end-of-year payments: numpy_financial.pv (reference library)
    assert hv.annual_cost_pv_per_ha == pytest.approx(-npf.pv(0.03, 30, 10.0), rel=1e-12)
    # the net value at arbitrary (stratum, age) pairs is the same code path, to the bit
    again = net_value_per_ha(strata, hv.harvest_age_yr, g, st_.economics, hv.harvest_cost_per_m3)
    assert np.array_equal(again, hv.net_value_per_ha)
    stump = net_value_per_ha(
        strata, hv.harvest_age_yr, g, st_.economics, hv.harvest_cost_per_m3, regeneration_cost=False
    )
    assert np.allclose(stump - 1200.0, net, rtol=1e-13)


# ---------------------------------------------------------------------------------------
# land expectation value and ending value
# ---------------------------------------------------------------------------------------
def _lev_brute(S, r, C, d=0.0):
    """max over T = 1 .. len(S) of the Faustmann closed form with rotation length T + d."""
    vals = [(s - C * (1 + r) ** (t + d)) / ((1 + r) ** (t + d) - 1) for t, s in enumerate(S, 1)]
    return max(vals), float(int(np.argmax(vals)) + 1)


def test_land_expectation_values_per_stratum_and_cost():
    # Faustmann (1849) closed form maximised by brute force over T = 1 .. 300, per stratum
    # and harvest cost; the delay d lengthens every rotation to T + d. Cross-check with the
    # explicit series: -C at 0, S(T) at T + d, repeated every T + d years, truncated.
    g = _table_model()
    st_ = _settings(
        discount_rate=0.03,
        price_schedule=SCHEDULE,
        price_per_m3=30.0,
        regeneration_cost_per_ha=900.0,
    )
    strata = np.array(["S2", "S2", "S4", "S2"], dtype=object)
    hc = np.array([9.0, 20.0, 9.0, 9.0])
    ages = np.arange(1, 301, dtype=float)
    for d in (0.0, 4.0):
        got, rot = land_expectation_values(strata, g, st_.economics, hc, delay_yr=d)
        for i in range(4):
            lab = np.full(300, strata[i], dtype=object)
            S = (stumpage_price(g.diameter(lab, ages), st_.economics) - hc[i]) * g.volume(lab, ages)
            best, t_best = _lev_brute(S, 0.03, 900.0, d)
            assert got[i] == pytest.approx(best, rel=1e-12)
            assert rot[i] == t_best
            T = t_best + d
            series = sum(
                (-900.0 + S[int(t_best) - 1] * 1.03**-T) * 1.03 ** (-j * T) for j in range(3000)
            )
            assert got[i] == pytest.approx(series, rel=1e-9)
        assert got[0] > got[1]  # costlier harvest, less land value
        assert got[0] == got[3]
    # without delay the maximum LEV is the rotation table's (without annual costs)
    rc = rotation_curves(g, "S2", st_, harvest_cost_per_m3=9.0)
    got, rot = land_expectation_values(["S2"], g, st_.economics, [9.0])
    assert (got[0], rot[0]) == (rc.lev_per_ha, rc.faustmann_age)


@pytest.mark.parametrize(("C", "d"), [(0.0, 0.0), (1500.0, 0.0), (1500.0, 6.0)])
def test_ending_value_of_bare_land_is_lev(C, d):
    # Faustmann (1849): bare land just cut (its crop starts d years from now) is worth
    # max_a (S(a) + LEV)(1 + r)^-(a + d) = LEV + C, the land expectation value of the
    # closed form plus the regeneration cost already paid at that cut (our convention: C
    # at every harvest); with C = 0 exactly the LEV. A crop of age e below the Faustmann
    # rotation T* is worth (LEV + C)(1 + r)^(e + d) (the same series, e years later).
    r = 0.03
    g = _cr_model()
    s = Settings(
        economics=Economics(
            discount_rate=r, price_per_m3=40.0, regeneration_cost_per_ha=C, ending_value="faustmann"
        ),
        regeneration=Regeneration(delay_yr=d),
    )
    ages = np.arange(1, 301, dtype=float)
    S = 40.0 * CR.A * (1 - np.exp(-CR.k * ages)) ** CR.c  # Chapman-Richards by hand
    lev_star, t_star = _lev_brute(S, r, C, d)
    ev = ending_value_per_ha(["X"] * 4, [-d, 0.0, 10.0, t_star], g, s)
    assert ev[0] == pytest.approx(lev_star + C, rel=1e-12)
    # numpy_financial.npv of the explicit annual cash flows from that cut on: S(T*) - C at
    # every cut, k (T* + d) years later, k = 1, 2, ... (truncated after 4,000 years)
    flows = np.zeros(4000)
    flows[int(t_star + d) :: int(t_star + d)] = S[int(t_star) - 1] - C
    assert ev[0] == pytest.approx(npf.npv(r, flows), rel=1e-9)
    for e, v in zip([0.0, 10.0, t_star], ev[1:], strict=True):
        assert v == pytest.approx((lev_star + C) * (1 + r) ** (e + d), rel=1e-12)
    # an over-mature crop is cut at once: S(e) + LEV
    old = ending_value_per_ha(["X"], [250.0], g, s)[0]
    assert old == pytest.approx(40.0 * float(chapman_richards(250.0, CR.A, CR.k, CR.c)) + lev_star)


def test_ending_value_brute_force_and_other_modes():
    # Definition, by brute force over whole years j from the end with a plain loop:
    # max_j (S(e + j) + LEV(next stratum)) (1 + r)^-j, LEV of the stratum regrowing after.
    g = _table_model()
    econ = {"discount_rate": 0.04, "price_schedule": SCHEDULE, "price_per_m3": 30.0}
    s = _settings(**econ, harvest_cost_per_m3=7.0, ending_value="faustmann")
    strata = np.array(["S1", "S3", "S3"], dtype=object)
    nxt = np.array(["S5", "S5", "S3"], dtype=object)
    age_end = np.array([12.5, 47.5, 140.0])
    got = ending_value_per_ha(strata, age_end, g, s, next_strata=nxt)
    for i in range(3):
        land = land_expectation_values([nxt[i]], g, s.economics)[0][0]
        a = age_end[i] + np.arange(301)
        lab = np.full(len(a), strata[i], dtype=object)
        S = (stumpage_price(g.diameter(lab, a), s.economics) - 7.0) * g.volume(lab, a)
        want = max((S[j] + land) * 1.04**-j for j in range(301))
        assert got[i] == pytest.approx(want, rel=1e-12)
    standing = ending_value_per_ha(strata, age_end, g, _settings(**econ, ending_value="standing"))
    price = stumpage_price(g.diameter(strata, age_end), s.economics)
    assert np.allclose(standing, price * g.volume(strata, age_end), rtol=1e-13)
    none = ending_value_per_ha(strata, age_end, g, _settings(**econ, ending_value="none"))
    assert none.tolist() == [0.0, 0.0, 0.0]
    with pytest.raises(SettingsError, match=r"ending_value = \"faustmann\" needs"):
        ending_value_per_ha(strata, age_end, g, _settings(price_per_m3=30.0, discount_rate=0.0))


# ---------------------------------------------------------------------------------------
# long-term sustained yield
# ---------------------------------------------------------------------------------------
def test_ltsy_one_stratum_equals_area_times_culmination_mai():
    # LTSY as the trade computes it: net area x MAI at culmination (common practice, no
    # source). Independent: MAI read off the yield-table rows with numpy (linear
    # interpolation on whole years, (0, 0) below the first row, flat after the last).
    df = synthetic_yield_table()
    g = _table_model()
    rows = df[df["stratum"] == "S3"]
    grid = np.arange(1, 301, dtype=float)
    vol = np.interp(grid, np.r_[0.0, rows["age"].to_numpy(float)], np.r_[0.0, rows["volume"]])
    mai_max = (vol / grid).max()
    s = _settings(discount_rate=0.03, price_per_m3=40.0)
    ly = long_term_sustained_yield(["S3"] * 3, [10.0, 25.5, 0.0], g, s)
    assert ly.mai_max_m3_yr == pytest.approx(35.5 * mai_max, rel=1e-12)
    row = ly.table.iloc[0]
    assert row["mai_max_age"] == grid[int(np.argmax(vol / grid))]
    # at the Faustmann rotation (brute-force closed form, C = 0): V(T*)/T* per ha
    _, t_star = _lev_brute(40.0 * vol, 0.03, 0.0)
    assert row["faustmann_age"] == t_star
    assert ly.faustmann_m3_yr == pytest.approx(35.5 * vol[int(t_star) - 1] / t_star, rel=1e-12)
    assert ly.faustmann_m3_yr < ly.mai_max_m3_yr  # discounting shortens the rotation
    # two strata add up; a regeneration delay d spreads V(T) over T + d years
    two = long_term_sustained_yield(["S3", "S1"], [10.0, 5.0], g, s)
    assert list(two.table["stratum"]) == ["S1", "S3"]
    assert list(two.table.columns) == LTSY_COLUMNS
    assert two.mai_max_m3_yr == pytest.approx(two.table["ltsy_mai_max_m3_yr"].sum())
    s_d = dataclasses.replace(s, regeneration=Regeneration(delay_yr=3.0))
    ly_d = long_term_sustained_yield(["S3"], [10.0], g, s_d)
    assert ly_d.mai_max_m3_yr == pytest.approx(10.0 * (vol / (grid + 3.0)).max(), rel=1e-12)
