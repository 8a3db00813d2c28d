"""Plan outputs: openings, tables, the plan GeoPackage with styles, write-back, raster."""

from __future__ import annotations

import hashlib
import itertools
import sqlite3
import xml.etree.ElementTree as ET

import geopandas as gpd
import networkx as nx
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
from geopandas.testing import assert_geodataframe_equal
from matplotlib import colormaps
from matplotlib.colors import to_hex, to_rgb

from spatialplan import outputs
from spatialplan.errors import OutputError
from spatialplan.runtable import read_run_table, run_table
from spatialplan.settings import Settings
from spatialplan.synthetic import voronoi_forest

P = 5
L = 5.0
R = 0.04


def make_plan(seed: int = 7, n: int = 60, periods: int = P):
    """A small made-up plan: random periods (reserves never cut), simple volumes/values."""
    g = voronoi_forest(n, seed=seed, reserve_share=0.1)
    rng = np.random.default_rng(seed)
    per = rng.integers(0, periods + 1, len(g))
    per[g["reserve"].to_numpy() == 1] = 0
    g["period"] = per
    g["area_ha"] = g.area / 10_000.0
    t = (per - 0.5) * L
    g["age_at_harvest_yr"] = np.where(per > 0, g["age"] + t, np.nan)
    g["volume_m3"] = np.where(per > 0, g["area_ha"] * 3.0 * g["age_at_harvest_yr"].fillna(0), 0.0)
    g["gross_value"] = g["volume_m3"] * 25.0
    g["ending_value_npv"] = g["area_ha"] * 100.0
    g["npv"] = np.where(per > 0, g["gross_value"] * (1 + R) ** -t, 0.0) + g["ending_value_npv"]
    left, right = g.sindex.query(g.geometry, predicate="touches")
    e = np.c_[left, right]
    edges = e[e[:, 0] < e[:, 1]]
    init = g["age"].to_numpy()[:, None] + (np.arange(1, periods + 1) - 0.5) * L < 2 * L
    settings = Settings().with_overrides({"horizon.periods": periods})
    return g, edges, init, settings


def make_layers(seed: int = 7):
    g, edges, init, s = make_plan(seed)
    op, sid = outputs.opening_table(g, edges, P, np.full(len(g), 2), init, 40.0,
                                    g["area_ha"].to_numpy())  # fmt: skip
    g["opening_id"] = sid
    g.loc[0, "stratum"] = "Ærø Nord"
    g.loc[1, "stratum"] = "Šumava"
    sched = g.copy()
    sched["period"] = pd.array(np.where(g["period"] > 0, g["period"], 0), dtype="Int64")
    sched.loc[g["period"] == 0, "period"] = pd.NA
    run = run_table(
        {"npv": 123.5, "stands_path": "Šumava/stands.gpkg", "settings_json": s.to_json()}
    )
    layers = {
        "schedule": sched,
        "openings": op,
        "periods": outputs.period_table(g, s, op),
        "strata": outputs.strata_table(g, s),
        "run": run,
    }
    return layers, g, edges, init, s


# ---------------------------------------------------------------------------------------
def test_openings_hand_example():
    # Four 100 m squares in a row A-B-C-D (1 ha each). A, B cut in 1, C in 2, D never;
    # green-up 2 periods: a stand cut in q is open in q .. q + G - 1 (green-up rule,
    # common practice, no source). Worked by hand: P1 {A,B}; P2 {A,B,C} (A, B still
    # open); P3 {C}; P4 none.
    sq = [shapely.box(100 * i, 0, 100 * (i + 1), 100) for i in range(4)]
    g = gpd.GeoDataFrame({"stand_id": list("ABCD"), "period": [1, 1, 2, 0]}, geometry=sq,
                         crs="EPSG:32610")  # fmt: skip
    edges = np.array([[0, 1], [1, 2], [2, 3]])
    init = np.zeros((4, 4), dtype=bool)
    op, sid = outputs.opening_table(g, edges, 4, np.full(4, 2), init, 1.5, np.ones(4))
    assert list(op["opening_id"]) == ["P01-0001", "P02-0001", "P03-0001"]
    assert list(op["stand_ids"]) == ["A,B", "A,B,C", "C"]
    assert list(op["gross_area_ha"]) == [2.0, 3.0, 1.0]
    assert list(op["new_harvest_gross_ha"]) == [2.0, 1.0, 0.0]
    assert list(op["stand_count"]) == [2, 3, 1]
    assert (op["max_opening_ha"] == 1.5).all()
    assert list(sid) == ["P01-0001", "P01-0001", "P02-0001", ""]
    # The dissolved polygon of P2 is the 300 m x 100 m rectangle (plain geometry).
    assert op.geometry.iloc[1].area == pytest.approx(30_000.0)
    assert op.crs == g.crs


def test_openings_young_stand_joins():
    # D young at the start (open in P1 only) joins C's opening in P1: recent clearcuts
    # and young stands count together (green-up rule, common practice, no source).
    sq = [shapely.box(100 * i, 0, 100 * (i + 1), 100) for i in range(4)]
    g = gpd.GeoDataFrame({"stand_id": list("ABCD"), "period": [0, 0, 1, 0]}, geometry=sq,
                         crs="EPSG:32610")  # fmt: skip
    init = np.zeros((4, 3), dtype=bool)
    init[3, 0] = True
    op, sid = outputs.opening_table(g, np.array([[0, 1], [1, 2], [2, 3]]), 3, 1, init, None,
                                    np.ones(4))  # fmt: skip
    assert list(op["stand_ids"]) == ["C,D"]
    assert op["new_harvest_gross_ha"].iloc[0] == 1.0
    assert np.isnan(op["max_opening_ha"].iloc[0])
    assert list(sid) == ["", "", "P01-0001", ""]


def test_openings_match_networkx_components():
    g, edges, init, _s = make_plan(3, n=80)
    G = 2
    op, sid = outputs.opening_table(g, edges, P, np.full(len(g), G), init, 40.0,
                                    g["area_ha"].to_numpy())  # fmt: skip
    per = g["period"].to_numpy()
    ids = g["stand_id"].to_numpy()
    area = g["area_ha"].to_numpy()
    for p in range(1, P + 1):
        is_open = ((per > 0) & (per <= p) & (p <= per + G - 1)) | init[:, p - 1]
        # Reference: networkx connected components of the subgraph of open stands.
        graph = nx.Graph()
        graph.add_nodes_from(np.flatnonzero(is_open))
        graph.add_edges_from((a, b) for a, b in edges if is_open[a] and is_open[b])
        want = {frozenset(ids[list(c)]) for c in nx.connected_components(graph)}
        got_rows = op[op["period"] == p]
        got = {frozenset(s.split(",")) for s in got_rows["stand_ids"]}
        assert got == want
        for _, row in got_rows.iterrows():
            members = np.isin(ids, row["stand_ids"].split(","))
            assert row["gross_area_ha"] == pytest.approx(area[members].sum())
            # Stands tile the plane without overlap: union area = sum of areas.
            assert row.geometry.area / 10_000 == pytest.approx(area[members].sum(), rel=1e-6)
    for i in np.flatnonzero(per > 0):
        row = op[op["opening_id"] == sid[i]].iloc[0]
        assert row["period"] == per[i]
        assert ids[i] in row["stand_ids"].split(",")
    assert (sid[per == 0] == "").all()


def test_period_table_against_pandas():
    g, edges, init, s = make_plan(5)
    s = s.with_overrides({"rules.flow_tolerance": 0.1, "rules.period_volume_max_m3": 9e9})
    op, _ = outputs.opening_table(g, edges, P, 2, init, 40.0, g["area_ha"].to_numpy())
    t = outputs.period_table(g, s, op)
    assert list(t["period"]) == list(range(1, P + 1))
    cut = g[g["period"] > 0]
    cut = cut.assign(harvest_npv=cut["npv"] - cut["ending_value_npv"])
    ref = cut.groupby("period").agg(a=("area_ha", "sum"), v=("volume_m3", "sum"),
                                    d=("harvest_npv", "sum"), gv=("gross_value", "sum"))  # fmt: skip
    ref = ref.reindex(range(1, P + 1), fill_value=0.0)
    np.testing.assert_allclose(t["harvest_net_area_ha"], ref["a"])
    np.testing.assert_allclose(t["harvest_volume_m3"], ref["v"])
    np.testing.assert_allclose(t["npv"], ref["d"])
    np.testing.assert_allclose(t["gross_value"], ref["gv"])
    for p in range(1, P + 1):
        sub = cut[cut["period"] == p]
        if len(sub):  # area-weighted mean (numpy.average as reference)
            assert t.loc[p - 1, "mean_age_at_harvest_yr"] == pytest.approx(
                np.average(sub["age_at_harvest_yr"], weights=sub["area_ha"])
            )
        assert t.loc[p - 1, "largest_opening_ha"] == pytest.approx(
            op.loc[op["period"] == p, "gross_area_ha"].max() if (op["period"] == p).any() else 0.0
        )
    # Flow band from the even-flow rule |V[p+1] - V[p]| <= tol V[p] (common practice in
    # harvest scheduling, no source).
    v = ref["v"].to_numpy()
    assert np.isnan(t.loc[0, "flow_lower_m3"])
    assert t.loc[0, "flow_upper_m3"] == 9e9
    np.testing.assert_allclose(t["flow_lower_m3"].iloc[1:], 0.9 * v[:-1])
    np.testing.assert_allclose(t["flow_upper_m3"].iloc[1:], 1.1 * v[:-1])
    ok = np.r_[True, (v[1:] >= 0.9 * v[:-1] - 1e-6) & (v[1:] <= 1.1 * v[:-1] + 1e-6)]
    assert list(t["flow_ok"]) == list(ok)
    # Calendar years: start_year + (p - 1) L .. + L, middle at + (p - 0.5) L.
    np.testing.assert_allclose(t["mid_year"], (np.arange(1, P + 1) - 0.5) * L)
    t = outputs.period_table(g, s.with_overrides({"horizon.start_year": 2027}), op)
    np.testing.assert_allclose(t["start_year"], 2027 + np.arange(P) * L)
    np.testing.assert_allclose(t["end_year"], 2027 + np.arange(1, P + 1) * L)
    np.testing.assert_allclose(t["mid_year"], 2027 + (np.arange(1, P + 1) - 0.5) * L)
    assert (t["max_opening_ha"] == 40.0).all()  # the limit, beside the measured largest
    assert t["old_forest_share"].isna().all() and t["standing_volume_m3"].isna().all()


def make_harvests(g: gpd.GeoDataFrame, seed: int = 1, periods: int = P) -> pd.DataFrame:
    """Made-up harvests of ``g``'s plan: every stand cut in ``period`` is cut again, with
    probability 1/2, at least two periods later (regenerated as ``R-<stratum>``)."""
    rng = np.random.default_rng(seed)
    rows = []
    for sid, q, stratum, a in zip(g["stand_id"], g["period"], g["stratum"], g["area_ha"],
                                  strict=True):  # fmt: skip
        if q <= 0:
            continue
        rows.append((sid, 1, q, stratum, 3.0 * a, 100.0 * a))
        if q + 2 <= periods and rng.random() < 0.5:
            rows.append((sid, 2, int(rng.integers(q + 2, periods + 1)), f"R-{stratum}",
                         2.0 * a, 40.0 * a))  # fmt: skip
    h = pd.DataFrame(rows, columns=["stand_id", "harvest", "period", "stratum", "volume_m3",
                                    "npv"])  # fmt: skip
    h["age_at_harvest_yr"] = 10.0 * h["harvest"]
    h["gross_value"] = 25.0 * h["volume_m3"]
    return h


def test_openings_after_every_harvest_hand_example():
    # Three 1 ha squares A-B-C in a row. A cut in 1 and again in 4, C in 2, green-up 2
    # periods: a stand cut in q is open in q .. q + G - 1 after each of its harvests
    # (green-up rule, common practice, no source). Worked by hand: P1 {A}; P2 {A} and
    # {C} (B in between stays closed); P3 {C}; P4 {A}; P5 {A}.
    sq = [shapely.box(100 * i, 0, 100 * (i + 1), 100) for i in range(3)]
    g = gpd.GeoDataFrame({"stand_id": list("ABC"), "period": [1, 0, 2]}, geometry=sq,
                         crs="EPSG:32610")  # fmt: skip
    h = pd.DataFrame({"stand_id": ["A", "A", "C"], "harvest": [1, 2, 1], "period": [1, 4, 2]})
    op, sid = outputs.opening_table(g, np.array([[0, 1], [1, 2]]), 5, 2, np.zeros((3, 5), bool),
                                    1.5, np.ones(3), harvests=h)  # fmt: skip
    assert list(zip(op["period"], op["stand_ids"], strict=True)) == [
        (1, "A"),
        (2, "A"),
        (2, "C"),
        (3, "C"),
        (4, "A"),
        (5, "A"),
    ]
    assert list(op["new_harvest_gross_ha"]) == [1.0, 0.0, 1.0, 0.0, 1.0, 0.0]
    assert list(sid) == ["P01-0001", "", "P02-0002"]  # the opening of the first harvest
    # Without the harvests table the second cut of A is unknown: P4 and P5 stay empty.
    op1, _ = outputs.opening_table(g, np.array([[0, 1], [1, 2]]), 5, 2, None, 1.5, np.ones(3))
    assert sorted(set(op1["period"])) == [1, 2, 3]


def test_multi_harvest_openings_and_tables_against_networkx_and_pandas():
    g, edges, init, s = make_plan(4, n=70)
    h = make_harvests(g)
    assert (h["harvest"] == 2).any()
    G = 2
    op, sid = outputs.opening_table(g, edges, P, np.full(len(g), G), init, 40.0,
                                    g["area_ha"].to_numpy(), harvests=h)  # fmt: skip
    ids = g["stand_id"].to_numpy()
    pos = {v: k for k, v in enumerate(ids)}
    for p in range(1, P + 1):
        is_open = init[:, p - 1].copy()
        for sid_, q in zip(h["stand_id"], h["period"], strict=True):
            is_open[pos[sid_]] |= q <= p <= q + G - 1
        # Reference: networkx connected components of the subgraph of open stands.
        graph = nx.Graph()
        graph.add_nodes_from(np.flatnonzero(is_open))
        graph.add_edges_from((a, b) for a, b in edges if is_open[a] and is_open[b])
        want = {frozenset(ids[list(c)]) for c in nx.connected_components(graph)}
        assert {frozenset(x.split(",")) for x in op.loc[op["period"] == p, "stand_ids"]} == want
    # A stand's opening id is that of its first harvest.
    first = h[h["harvest"] == 1].set_index("stand_id")["period"]
    for i in np.flatnonzero(sid != ""):
        row = op[op["opening_id"] == sid[i]].iloc[0]
        assert row["period"] == first[ids[i]] and ids[i] in row["stand_ids"].split(",")
    assert set(ids[sid != ""]) == set(first.index)
    # Every harvest counts in its period (pandas groupby as the reference).
    t = outputs.period_table(g, s, op, harvests=h)
    ref = h.merge(g[["stand_id", "area_ha"]], on="stand_id").groupby("period").agg(
        a=("area_ha", "sum"), v=("volume_m3", "sum"), d=("npv", "sum"), n=("npv", "size"),
        gv=("gross_value", "sum"))  # fmt: skip
    ref = ref.reindex(range(1, P + 1), fill_value=0.0)
    np.testing.assert_allclose(t["harvest_net_area_ha"], ref["a"])
    np.testing.assert_allclose(t["harvest_volume_m3"], ref["v"])
    np.testing.assert_allclose(t["npv"], ref["d"])
    np.testing.assert_allclose(t["gross_value"], ref["gv"])
    assert t["stands_harvested"].tolist() == ref["n"].astype(int).tolist()
    # Strata by the crop cut: a regrown crop counts in its own stratum.
    st = outputs.strata_table(g, s, harvests=h)
    got = st.pivot(index="stratum", columns="period", values="harvest_volume_m3")
    want = h.pivot_table(index="stratum", columns="period", values="volume_m3", aggfunc="sum")
    want = want.reindex(index=got.index, columns=range(1, P + 1)).fillna(0.0)
    np.testing.assert_allclose(got.to_numpy(), want.to_numpy())
    assert any(x.startswith("R-") for x in st["stratum"])


def test_period_table_non_declining():
    g, _e, _i, s = make_plan(5)
    s = s.with_overrides({"rules.flow_tolerance": 0.2, "rules.non_declining": True})
    t = outputs.period_table(g, s)
    v = t["harvest_volume_m3"].to_numpy()
    np.testing.assert_allclose(t["flow_lower_m3"].iloc[1:], v[:-1])  # V[p+1] >= V[p]
    np.testing.assert_allclose(t["flow_upper_m3"].iloc[1:], 1.2 * v[:-1])


def test_strata_table_against_pandas():
    g, _e, _i, s = make_plan(11)
    t = outputs.strata_table(g, s)
    strata = sorted(g["stratum"].unique())
    assert len(t) == len(strata) * P
    ref = g[g["period"] > 0].pivot_table(index="stratum", columns="period", values="volume_m3",
                                         aggfunc="sum", fill_value=0.0)  # fmt: skip
    ref = ref.reindex(index=strata, columns=range(1, P + 1), fill_value=0.0)
    got = t.pivot(index="stratum", columns="period", values="harvest_volume_m3")
    np.testing.assert_allclose(got.to_numpy(), ref.to_numpy())
    tot = g.groupby("stratum")["area_ha"].sum()
    np.testing.assert_allclose(t.groupby("stratum")["stratum_net_area_ha"].first(), tot[strata])


# ---------------------------------------------------------------------------------------
LAYER_STYLES_COLUMNS = [  # the desktop-GIS layer_styles convention (QGIS documentation)
    "id",
    "f_table_catalog",
    "f_table_schema",
    "f_table_name",
    "f_geometry_column",
    "styleName",
    "styleQML",
    "styleSLD",
    "useAsDefault",
    "description",
    "owner",
    "ui",
    "update_time",
]


def test_geopackage_layers_tables_and_styles(tmp_path):
    layers, g, *_ = make_layers()
    path = tmp_path / "plan.gpkg"
    outputs.write_plan_geopackage(path, layers)
    listed = {str(a): b for a, b in pyogrio.list_layers(path)}
    for name in ("schedule", "openings", "periods", "strata", "run", "layer_styles"):
        assert name in listed
    assert listed["periods"] is None
    assert listed["run"] is None
    con = sqlite3.connect(path)
    kinds = dict(con.execute("SELECT table_name, data_type FROM gpkg_contents"))
    assert kinds["schedule"] == "features"
    assert kinds["openings"] == "features"
    for t in ("periods", "strata", "run", "layer_styles"):
        assert kinds[t] == "attributes"
    # GeoPackage standard (OGC 12-128r18, 1.1.3): application_id "GPKG".
    assert con.execute("PRAGMA application_id").fetchone()[0] == 0x47504B47

    sched = gpd.read_file(path, layer="schedule")
    assert sched.crs == g.crs
    for col in ("stand_id", "period", "age_at_harvest_yr", "volume_m3", "npv", "opening_id"):
        assert col in sched.columns
    assert set(sched["stratum"]) >= {"Ærø Nord", "Šumava"}
    assert sched["period"].isna().sum() == int((g["period"] == 0).sum())
    op = gpd.read_file(path, layer="openings")
    assert list(op.columns[:-1]) == ["opening_id", "period", "gross_area_ha", "stand_count",
                                     "new_harvest_gross_ha", "max_opening_ha",
                                     "stand_ids"]  # fmt: skip
    per = pyogrio.read_dataframe(path, layer="periods")
    assert {"start_year", "end_year", "mid_year", "harvest_net_area_ha", "harvest_volume_m3",
            "gross_value", "npv", "mean_age_at_harvest_yr", "largest_opening_ha",
            "max_opening_ha", "flow_lower_m3", "flow_upper_m3", "old_forest_share",
            "standing_volume_m3"} <= set(per.columns)  # fmt: skip
    run = read_run_table(path)
    assert run["stands_path"] == "Šumava/stands.gpkg"
    assert Settings().with_overrides({"horizon.periods": P}).to_json() == run["settings_json"]

    cols = [r[1] for r in con.execute("PRAGMA table_info(layer_styles)")]
    assert cols == LAYER_STYLES_COLUMNS
    geom_cols = dict(con.execute("SELECT table_name, column_name FROM gpkg_geometry_columns"))
    rows = con.execute("SELECT f_table_name, f_geometry_column, styleQML, styleSLD, useAsDefault "
                       "FROM layer_styles ORDER BY f_table_name").fetchall()  # fmt: skip
    con.close()
    assert [r[0] for r in rows] == ["openings", "schedule"]
    colours = outputs.period_colours(P)
    for table, gcol, qml, sld, default in rows:
        assert gcol == geom_cols[table]
        assert default == 1
        q = ET.fromstring(qml)
        ET.fromstring(sld)
        renderer = q.find("renderer-v2")
        assert renderer is not None
        if table == "schedule":
            assert renderer.get("type") == "categorizedSymbol"
            assert renderer.get("attr") == "period"
            cats = renderer.findall("categories/category")
            assert [c.get("value") for c in cats] == [str(p) for p in range(1, P + 1)] + [""]
            fills = []
            for c in cats:
                sym = renderer.find(f"symbols/symbol[@name='{c.get('symbol')}']")
                opt = sym.find("layer/Option/Option[@name='color']")
                rgb = [int(x) for x in opt.get("value").split(",")[:3]]
                fills.append("#{:02x}{:02x}{:02x}".format(*rgb))
            assert fills == [*colours, outputs.NOT_HARVESTED_COLOUR]


def test_geopackage_keeps_other_crs(tmp_path):
    layers, _g, *_ = make_layers()
    layers["schedule"] = layers["schedule"].to_crs("EPSG:3035")
    layers["openings"] = layers["openings"].to_crs("EPSG:3035")
    path = tmp_path / "laea.gpkg"
    outputs.write_plan_geopackage(path, layers)
    assert gpd.read_file(path, layer="schedule").crs.to_epsg() == 3035
    assert gpd.read_file(path, layer="openings").crs.to_epsg() == 3035


def _sha(p):
    return hashlib.sha256(p.read_bytes()).hexdigest()


def test_geopackage_atomic_on_failure(tmp_path, monkeypatch):
    layers, *_ = make_layers()
    path = tmp_path / "plan.gpkg"
    outputs.write_plan_geopackage(path, layers)
    before = _sha(path)

    def boom(*_a, **_k):
        msg = "disk full (simulated)"
        raise OSError(msg)

    monkeypatch.setattr(outputs, "_add_styles", boom)  # fails after the layers are written
    with pytest.raises(OSError, match="simulated"):
        outputs.write_plan_geopackage(path, layers)
    assert _sha(path) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["plan.gpkg"]


def test_geopackage_missing_folder(tmp_path):
    layers, *_ = make_layers()
    with pytest.raises(OutputError, match="does not exist"):
        outputs.write_plan_geopackage(tmp_path / "nope" / "plan.gpkg", layers)


# ---------------------------------------------------------------------------------------
def _inventory(tmp_path):
    g = voronoi_forest(30, seed=2)
    g["name"] = ["Ærø Nord", "Šumava", *[f"x{i}" for i in range(len(g) - 2)]]
    path = tmp_path / "forest.gpkg"
    g.to_file(path, layer="stands", driver="GPKG")
    track = shapely.LineString([(500_000, 5_200_000), (500_500, 5_200_300)])
    roads = gpd.GeoDataFrame({"kind": ["track"]}, geometry=[track], crs=g.crs)
    roads.to_file(path, layer="roads", driver="GPKG")
    pyogrio.write_dataframe(pd.DataFrame({"k": ["a"], "v": ["ø"]}), path, layer="notes")
    return path


def test_write_back_keeps_original_layers(tmp_path):
    src = _inventory(tmp_path)
    before = {n: pyogrio.read_dataframe(src, layer=n) for n in ("stands", "roads")}
    notes = pyogrio.read_dataframe(src, layer="notes")
    layers, *_ = make_layers()
    written = outputs.write_back(src, layers)
    assert written == [f"plan_{k}" for k in layers]
    names = {str(n) for n in pyogrio.list_layers(src)[:, 0]}
    assert {"stands", "roads", "notes", "plan_schedule", "plan_openings", "plan_run"} <= names
    for n, df in before.items():  # geopandas' own equality check as the reference
        assert_geodataframe_equal(pyogrio.read_dataframe(src, layer=n), df)
    pd.testing.assert_frame_equal(pyogrio.read_dataframe(src, layer="notes"), notes)
    con = sqlite3.connect(src)
    styled = {r[0] for r in con.execute("SELECT f_table_name FROM layer_styles")}
    con.close()
    assert styled == {"plan_schedule", "plan_openings"}
    # A second write-back replaces the plan layers it wrote before.
    outputs.write_back(src, layers)
    assert len(pyogrio.read_dataframe(src, layer="plan_openings")) == len(layers["openings"])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["forest.gpkg"]


def test_write_back_refuses_foreign_layer_and_other_formats(tmp_path):
    src = _inventory(tmp_path)
    g = pyogrio.read_dataframe(src, layer="stands")
    g.to_file(src, layer="plan_schedule", driver="GPKG")  # someone's own layer of that name
    before = _sha(src)
    layers, *_ = make_layers()
    with pytest.raises(OutputError, match="plan_schedule"):
        outputs.write_back(src, layers)
    assert _sha(src) == before
    shp = tmp_path / "stands.shp"
    g.to_file(shp)
    with pytest.raises(OutputError, match="GeoPackage"):
        outputs.write_back(shp, layers)
    fake = tmp_path / "fake.gpkg"
    fake.write_text("not a database", encoding="utf-8")
    with pytest.raises(OutputError, match="GeoPackage"):
        outputs.write_back(fake, layers)


def test_write_back_detects_changed_layer(tmp_path, monkeypatch):
    src = _inventory(tmp_path)
    before = _sha(src)
    layers, *_ = make_layers()
    real = outputs._read_layer
    calls = {"n": 0}

    def tampered(path, layer):
        df = real(path, layer)
        calls["n"] += 1
        if layer == "roads" and ".tmp" in str(path):  # the copy reads back different
            df = df.assign(kind="changed")
        return df

    monkeypatch.setattr(outputs, "_read_layer", tampered)
    with pytest.raises(OutputError, match="roads"):
        outputs.write_back(src, layers)
    assert _sha(src) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["forest.gpkg"]


# ---------------------------------------------------------------------------------------
def test_period_raster(tmp_path):
    import rasterio

    g, *_ = make_plan(9)
    path = tmp_path / "period.tif"
    outputs.write_period_raster(g, path, 10.0)
    with rasterio.open(path) as src:
        assert src.crs.to_epsg() == 32610
        assert src.nodata == 0
        assert src.res == (10.0, 10.0)
        pts = shapely.get_coordinates(g.geometry.representative_point())
        vals = np.array([v[0] for v in src.sample(pts)])
    np.testing.assert_array_equal(vals, g["period"].to_numpy())
    with pytest.raises(OutputError, match="projected"):
        outputs.write_period_raster(g.to_crs(4326), tmp_path / "geo.tif", 10.0)


# ---------------------------------------------------------------------------------------
def _lstar(hex_colour: str) -> float:
    # CIE 1976 L* from sRGB (IEC 61966-2-1 linearisation, D65 luminance weights).
    c = np.array(to_rgb(hex_colour))
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    y = float(lin @ np.array([0.2126, 0.7152, 0.0722]))
    return 116 * y ** (1 / 3) - 16 if y > (6 / 29) ** 3 else y * (29 / 3) ** 3


@pytest.mark.parametrize("periods", [2, 5, 10, 20])
def test_period_colours_ordered(periods):
    cols = outputs.period_colours(periods)
    ref = [to_hex(colormaps["viridis"](x)) for x in np.linspace(0, 0.9, periods)]
    assert cols == ref
    light = [_lstar(c) for c in cols]
    assert all(b > a for a, b in itertools.pairwise(light))
    # The neutral for unharvested stands is lighter than every period colour.
    assert _lstar(outputs.NOT_HARVESTED_COLOUR) > max(light) + 3
