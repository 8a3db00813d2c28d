"""Offline HTML map: no web resources, escaped attributes, every stand embedded."""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from spatialplan import mapping, outputs
from spatialplan.errors import OutputError, SettingsError
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
    # One toggleable overlay per period in the layer control.
    for p in range(1, P + 1):
        n = int((g["period"] == p).sum())
        assert f'"Period {p} ({n} stands)"' in text
    assert "L.control.layers" in text
    # ... and one per period for its openings (off when the map opens).
    for p in range(1, P + 1):
        k = int((op["period"] == p).sum())
        assert f'"Openings in period {p} ({k})"' in text


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
