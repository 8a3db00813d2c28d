"""Offline HTML map: no web resources, escaped attributes, every stand embedded."""

from __future__ import annotations

import html
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from spatialplan import mapping, outputs
from spatialplan.errors import OutputError, SettingsError
from spatialplan.report import CAUTIONS
from tests.plan_frames import START, L, estate_plan
from tests.plan_frames import P as EP
from tests.test_outputs import P, make_plan

PAYLOAD = "<script>alert(1)</script>"


def build(tmp_path: Path, **kw):
    g, edges, init, _s = make_plan(4)
    op, sid = outputs.opening_table(g, edges, P, 2, init, 40.0, g["area_ha"].to_numpy())
    g["opening_id"] = sid
    g.loc[0, "stratum"] = PAYLOAD
    g.loc[1, "stratum"] = "Ærø Nord"
    g.loc[2, "stand_id"] = "Šumava 7"
    path = tmp_path / "plan.map.html"
    mapping.write_map(g, op, path, periods=P, title=kw.pop("title", "Plan Šumava"), **kw)
    return g, op, path, path.read_text(encoding="utf-8")


class _Tags(HTMLParser):
    """Records start tags with their attributes and the text of each <script>."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.scripts: list[str] = []
        self._in_script = False

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        self._in_script = tag == "script"
        if self._in_script:
            self.scripts.append("")

    def handle_endtag(self, tag):
        if tag == "script":
            self._in_script = False

    def handle_data(self, data):
        if self._in_script:
            self.scripts[-1] += data


def geojson_blocks(text: str) -> list[dict]:
    """The FeatureCollections folium embeds as ``..._add({...});`` calls."""
    out = []
    for m in re.finditer(r"_add\((\{\"features\".*?\})\);\n", text):
        out.append(json.loads(m.group(1)))
    return out


class _Spans(HTMLParser):
    """Text of the sp-lab / sp-n spans of one layer label."""

    def __init__(self) -> None:
        super().__init__()
        self.parts: dict[str, str] = {}
        self._cls: str | None = None

    def handle_starttag(self, tag, attrs):
        self._cls = dict(attrs).get("class")

    def handle_data(self, data):
        if self._cls in ("sp-lab", "sp-n"):
            self.parts[self._cls] = self.parts.get(self._cls, "") + data


def overlay_layers(text: str) -> dict[str, dict]:
    """Layer-control overlays by label: the count text and the GeoJSON features in each.

    folium writes ``"<label html>" : feature_group_X`` entries, ``geo_json_Y_add({...})``
    calls and ``geo_json_Y.addTo(feature_group_X)``; the label is HTML (JSON-escaped).
    """
    data = {
        m.group(1): json.loads(m.group(2))
        for m in re.finditer(r"(geo_json_\w+)_add\((\{\"features\".*?\})\);\n", text)
    }
    group_of = dict(re.findall(r"(geo_json_\w+)\.addTo\((feature_group_\w+)\);", text))
    feats: dict[str, list] = {}
    for gj, grp in group_of.items():
        feats.setdefault(grp, []).extend(data.get(gj, {}).get("features", []))
    out = {}
    for m in re.finditer(r'^\s*("(?:[^"\\]|\\.)*") : (feature_group_\w+),$', text, re.M):
        spans = _Spans()
        spans.feed(json.loads(m.group(1)))
        out[spans.parts["sp-lab"]] = {
            "count": spans.parts.get("sp-n", ""),
            "features": feats.get(m.group(2), []),
        }
    return out


def tip_fields(tip: str) -> dict[str, str]:
    """A stand tooltip (``<table><tr><th>label</th><td>value</td></tr>...``) as a dict."""
    cells = re.findall(r"<tr><th>(.*?)</th><td>(.*?)</td></tr>", tip)
    return {html.unescape(k): html.unescape(v) for k, v in cells}


def test_map_is_offline_and_complete(tmp_path):
    g, op, _path, text = build(tmp_path)
    parser = _Tags()
    parser.feed(text)
    for tag, attrs in parser.tags:
        for key in ("src", "href"):
            val = attrs.get(key) or ""
            assert not re.match(r"\s*(https?:)?//", val), (tag, key, val)
    assert not re.search(r"(src|href)=\"https?:", text)
    assert "cdn." not in text
    assert "<link" not in text
    # Leaflet itself is inlined (version banner of the vendored file).
    assert "Leaflet 1.9.4" in (Path(mapping.VENDOR) / "leaflet.js").read_text(encoding="utf-8")
    assert any("Leaflet 1.9.4" in s for s in parser.scripts)
    feats = [f for b in geojson_blocks(text) for f in b["features"]]
    stands = [f for f in feats if f["properties"]["sp_kind"] != "opening"]
    openings = [f for f in feats if f["properties"]["sp_kind"] == "opening"]
    assert len(stands) == len(g)
    assert len(openings) == len(op)
    # One toggleable overlay per period in the layer control, and one per period for its
    # openings (off when the map opens); no start year set: years from the plan start.
    layers = overlay_layers(text)
    assert "L.control.layers" in text
    for p in range(1, P + 1):
        n = int((g["period"] == p).sum())
        yrs = f"yr {(p - 1) * 5:g}–{p * 5:g}"
        label = f"Period {p} ({yrs})"
        assert layers[label]["count"].startswith(f"{n} stands, ")
        assert len(layers[label]["features"]) == n
        k = int((op["period"] == p).sum())
        assert layers[f"Openings in period {p} ({yrs})"]["count"] == f"{k} openings"


def test_map_escapes_attributes(tmp_path):
    _g, _op, _path, text = build(tmp_path, title="Plan <b>bold</b>")
    assert PAYLOAD not in text
    parser = _Tags()
    parser.feed(text)
    # A raw payload would open a <script> element whose text starts with alert(1).
    assert not any(s.strip().startswith("alert(1)") for s in parser.scripts)
    # Tooltips: the payload is there only as escaped text; parsed as HTML it makes no tag.
    tips = [f["properties"]["sp_tip"] for b in geojson_blocks(text) for f in b["features"]]
    hit = [t for t in tips if "alert(1)" in t]
    assert len(hit) == 1
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in hit[0]
    tp = _Tags()
    tp.feed(hit[0])
    assert {t for t, _a in tp.tags} <= {"table", "tr", "th", "td"}
    assert any("Ærø Nord" in t for t in tips)
    assert any("Šumava 7" in t for t in tips)
    assert "<b>bold</b>" not in text
    assert "Plan &lt;b&gt;bold&lt;/b&gt;" in text


def test_map_styles_by_period(tmp_path):
    g, _op, _path, text = build(tmp_path)
    cols = outputs.period_colours(P)
    for c in cols:
        assert f'"fillColor": "{c}"' in text
    assert f'"fillColor": "{outputs.NOT_HARVESTED_COLOUR}"' in text
    assert '"dashArray": "5 4"' in text  # reserves
    # Bounds fitted to the stands, in EPSG:4326 (pyproj via geopandas as the reference).
    minx, miny, maxx, maxy = g.to_crs(4326).total_bounds
    m = re.search(r"fitBounds\(\s*\[\[([-\d.]+), ([-\d.]+)\], \[([-\d.]+), ([-\d.]+)\]\]", text)
    assert m is not None
    np.testing.assert_allclose([float(x) for x in m.groups()], [miny, minx, maxy, maxx], atol=1e-9)


def test_map_basemap_opt_in(tmp_path):
    url = "https://tiles.example.org/{z}/{x}/{y}.png"
    _g, _op, _path, text = build(tmp_path, basemap=url)
    assert "tiles.example.org" in text
    with pytest.raises(SettingsError, match="basemap"):
        build(tmp_path, basemap="tiles.example.org")


def test_map_atomic(tmp_path, monkeypatch):
    _g, _op, path, text = build(tmp_path)

    def boom(self, *_a, **_k):
        msg = "no space left (simulated)"
        raise OSError(msg)

    monkeypatch.setattr(Path, "write_text", boom)
    with pytest.raises(OutputError, match="simulated"):
        build(tmp_path)
    monkeypatch.undo()
    assert path.read_text(encoding="utf-8") == text
    assert sorted(p.name for p in tmp_path.iterdir()) == ["plan.map.html"]


def test_map_needs_crs(tmp_path):
    g, *_ = make_plan(4)
    with pytest.raises(OutputError, match="CRS"):
        mapping.write_map(g.set_crs(None, allow_override=True), None, tmp_path / "m.html",
                          periods=P, title="x")  # fmt: skip


# ---------------------------------------------------------------------------------------
# the estate model: several harvests per stand, calendar years, terrain, cautions
def estate_map(tmp_path: Path, ep=None, **kw):
    ep = ep or estate_plan()
    path = tmp_path / "estate.map.html"
    args = {"harvests": ep.harvests, "start_year": START, "period_length_yr": L,
            "report_href": "estate.report.html"}  # fmt: skip
    args.update(kw)
    mapping.write_map(ep.schedule, ep.openings, path, periods=EP, title="Estate plan", **args)
    return ep, path.read_text(encoding="utf-8")


def test_map_period_layers_hold_every_harvest(tmp_path):
    ep, text = estate_map(tmp_path)
    layers = overlay_layers(text)
    h = ep.harvests
    twice = h.groupby("stand_id").size()
    assert (twice == 2).sum() >= 3  # the fixture cuts some stands twice
    net = ep.schedule.set_index("stand_id")["net_area_ha"]
    for p in range(1, EP + 1):
        a, b = START + (p - 1) * L, START + p * L  # calendar years of period p
        layer = layers[f"Period {p} ({a:g}–{b:g})"]
        want = sorted(h.loc[h["period"] == p, "stand_id"])
        got = sorted(tip_fields(f["properties"]["sp_tip"])["Stand"] for f in layer["features"])
        assert got == want
        assert layer["count"] == f"{len(want)} stands, {net[want].sum():,.1f} ha net"
    # A stand cut twice is drawn in both of its period layers.
    n_period_feats = sum(len(v["features"]) for k, v in layers.items() if k.startswith("Period "))
    assert n_period_feats == len(h)


def test_map_tooltips_legend_and_kinds(tmp_path):
    ep, text = estate_map(tmp_path)
    layers = overlay_layers(text)
    s = ep.schedule
    h = ep.harvests
    cut = set(h["stand_id"])
    inop = s["operable"] == 0
    never = ~s["stand_id"].isin(cut)
    res = s["reserve"] == 1
    for label, mask in (
        ("Not harvested", never & ~res & ~inop),
        ("Reserve", never & res),
        ("Inoperable (too steep to log)", never & inop & ~res),
    ):
        layer = layers[label]
        got = sorted(tip_fields(f["properties"]["sp_tip"])["Stand"] for f in layer["features"])
        assert got == sorted(s.loc[mask, "stand_id"])
        assert (
            layer["count"]
            == f"{int(mask.sum())} stands, {s.loc[mask, 'area_ha'].sum():,.1f} ha gross"
        )
        assert {f["properties"]["sp_kind"] for f in layer["features"]} == {
            {"Not harvested": "none", "Reserve": "reserve"}.get(label, "inoperable")
        }
    # Inoperable stands are hatched (an SVG pattern), not filled like "not harvested".
    assert '<pattern id="sp-hatch-inoperable"' in text
    assert '"fillColor": "url(#sp-hatch-inoperable)"' in text
    # Tooltip of a stand cut twice: every harvest period with its calendar years, both
    # areas, terrain columns.
    sid = h.groupby("stand_id").size().idxmax()
    row = s.set_index("stand_id").loc[sid]
    feats = [f for v in layers.values() for f in v["features"]]
    tip = next(tip_fields(f["properties"]["sp_tip"]) for f in feats
               if tip_fields(f["properties"]["sp_tip"])["Stand"] == sid)  # fmt: skip
    periods = h.loc[h["stand_id"] == sid, "period"].tolist()
    assert tip["Harvest periods"] == ", ".join(
        f"{q} ({START + (q - 1) * L:g}–{START + q * L:g})" for q in periods
    )
    assert tip["Stand area (gross, ha)"] == f"{row['area_ha']:,.2f}"
    assert tip["Net area (ha)"] == f"{row['net_area_ha']:,.2f}"
    assert tip["Harvest system"] == row["harvest_system"]
    assert tip["Mean slope (%)"] == f"{row['slope_pct_mean']:,.0f}"
    assert tip["Stratum"] == row["stratum"]
    # The page links the report by a relative path and carries the cautions.
    links = _Tags()
    links.feed(text)
    hrefs = [a.get("href") for t, a in links.tags if t == "a"]
    assert "estate.report.html" in hrefs
    for c in CAUTIONS:
        assert html.escape(c) in text


def test_map_reads_old_names_and_refuses_web_report_link(tmp_path):
    ep = estate_plan()
    old = ep.schedule.drop(columns=["harvest_periods", "harvest_count"]).rename(
        columns={"npv": "value", "age_at_harvest_yr": "age_at_harvest",
                 "harvest_mid_year": "harvest_year"}
    )  # fmt: skip
    ops = ep.openings.rename(columns={"gross_area_ha": "area_ha"})
    path = tmp_path / "old.map.html"
    mapping.write_map(old, ops, path, periods=EP, title="Old plan", start_year=START,
                      period_length_yr=L)  # fmt: skip
    text = path.read_text(encoding="utf-8")
    layers = overlay_layers(text)
    # Without a harvests table the map shows the first harvest (the schedule's period).
    first = ep.schedule["period"].fillna(0).astype(int)
    for p in range(1, EP + 1):
        label = f"Period {p} ({START + (p - 1) * L:g}–{START + p * L:g})"
        assert len(layers[label]["features"]) == int((first == p).sum())
    tips = [tip_fields(f["properties"]["sp_tip"]) for v in layers.values() for f in v["features"]]
    i = int(np.flatnonzero(first.to_numpy() > 0)[0])
    sid = ep.schedule["stand_id"].iloc[i]
    tip = next(t for t in tips if t.get("Stand") == sid)
    assert tip["NPV (discounted, with ending value)"] == f"{ep.schedule['npv'].iloc[i]:,.0f}"
    opening_tips = [t for t in tips if "Opening area (gross, ha)" in t]
    assert len(opening_tips) == len(ops)
    with pytest.raises(OutputError, match="relative path"):
        mapping.write_map(old, ops, path, periods=EP, title="x",
                          report_href="https://example.org/r.html")  # fmt: skip
