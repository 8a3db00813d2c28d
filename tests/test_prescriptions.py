"""Prescriptions (Model I): enumeration against brute force, values against closed forms."""

from __future__ import annotations

import dataclasses
import itertools
import math

import numpy as np
import pytest

from spatialplan.economics import harvest_values, lev
from spatialplan.errors import SettingsError
from spatialplan.growth import build_growth_model
from spatialplan.pipeline import build_problem, load_inputs
from spatialplan.prescriptions import (
    build_prescriptions,
    harvest_gap_periods,
    period_sequences,
    regenerated_strata,
)
from spatialplan.problem import FlowRules, PlanProblem, single_harvest_prescriptions
from spatialplan.rules import eligible_matrix
from spatialplan.settings import (
    ChapmanRichards,
    Economics,
    GrowthSettings,
    Horizon,
    Regeneration,
    Rules,
    Settings,
)
from tests.conftest import grid_stands, write_layer

# Invented curves (demo data): X is the natural stand, Y a faster planted one.
CURVES = {
    "X": ChapmanRichards(A=550.0, k=0.035, c=3.2),
    "Y": ChapmanRichards(A=620.0, k=0.045, c=3.0),
}


def _model():
    return build_growth_model(None, GrowthSettings(chapman_richards=CURVES), ["stratum"])


def _cr(label: str, age: float) -> float:
    # Chapman-Richards V(t) = A (1 - exp(-k t))^c (Richards 1959), written out by hand.
    c = CURVES[label]
    return c.A * (1.0 - math.exp(-c.k * max(age, 0.0))) ** c.c


def _settings(P=7, L=10.0, min_age=20.0, cap=None, delay=0.0, smap=None, ending="none", **econ):
    econ.setdefault("price_per_m3", 40.0)
    econ.setdefault("discount_rate", 0.03)
    return Settings(
        horizon=Horizon(periods=P, period_length_yr=L),
        rules=Rules(min_age_yr=min_age, max_harvests=cap),
        economics=Economics(ending_value=ending, **econ),
        regeneration=Regeneration(delay_yr=delay, stratum_map=smap or {}),
    )


def _build(s, strata, age0, reserve=None, hc=None):
    P, L = s.horizon.periods, s.horizon.period_length_yr
    age0 = np.asarray(age0, dtype=float)
    el = eligible_matrix(age0, reserve, s.rules.min_age_yr, P, L)
    op = eligible_matrix(age0, reserve, 0.0, P, L)
    strata = np.asarray(strata, dtype=object)
    return build_prescriptions(strata, age0, el, _model(), s, hc, op)


def _sequences(rx, i):
    return [
        tuple(rx.periods_of(k).tolist()) for k in range(rx.stand_start[i], rx.stand_start[i + 1])
    ]


def _brute_force(age0, P, L, min_age, delay, cap, reserve=False):
    """Every subset of periods, kept when each harvest meets the minimum age (by hand)."""
    out = [()]
    if reserve:
        return out
    for size in range(1, P + 1):
        if cap is not None and size > cap:
            break
        for seq in itertools.combinations(range(1, P + 1), size):
            ok = age0 + (seq[0] - 0.5) * L >= min_age - 1e-9
            ok &= all((b - a) * L - delay >= min_age - 1e-9 for a, b in itertools.pairwise(seq))
            if ok:
                out.append(seq)
    return sorted(out)


# ---------------------------------------------------------------------------------------
# enumeration
# ---------------------------------------------------------------------------------------
def test_enumeration_hand_count():
    # Hand count, 6 periods of 10 years, minimum age 20 (a harvest every 2 periods at most):
    # old stand: 6 single cuts, 10 pairs (1,3) (1,4) (1,5) (1,6) (2,4) (2,5) (2,6) (3,5)
    # (3,6) (4,6), 4 triples (1,3,5) (1,3,6) (1,4,6) (2,4,6), plus no harvest = 21.
    # A stand 0 years old is first old enough at mid-period 3 (age 25): singles 3..6,
    # pairs (3,5) (3,6) (4,6) and no harvest = 8. A reserve has only no harvest.
    s = _settings(P=6, min_age=20.0)
    rx = _build(s, ["X", "X", "X"], [100.0, 0.0, 100.0], reserve=np.array([False, False, True]))
    assert np.diff(rx.stand_start).tolist() == [21, 8, 1]
    assert _sequences(rx, 1) == [(), (3,), (3, 5), (3, 6), (4,), (4, 6), (5,), (6,)]
    assert _sequences(rx, 2) == [()]
    # caps: at most 2 harvests -> 17 (21 - 4 triples), at most 1 -> 7
    rx2 = _build(dataclasses.replace(s, rules=Rules(min_age_yr=20.0, max_harvests=2)), ["X"], [100])
    assert rx2.n_prescriptions == 17
    rx1 = _build(dataclasses.replace(s, rules=Rules(min_age_yr=20.0, max_harvests=1)), ["X"], [100])
    assert _sequences(rx1, 0) == [(), (1,), (2,), (3,), (4,), (5,), (6,)]
    rx.validate(3, 6)


def test_period_sequences_and_gap():
    # Hand-checked: 4 periods, steps of at least 2, up to 2 harvests.
    assert period_sequences(4, 2, 2).tolist() == [
        [0, 0], [1, 0], [1, 3], [1, 4], [2, 0], [2, 4], [3, 0], [4, 0]
    ]  # fmt: skip
    # g L - delay >= min age, smallest g >= 1 (by hand: 40/5 = 8; (40+2)/5 = 8.4 -> 9)
    assert harvest_gap_periods(40, 5) == 8
    assert harvest_gap_periods(40, 5, 2) == 9
    assert harvest_gap_periods(0, 5) == 1
    assert harvest_gap_periods(37.5, 5, 2.5) == 8


@pytest.mark.parametrize(
    ("min_age", "delay", "cap"),
    [(20.0, 0.0, None), (25.0, 0.0, None), (20.0, 5.0, None), (15.0, 3.0, 2), (0.0, 0.0, 3)],
)
def test_enumeration_equals_brute_force(min_age, delay, cap):
    # Independent enumeration: all 2^7 subsets of 7 periods filtered by the minimum age of
    # the crop standing at each harvest and the harvest cap.
    P, L = 7, 10.0
    ages = [0.0, 3.0, 14.0, 22.0, 60.0, 200.0]
    s = _settings(P=P, L=L, min_age=min_age, cap=cap, delay=delay)
    rx = _build(s, ["X"] * len(ages), ages)
    for i, a in enumerate(ages):
        assert _sequences(rx, i) == _brute_force(a, P, L, min_age, delay, cap)
    # every harvest meets the minimum age and the cap holds
    counts = np.diff(rx.harvest_start)
    assert cap is None or counts.max() <= cap


def test_max_harvests_one_equals_single_harvest_model():
    # Project contract: with one harvest and no ending value the prescriptions are exactly
    # problem.single_harvest_prescriptions of the (n, P) arrays built by harvest_values.
    rng = np.random.default_rng(5)
    n, P, L = 60, 12, 5.0
    strata = np.array(["X", "Y"], dtype=object)[rng.integers(0, 2, n)]
    age0 = rng.integers(0, 120, n).astype(float)
    reserve = rng.random(n) < 0.1
    hc = rng.choice([6.0, 11.0], n)
    s = _settings(P=P, L=L, min_age=35.0, cap=1, regeneration_cost_per_ha=900.0)
    s = dataclasses.replace(s, rules=dataclasses.replace(s.rules, old_forest_age_yr=60.0))
    g = _model()
    el = eligible_matrix(age0, reserve, 35.0, P, L)
    rx = build_prescriptions(strata, age0, el, g, s, hc, eligible_matrix(age0, reserve, 0, P, L))
    hv = harvest_values(strata, age0, g, s, harvest_cost_per_m3=hc)
    problem = PlanProblem(
        stand_ids=np.arange(n).astype(str),
        area_ha=np.ones(n),
        opening_area_ha=np.ones(n),
        age_start_yr=age0,
        eligible=el,
        volume_m3_ha=hv.volume_m3_ha,
        npv_per_ha=hv.npv_per_ha,
        green_up_periods=np.ones(n, dtype=int),
        initially_open=np.zeros((n, P), dtype=bool),
        edges=np.zeros((0, 2), dtype=int),
        periods=P,
        period_length_yr=L,
        flow=FlowRules(old_forest_age_yr=60.0, old_forest_min_share=0.1),
        ending_volume_m3_ha=hv.ending_volume_m3_ha,
        ending_age_yr=hv.ending_age_yr,
    )
    ref = single_harvest_prescriptions(problem)
    for f in dataclasses.fields(ref):
        got, want = getattr(rx, f.name), getattr(ref, f.name)
        assert got.dtype == want.dtype, f.name
        assert np.array_equal(got, want), f.name
    assert rx.old_mask.any()  # the comparison covered the old-forest bits


# ---------------------------------------------------------------------------------------
# values
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize(("delay", "smap"), [(0.0, None), (4.0, {"X": "Y"})])
def test_values_by_hand(delay, smap):
    # Every harvest and ending quantity recomputed in plain Python from the conventions:
    # harvest at t = (p - 0.5) L; first crop age age0 + t; after a cut in q the mapped
    # stratum is (p - q) L - delay old at mid-period p; net = (price - h) V - C discounted
    # (1 + r)^-t; ending value "standing" = (price - h) V at the end, discounted (1+r)^-PL.
    P, L, r, price, C = 7, 10.0, 0.03, 40.0, 800.0
    s = _settings(
        P=P,
        L=L,
        min_age=20.0,
        delay=delay,
        smap=smap,
        ending="standing",
        regeneration_cost_per_ha=C,
        discount_rate=r,
    )
    s = dataclasses.replace(s, rules=dataclasses.replace(s.rules, old_forest_age_yr=45.0))
    ages = [0.0, 30.0, 75.0]
    hc = np.array([5.0, 12.0, 0.0])
    rx = _build(s, ["X", "X", "Y"], ages, hc=hc)
    regen = {"X": "Y", "Y": "Y"} if smap else {"X": "X", "Y": "Y"}
    for k in range(rx.n_prescriptions):
        i = int(rx.stand_of[k])
        seq = rx.periods_of(k).tolist()
        crop, last = ["X", "X", "Y"][i], None
        total = 0.0
        for j, q in enumerate(seq):
            t = (q - 0.5) * L
            a = ages[i] + t if last is None else (q - last) * L - delay
            assert a >= 20.0 - 1e-9  # minimum age of the crop cut
            v = _cr(crop, a)
            h = int(rx.harvest_start[k]) + j
            assert rx.harvest_volume_m3_ha[h] == pytest.approx(v, rel=1e-12)
            npv = ((price - hc[i]) * v - C) * (1 + r) ** -t
            assert rx.harvest_npv_per_ha[h] == pytest.approx(npv, rel=1e-12, abs=1e-9)
            total += npv
            crop, last = regen[crop], q
        e_age = ages[i] + P * L if last is None else P * L - (last - 0.5) * L - delay
        assert rx.ending_age_yr[k] == pytest.approx(max(e_age, 0.0), abs=1e-12)
        assert rx.ending_volume_m3_ha[k] == pytest.approx(_cr(crop, e_age), rel=1e-12)
        ev = (price - hc[i]) * _cr(crop, e_age) * (1 + r) ** -(P * L)
        assert rx.ending_value_per_ha[k] == pytest.approx(ev, rel=1e-12)
        assert rx.npv_per_ha[k] == pytest.approx(total + ev, rel=1e-12)
        assert rx.harvest_mask[k] == sum(1 << (q - 1) for q in seq)
        # old forest: age at mid-period p >= 45 (the crop standing then; 0 in its cut period)
        old = 0
        for p in range(1, P + 1):
            done = [q for q in seq if q <= p]
            a = ages[i] + (p - 0.5) * L if not done else (p - done[-1]) * L - delay
            old |= (a >= 45.0 - 1e-9) << (p - 1)
        assert int(rx.old_mask[k]) == old


@pytest.mark.parametrize(("C", "delay"), [(0.0, 0.0), (1500.0, 0.0), (1500.0, 3.0)])
def test_best_prescription_cuts_at_the_faustmann_rotation(C, delay):
    # Faustmann (1849): with the land valued at its LEV, the best time to cut a stand is
    # argmax over ages a of (S(a) + LEV) (1 + r)^-a; for bare land that is the Faustmann
    # rotation T*. Brute force on the period grid with the closed form
    # LEV = max_T (S(T) - C (1+r)^(T+d)) / ((1+r)^(T+d) - 1), d = regeneration delay.
    # One stand, no other rule, Faustmann ending value; 2-year periods so that harvest and
    # ending ages fall on whole years (age 1 at the start, cuts at even ages).
    P, L, r, price, age0 = 30, 2.0, 0.03, 40.0, 1.0
    s = _settings(
        P=P,
        L=L,
        min_age=10.0,
        delay=delay,
        ending="faustmann",
        regeneration_cost_per_ha=C,
        discount_rate=r,
        price_per_m3=price,
    )
    rx = _build(s, ["X"], [age0])
    best = int(np.argmax(rx.npv_per_ha))
    cut = rx.periods_of(best).tolist()
    T = np.arange(1, 301, dtype=float)
    S = np.array([price * _cr("X", t) for t in T])
    g = (1 + r) ** (T + delay)
    levs = (S - C * g) / (g - 1)
    lev_star, t_star = levs.max(), T[int(np.argmax(levs))]
    assert lev_star == pytest.approx(float(lev(S, T + delay, r, C).max()), rel=1e-12)
    value = [
        (price * _cr("X", age0 + (q - 0.5) * L) + lev_star) * (1 + r) ** -((q - 0.5) * L)
        for q in range(1, P + 1)
    ]
    q_star = int(np.argmax(value)) + 1
    assert cut == [q_star]
    assert abs(age0 + (q_star - 0.5) * L - t_star) <= L  # the rotation, to the period grid
    # and its value is exactly the brute-force one: cut at q*, then the land's LEV + C
    assert rx.npv_per_ha[best] == pytest.approx(max(value), rel=1e-10)


def test_land_regenerating_at_the_end_is_worth_lev():
    # A stand cut at mid-period P with a regeneration delay d = L/2 holds a crop of age 0 at
    # the end. Faustmann (1849) on the closed form: bare land just cut is worth LEV_d + C
    # (C was paid at that cut), LEV_d = max_T (S(T) - C (1+r)^(T+d)) / ((1+r)^(T+d) - 1);
    # d years later, with the delay behind it, the same land is worth (LEV_d + C)(1+r)^d.
    # With C = 0 and d = 0 that is the LEV itself (checked in test_economics).
    P, L, r, d = 4, 10.0, 0.04, 5.0
    for C in (0.0, 1200.0):
        s = _settings(
            P=P,
            L=L,
            min_age=30.0,
            delay=d,
            ending="faustmann",
            regeneration_cost_per_ha=C,
            discount_rate=r,
        )
        rx = _build(s, ["X"], [80.0])
        k = next(j for j in range(rx.n_prescriptions) if rx.periods_of(j).tolist() == [P])
        T = np.arange(1, 301, dtype=float)
        S = np.array([40.0 * _cr("X", t) for t in T])
        g = (1 + r) ** (T + d)
        lev_star = ((S - C * g) / (g - 1)).max()
        assert rx.ending_age_yr[k] == 0.0
        end = rx.ending_value_per_ha[k] * (1 + r) ** (P * L)
        assert end == pytest.approx((lev_star + C) * (1 + r) ** d, rel=1e-10)


# ---------------------------------------------------------------------------------------
# regeneration map and limits
# ---------------------------------------------------------------------------------------
def test_stratum_map_errors_name_the_key():
    g = _model()
    with pytest.raises(SettingsError, match=r"regeneration\.stratum_map\.'X' = 'Z'.*'Z'"):
        regenerated_strata(["X"], Regeneration(stratum_map={"X": "Z"}), g)
    with pytest.raises(SettingsError, match=r"stratum_map\.'Q' = 'Y'.*no yield curve.*'Q'"):
        _build(_settings(smap={"Q": "Y"}), ["X"], [50.0])
    # labels are normalised like stand labels; unmapped strata regrow as themselves
    assert regenerated_strata(["X", "Y"], Regeneration(stratum_map={" X ": "Y"}), g).tolist() == [
        "Y",
        "Y",
    ]


def test_too_many_prescriptions_is_a_settings_error():
    # No minimum age: a harvest could fall in every one of 40 periods (2^40 sequences).
    s = _settings(P=40, L=5.0, min_age=0.0).with_overrides({"rules.max_harvests": 40})
    with pytest.raises(SettingsError, match=r"rules\.max_harvests.*rules\.min_age_yr"):
        _build(s, ["X"], [50.0])


def test_unset_harvest_cap_is_lowered_with_a_note():
    # Unset rules.max_harvests: as many harvests as the minimum age allows, lowered until a
    # stand has at most SEQUENCES_PER_STAND sequences. Counts by brute force over subsets
    # of the periods (a harvest every period at minimum age 0; every 8th at 40 years).
    from itertools import combinations, pairwise

    from spatialplan.prescriptions import SEQUENCES_PER_STAND, harvest_cap

    def count(P: int, gap: int, m: int) -> int:
        return sum(
            1
            for k in range(m + 1)
            for c in combinations(range(P), k)
            if all(b - a >= gap for a, b in pairwise(c))
        )

    s = _settings(P=12, L=5.0, min_age=0.0)
    cap, note = harvest_cap(s)
    assert count(12, 1, cap) <= SEQUENCES_PER_STAND < count(12, 1, cap + 1)
    assert note is not None and "--max-harvests" in note and f"at most {cap} harvests" in note
    rx = _build(s, ["X"], [50.0])
    assert rx.n_prescriptions == count(12, 1, cap)
    # 20 periods of 5 years at minimum age 40: every sequence fits, no note
    s = _settings(P=20, L=5.0, min_age=40.0)
    assert harvest_cap(s) == (3, None) and count(20, 8, 3) <= SEQUENCES_PER_STAND


def test_faustmann_needs_a_positive_rate():
    s = _settings(ending="faustmann", discount_rate=0.0)
    with pytest.raises(SettingsError, match=r"economics\.ending_value.*discount_rate > 0"):
        _build(s, ["X"], [50.0])


# ---------------------------------------------------------------------------------------
# pipeline wiring
# ---------------------------------------------------------------------------------------
def test_build_problem_passes_prescriptions_and_old_forest(tmp_path, yields_csv):
    gdf = grid_stands()
    gdf["unit"] = ["north"] * 6 + ["south"] * 6
    stands = write_layer(gdf, tmp_path / "stands.gpkg")
    s = Settings(
        horizon=Horizon(periods=6, period_length_yr=10.0),
        rules=Rules(min_age_yr=30.0, old_forest_age_yr=80.0, old_forest_min_share=0.2),
        economics=Economics(price_per_m3=45.0),
    )
    s = dataclasses.replace(s, fields=dataclasses.replace(s.fields, unit_field="unit"))
    bundle = build_problem(load_inputs(stands, yields_csv, s))
    pr = bundle.problem
    assert pr.prescriptions is not None
    assert pr.flow.old_forest_age_yr == 80.0 and pr.flow.old_forest_min_share == 0.2
    assert pr.old_forest_group is not None
    assert pr.old_forest_group.tolist() == [0] * 6 + [1] * 6
    # some stand has a prescription with two harvests (regrown to 30 within 60 years)
    assert np.diff(pr.prescriptions.harvest_start).max() >= 2


def test_check_names_a_stratum_map_entry_without_yield_curve(tmp_path, yields_csv):
    from click.testing import CliRunner

    from spatialplan.cli import cli

    stands = write_layer(grid_stands(), tmp_path / "stands.gpkg")
    toml = tmp_path / "plan.toml"
    toml.write_text('[regeneration.stratum_map]\nS1 = "S9"\n', encoding="utf-8")
    res = CliRunner().invoke(
        cli, ["check", str(stands), "--yields", str(yields_csv), "--settings", str(toml)]
    )
    assert res.exit_code == 1, res.output
    assert "regeneration.stratum_map.'S1' = 'S9': no yield curve for stratum 'S9'" in res.output
    assert "Traceback" not in res.output
