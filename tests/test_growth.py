"""Tests of spatialplan.growth: yield tables, Chapman-Richards, MAI/CAI."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import brentq, minimize_scalar
from scipy.special import lambertw

from spatialplan.errors import InputError
from spatialplan.growth import (
    build_growth_model,
    cai_table,
    chapman_richards,
    chapman_richards_derivative,
    cr_mai,
    cr_mai_culmination_age,
    load_yield_table,
    mai,
    mai_culmination_age_table,
    stratum_label,
    stratum_labels,
    yield_table_from_csv_text,
    yield_table_from_frame,
)
from spatialplan.settings import ChapmanRichards, GrowthSettings, StratumCurve, YieldColumns
from spatialplan.synthetic import synthetic_yield_table

# NW-FVA 2021 Douglas-fir yield tables, yield class 0, total production (m3/ha) at ages
# 40/60/80/90/95 (Albert, Nagel, Schmidt, Nagel & Spellmann 2021, Zenodo
# doi 10.5281/zenodo.6343906); values checked against the table as shipped in the R
# package et.nwfva (CRAN), data-raw/tafeln_roh/et_dgl.csv, column GWL, Ekl 0.
DOUGLAS_AGES = [40, 60, 80, 90, 95]
DOUGLAS_GWL = [751, 1344, 1876, 2118, 2233]


def _write(tmp_path, text, name="y.csv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


# ---------------------------------------------------------------------------------------
# Chapman-Richards
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("c", [1.05, 1.5, 2.0, 3.0, 5.0, 12.0, 60.0])
@pytest.mark.parametrize("k", [0.01, 0.035, 0.2])
def test_cr_culmination_matches_brentq_and_lambertw(k, c):
    # Derivation (calculus): d/dt [V(t)/t] = 0  <=>  t V'(t) = V(t); with x = k t,
    # c x e^-x = 1 - e^-x  <=>  e^x - 1 = c x (independent of A).
    # Lambert W: with u = x + 1/c, e^(u - 1/c) = c u  =>  (-u) e^(-u) = -e^(-1/c)/c, so
    # x = -W(-e^(-1/c)/c) - 1/c; the branch W_0 gives the trivial root x = 0 for c > 1,
    # the branch W_{-1} the positive root. Reference implementations: scipy.special.lambertw
    # and scipy.optimize.brentq.
    t_ours = cr_mai_culmination_age(k, c)
    x_w = float((-lambertw(-math.exp(-1.0 / c) / c, k=-1)).real - 1.0 / c)
    hi = 10.0 * math.log(c) + 10.0
    x_b = brentq(lambda x: math.expm1(x) - c * x, 1e-12 * (c - 1.0), hi, xtol=1e-15, rtol=1e-14)
    assert t_ours == pytest.approx(x_w / k, rel=1e-9)
    assert t_ours == pytest.approx(x_b / k, rel=1e-9)
    # and it is the maximum of MAI found by a numerical optimiser (scipy), for any A
    for A in (100.0, 777.0):
        res = minimize_scalar(
            lambda t, A=A: -float(cr_mai(t, A, k, c)),
            bounds=(1e-6, 20 * t_ours),
            method="bounded",
            options={"xatol": 1e-9 * t_ours},
        )
        assert res.x == pytest.approx(t_ours, rel=1e-4)
    # at the culmination CAI = MAI (textbook property, e.g. Davis et al. 2001, from memory)
    assert float(chapman_richards_derivative(t_ours, 500, k, c)) == pytest.approx(
        float(cr_mai(t_ours, 500, k, c)), rel=1e-9
    )


@pytest.mark.parametrize("c", [0.3, 0.8, 1.0])
def test_cr_no_interior_max_for_c_le_1(c):
    # For c <= 1 the curve is concave from 0, so V(t)/t falls monotonically (derivation);
    # check numerically on a fine grid, and that the function reports "no interior maximum".
    assert math.isnan(cr_mai_culmination_age(0.04, c))
    t = np.linspace(0.01, 300, 5000)
    m = cr_mai(t, 400, 0.04, c)
    assert np.all(np.diff(m) <= 1e-12)


def test_cr_derivative_matches_central_difference():
    # Calculus check with a central finite difference (numerical analysis, error O(h^2)).
    t = np.linspace(1, 200, 50)
    h = 1e-5
    num = (chapman_richards(t + h, 600, 0.03, 2.7) - chapman_richards(t - h, 600, 0.03, 2.7)) / (
        2 * h
    )
    assert np.allclose(chapman_richards_derivative(t, 600, 0.03, 2.7), num, rtol=1e-6)


# ---------------------------------------------------------------------------------------
# published table: MAI culmination
# ---------------------------------------------------------------------------------------
def test_nwfva_douglas_fir_mai_culminates_at_90(tmp_path):
    # Source: NW-FVA 2021 Douglas-fir yield tables (Albert et al. 2021,
    # doi 10.5281/zenodo.6343906), yield class 0, total production.
    ages = np.array(DOUGLAS_AGES, float)
    vol = np.array(DOUGLAS_GWL, float)
    m = mai(vol, ages)
    assert mai_culmination_age_table(vol, ages) == 90
    assert m.max() == pytest.approx(23.5, abs=0.05)  # the table's own dGZ column: 23.5 at 90
    # the same through a loaded table on a 1-year grid (linear interpolation)
    text = "species,yc,age,volume\n" + "".join(
        f"DGL,0,{a},{v}\n" for a, v in zip(DOUGLAS_AGES, DOUGLAS_GWL, strict=True)
    )
    tab = load_yield_table(_write(tmp_path, text), ["species", "yc"], YieldColumns())
    grid = np.arange(1, 96, dtype=float)
    v = tab.volume(np.full(grid.shape, "DGL/0", dtype=object), grid)
    assert mai_culmination_age_table(v, grid) == 90
    assert float(mai(v, grid).max()) == pytest.approx(2118 / 90, rel=1e-12)


# ---------------------------------------------------------------------------------------
# MAI / CAI vectorisation (hypothesis property tests against scalar formulas)
# ---------------------------------------------------------------------------------------
@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.floats(0, 2000, allow_nan=False), min_size=1, max_size=30),
    st.integers(1, 4),
)
def test_mai_cai_vectorised_equal_scalar(vols, n_rows):
    # Scalar definitions: MAI(t) = V(t)/t; CAI on a 1-year grid = V(t) - V(t-1), V(0) = 0
    # (textbook definitions, e.g. Davis et al. 2001 Forest Management, from memory).
    ages = np.arange(1, len(vols) + 1, dtype=float)
    V = np.array([np.roll(vols, i) for i in range(n_rows)], float)
    M = mai(V, ages)
    Cc = cai_table(V, ages)
    for i in range(n_rows):
        prev = 0.0
        for j, t in enumerate(ages):
            assert M[i, j] == pytest.approx(V[i, j] / t, rel=1e-15, abs=0)
            assert Cc[i, j] == pytest.approx(V[i, j] - prev, rel=1e-12, abs=1e-12)
            prev = V[i, j]
    best = mai_culmination_age_table(V, ages)
    for i in range(n_rows):
        ratios = [V[i, j] / ages[j] for j in range(len(ages))]
        assert best[i] == ages[ratios.index(max(ratios))]


@settings(max_examples=40, deadline=None)
@given(
    st.floats(50, 1500),
    st.floats(0.005, 0.2),
    st.floats(0.5, 8.0),
    st.lists(st.floats(0, 400, allow_nan=False), min_size=1, max_size=20),
)
def test_cr_vectorised_equal_scalar(A, k, c, ts):
    # Scalar formula V(t) = A (1 - exp(-k t))^c (Richards 1959; Pienaar & Turnbull 1973).
    vec = chapman_richards(np.array(ts), A, k, c)
    for t, v in zip(ts, vec, strict=True):
        assert v == pytest.approx(A * (-math.expm1(-k * t)) ** c, rel=1e-12, abs=1e-12)


# ---------------------------------------------------------------------------------------
# yield tables: interpolation rules and validation
# ---------------------------------------------------------------------------------------
TABLE = """stratum,site,age,volume,diameter
DF,2,20,100,10
DF,2,40,300,20
DF,2,60,400,30
HW,1,10,20,
HW,1,30,80,
"""


def test_interpolation_rules(tmp_path):
    # The usual way tabulated yields are read between entries (common practice, no
    # source): linear, (0, 0) below the first age, flat past the last; compared with
    # numpy.interp on the augmented points (reference).
    tab = load_yield_table(_write(tmp_path, TABLE), ["stratum", "site"], YieldColumns())
    assert tab.strata == ["DF/2", "HW/1"]
    strata = np.array(["DF/2", "DF/2", "DF/2", "DF/2", "HW/1", "HW/1"], dtype=object)
    ages = np.array([0, 10, 30, 100, 5, 45], float)
    v = tab.volume(strata, ages)
    assert v.tolist() == [0.0, 50.0, 200.0, 400.0, 10.0, 80.0]
    # (n, P) broadcasting
    ages2 = np.array([[10, 50], [25, 70]], float)
    v2 = tab.volume(np.array(["DF/2", "HW/1"], dtype=object), ages2)
    ref = [
        np.interp([10, 50], [0, 20, 40, 60], [0, 100, 300, 400]),
        np.interp([25, 70], [0, 10, 30], [0, 20, 80]),
    ]
    assert np.allclose(v2, ref)
    d = tab.diameter(np.array(["DF/2", "HW/1"], dtype=object), np.array([30.0, 20.0]))
    assert d[0] == pytest.approx(15.0)
    assert math.isnan(d[1])  # HW has empty diameter cells
    with pytest.raises(InputError, match="XX/9"):
        tab.volume(np.array(["XX/9"], dtype=object), np.array([10.0]))


def test_float_key_matches_integer_text(tmp_path):
    # Key values compared as text; "2.0" from a float attribute equals "2" (project rule).
    tab = load_yield_table(_write(tmp_path, TABLE), ["stratum", "site"], YieldColumns())
    stands = pd.DataFrame({"stratum": [" DF", "HW"], "site": [2.0, 1.0]})
    labels = stratum_labels(stands, ["stratum", "site"])
    assert labels.tolist() == ["DF/2", "HW/1"]
    assert [stratum_label(r) for r in stands.itertuples(index=False)] == labels.tolist()
    assert all(tab.has_stratum(s) for s in labels)
    t2 = "stratum,site,age,volume\nDF,2.0,20,100\n"
    assert load_yield_table(_write(tmp_path, t2, "b.csv"), ["stratum", "site"]).strata == ["DF/2"]


def test_missing_and_unreadable_file(tmp_path):
    with pytest.raises(InputError, match=r"not found: .*nope\.csv"):
        load_yield_table(tmp_path / "nope.csv", ["stratum"], YieldColumns())
    bad = tmp_path / "bin.csv"
    bad.write_bytes(b"\xff\xfe\x00\x81stratum\x00,\xff")
    with pytest.raises(InputError, match=r"bin\.csv"):
        load_yield_table(bad, ["stratum"], YieldColumns())


def test_missing_columns_lists_existing(tmp_path):
    p = _write(tmp_path, "stratum,age,vol\nA,10,5\n")
    with pytest.raises(InputError) as ei:
        load_yield_table(p, ["stratum", "site"], YieldColumns())
    msg = str(ei.value)
    assert "y.csv" in msg
    assert "site" in msg
    assert "volume" in msg
    assert "it has: stratum, age, vol" in msg


@pytest.mark.parametrize(
    ("text", "expect"),
    [
        ("stratum,age,volume\nA,10,5\nA,20,abc\n", r"line 3 \(key A\): volume 'abc' is not a"),
        ("stratum,age,volume\nA,10,5\nA,x,7\n", r"line 3 \(key A\): age 'x' is not a number"),
        ("stratum,age,volume\nA,10,5\nA,30,9\nA,20,7\n", r"line 4 \(key A\): ages not strictly"),
        ("stratum,age,volume\nA,10,5\nA,10,5\n", r"line 3 \(key A\): duplicate row for age 10"),
        ("stratum,age,volume\nB,10,5\nB,20,-1\n", r"line 3 \(key B\): negative volume -1"),
        ("stratum,age,volume,diameter\nB,10,5,4\nB,20,7,\n", r"line 3 \(key B\): diameter"),
    ],
)
def test_validation_names_key_and_line(tmp_path, text, expect):
    with pytest.raises(InputError, match=expect) as ei:
        load_yield_table(_write(tmp_path, text), ["stratum"], YieldColumns())
    assert "y.csv" in str(ei.value)


def test_validation_reports_all_problems_at_once(tmp_path):
    text = "stratum,age,volume\nA,10,5\nA,10,6\nB,20,-3\nC,q,1\nA,5,1\n"
    with pytest.raises(InputError) as ei:
        load_yield_table(_write(tmp_path, text), ["stratum"], YieldColumns())
    msg = str(ei.value)
    assert "4 problem(s)" in msg
    for part in ("line 3 (key A)", "line 4 (key B)", "line 5 (key C)", "line 6 (key A)"):
        assert part in msg


def test_synthetic_demo_table_loads_and_roundtrips(tmp_path):
    df = synthetic_yield_table()
    p = tmp_path / "demo.csv"
    df.to_csv(p, index=False)
    tab = load_yield_table(p, ["stratum"], YieldColumns())
    assert tab.strata == ["S1", "S2", "S3", "S4", "S5"]
    assert tab.has_diameter
    # stored CSV text (as the output GeoPackage keeps it) gives the same curves
    again = yield_table_from_csv_text(tab.to_csv_text(), ["stratum"])
    s = np.array(tab.strata, dtype=object)
    ages = np.array([[7.0, 55.0, 400.0]] * len(s))
    assert np.array_equal(tab.volume(s, ages), again.volume(s, ages))
    assert np.array_equal(tab.diameter(s, ages), again.diameter(s, ages))
    frame_again = yield_table_from_frame(df, ["stratum"], source="<frame>")
    assert np.array_equal(frame_again.volume(s, ages), tab.volume(s, ages))


# ---------------------------------------------------------------------------------------
# growth model
# ---------------------------------------------------------------------------------------
def test_growth_model_combines_table_and_settings(tmp_path):
    tab = load_yield_table(_write(tmp_path, TABLE), ["stratum", "site"], YieldColumns())
    gs = GrowthSettings(
        chapman_richards={
            "HW/1": ChapmanRichards(300, 0.05, 2.0),
            "PP/3": ChapmanRichards(500, 0.02, 3),
        },
        diameter_by_age={"HW/1": StratumCurve((20.0, 60.0), (8.0, 28.0))},
        height_by_age={"DF/2": StratumCurve((10.0, 50.0), (5.0, 30.0))},
    )
    g = build_growth_model(tab, gs, ["stratum", "site"])
    assert g.strata == ["DF/2", "HW/1", "PP/3"]
    assert g.has_stratum("PP/3")
    assert not g.has_stratum("ZZ/1")
    s = np.array(["DF/2", "HW/1", "PP/3"], dtype=object)
    a = np.array([30.0, 40.0, 50.0])
    v = g.volume(s, a)
    # Table values read linearly between tabulated ages (common practice, no source):
    # DF/2 at 30 is halfway from 100 (age 20) to 300 (age 40).
    assert v[0] == pytest.approx(200.0)  # table
    assert v[1] == pytest.approx(300 * (1 - math.exp(-0.05 * 40)) ** 2)  # CR overrides table
    assert v[2] == pytest.approx(500 * (1 - math.exp(-0.02 * 50)) ** 3)  # CR adds a stratum
    d = g.diameter(s, a)
    assert d[0] == pytest.approx(15.0)  # table column
    assert d[1] == pytest.approx(18.0)  # settings diameter_by_age: 8 + 20 x (40 - 20) / 40
    assert math.isnan(d[2])
    h = g.height(s, a)
    assert h is not None
    assert h[0] == pytest.approx(5 + 25 * 20 / 40)
    assert np.isnan(h[1:]).all()
    assert build_growth_model(tab, GrowthSettings(), ["stratum", "site"]).height(s, a) is None
    with pytest.raises(InputError, match="ZZ/1"):
        g.volume(np.array(["ZZ/1"], dtype=object), np.array([1.0]))
