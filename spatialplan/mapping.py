"""Offline HTML map of a harvest plan (folium + a vendored copy of Leaflet).

The map is one self-contained HTML file: Leaflet's JavaScript and CSS (from
``spatialplan/vendor/leaflet``, BSD-2-Clause, see its LICENSE) are inlined, the stand
GeoJSON is embedded, and no tile layer is added unless a basemap URL is given. folium's
default CDN links (Leaflet, jQuery, Bootstrap, Font Awesome ...) are switched off, so the
map draws with no network at all.

Attribute values come from someone else's file: every value shown in a tooltip is
escaped with :func:`html.escape` in Python and only the escaped text is embedded.
"""

from __future__ import annotations

import base64
import html
import json
import re
from collections.abc import Sequence
from functools import cache
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd

from spatialplan import _review as _rv
from spatialplan._io import write_text_atomic
from spatialplan.errors import OutputError, SettingsError
from spatialplan.inventory import is_reserve_flag
from spatialplan.outputs import (
    NOT_HARVESTED_COLOUR,
    OPENING_COLOUR,
    RESERVE_COLOUR,
    STAND_EDGE_COLOUR,
    period_colours,
)

__all__ = ["leaflet_assets", "write_map"]

VENDOR = Path(__file__).parent / "vendor" / "leaflet"


@cache
def leaflet_assets() -> tuple[str, str]:
    """The vendored Leaflet ``(javascript, css)``, ready to inline into one HTML file.

    The CSS refers to a few icon images by relative URL; they are replaced by ``data:``
    URIs so the single file needs nothing beside it. ``</script`` inside the script text
    (none in Leaflet 1.9.4, but cheap to guard) is broken up so it cannot end the tag.
    """
    js = (VENDOR / "leaflet.js").read_text(encoding="utf-8")
    css = (VENDOR / "leaflet.css").read_text(encoding="utf-8")
    js = js.replace("</script", "<\\/script")
    # Leaflet's attribution prefix holds a link to its home page inside a JS string. Writing
    # the "h" as the JS escape \x68 keeps the string identical at run time while the page
    # source then holds no web address in a src or href attribute at all.
    js = re.sub(r'\b(src|href)="http', r'\1="\\x68ttp', js)

    def data_uri(m: re.Match[str]) -> str:
        p = VENDOR / m.group(1)
        if not p.is_file():
            return m.group(0)
        b64 = base64.b64encode(p.read_bytes()).decode("ascii")
        return f"url(data:image/png;base64,{b64})"

    css = re.sub(r"url\((images/[\w\-.]+\.png)\)", data_uri, css)
    return js, css


def _fmt(v: Any, digits: int = 0) -> str:
    if v is None or (isinstance(v, float) and not np.isfinite(v)) or v is pd.NA:
        return "–"
    if isinstance(v, int | np.integer):
        return f"{int(v):,}"
    if isinstance(v, float | np.floating):
        return f"{float(v):,.{digits}f}"
    return str(v)


def _tooltip(row: dict[str, Any], labels: list[tuple[str, str, int]]) -> str:
    cells = "".join(
        f"<tr><th>{html.escape(lbl)}</th><td>{html.escape(_fmt(row.get(col), d))}</td></tr>"
        for lbl, col, d in labels
        if col in row
    )
    return f'<table class="sp-tip">{cells}</table>'


def _reserve_mask(frame: pd.DataFrame, col: str | None) -> np.ndarray:
    if not col or col not in frame.columns:
        return np.zeros(len(frame), dtype=bool)
    return is_reserve_flag(frame[col])


def _features(frame: gpd.GeoDataFrame, tips: list[str], kind: list[str]) -> dict[str, Any]:
    """GeoJSON with only the properties the map needs (escaped tooltip, style key)."""
    import shapely

    geo = shapely.to_geojson(np.asarray(frame.geometry.values))
    feats = [
        {"type": "Feature", "properties": {"sp_tip": t, "sp_kind": k}, "geometry": json.loads(g)}
        for t, k, g in zip(tips, kind, geo, strict=True)
    ]
    return {"type": "FeatureCollection", "features": feats}


# Inoperable stands: a hatch of this colour on a mid neutral, so they read as "cannot be
# logged" and not as "left standing" (plain light fill) or as a reserve (dashed outline).
INOPERABLE_FILL = "#cfc9bd"
INOPERABLE_HATCH = "#7b7366"
_HATCH_ID = "sp-hatch-inoperable"
_HATCH_SVG = (
    '<svg width="0" height="0" style="position:absolute" aria-hidden="true"><defs>'
    f'<pattern id="{_HATCH_ID}" patternUnits="userSpaceOnUse" width="7" height="7" '
    'patternTransform="rotate(45)">'
    f'<rect width="7" height="7" fill="{INOPERABLE_FILL}"/>'
    f'<rect width="2.2" height="7" fill="{INOPERABLE_HATCH}"/></pattern></defs></svg>'
)
_HATCH_CSS = f"repeating-linear-gradient(45deg,{INOPERABLE_HATCH} 0 2px,{INOPERABLE_FILL} 2px 6px)"


def _layer_label(swatch_style: str, label: str, count: str) -> str:
    """A layer-control entry that is also its legend row: swatch, label, count and area.

    Leaflet puts layer names into the page as HTML; every part here is escaped.
    """
    return (
        f'<span class="sp-sw" style="{html.escape(swatch_style, quote=True)}"></span>'
        f'<span class="sp-lab">{html.escape(label)}</span>'
        f'<span class="sp-n">{html.escape(count)}</span>'
    )


_MAP_CSS = (
    "<style>"
    ".leaflet-control-layers{font:12.5px/1.3 sans-serif;max-height:calc(100vh - 30px);"
    "overflow:auto}"
    ".leaflet-control-layers-overlays label{margin:1px 0}"
    ".leaflet-control-layers-overlays label>span{display:flex;align-items:center}"
    ".leaflet-control-layers-overlays label>span>span{flex:1;display:flex;align-items:center;"
    "gap:6px;margin-left:4px}"
    ".sp-group{font-weight:600;color:#333;margin:6px 0 2px;border-bottom:1px solid #ddd}"
    ".sp-lab{flex:1}.sp-n{color:#555;white-space:nowrap;padding-left:10px}"
    ".sp-sw{display:inline-block;flex:none;width:18px;height:12px;border:1px solid #666;"
    "box-sizing:border-box}"
    ".sp-head{position:fixed;top:10px;left:54px;z-index:1000;background:#fff;max-width:330px;"
    "padding:6px 10px;border:1px solid #999;border-radius:4px;font:12.5px/1.35 sans-serif;"
    "box-shadow:0 1px 4px rgba(0,0,0,.3)}"
    ".sp-head h4{margin:0 0 3px;font-size:14px}.sp-head a{color:#1f5c99}"
    ".sp-head p{margin:3px 0 0;color:#444}"
    ".sp-tip th{text-align:left;padding-right:8px;font-weight:600}"
    ".sp-tip td{text-align:right}"
    ".sp-cautions{position:fixed;left:10px;bottom:52px;z-index:1000;max-width:340px;"
    "background:#fff7e6;border:1px solid #d9a441;border-radius:4px;padding:5px 9px;"
    "font:11.5px/1.3 sans-serif;box-shadow:0 1px 4px rgba(0,0,0,.25)}"
    ".sp-cautions summary{cursor:pointer;font-weight:600}"
    ".sp-cautions ul{margin:4px 0 0;padding-left:16px}"
    "</style>"
)


_GROUP_JS = """
window.addEventListener('load', function () {
  var labels = document.querySelectorAll('.leaflet-control-layers-overlays label');
  %s.forEach(function (h) {
    var at = labels[h[0]];
    if (!at) { return; }
    var d = document.createElement('div');
    d.className = 'sp-group';
    d.textContent = h[1];
    at.parentNode.insertBefore(d, at);
  });
});
"""


def _head_html(title: str, report_href: str | None) -> str:
    """Title panel: the plan, a link to its report, how to read the layer list."""
    link = (
        f'<div><a href="{html.escape(report_href, quote=True)}">Open the plan report</a> '
        "(rules, sustainability, tables)</div>"
        if report_href
        else ""
    )
    return (
        f'<div class="sp-head" id="sp-legend"><h4>{html.escape(title)}</h4>{link}'
        "<p>The list on the right is the legend: stands harvested in each period (stand "
        "count and net harvest area), stands not harvested (gross area) and the openings "
        "of each period; tick a line to show or hide it. A stand cut twice is in two "
        "period layers, the later cut drawn on top; hover a stand for all its harvest "
        "periods.</p></div>"
    )


def _cautions_html(cautions: Sequence[str]) -> str:
    if not cautions:
        return ""
    items = "".join(f"<li>{html.escape(c)}</li>" for c in cautions)
    return (
        '<details class="sp-cautions" id="sp-cautions" open><summary>Cautions: a planning '
        f"aid, not a harvest permit</summary><ul>{items}</ul></details>"
    )


def _check_basemap(url: str) -> None:
    ok = re.match(r"^(https?|file)://", url) and all(t in url for t in ("{z}", "{x}", "{y}"))
    if not ok:
        msg = (
            f"output.basemap / --basemap must be a tile URL template with {{z}}, {{x}} and {{y}}, "
            f"got {url!r}"
        )
        raise SettingsError(msg)


_EXTERNAL = re.compile(
    r"<(?:script|link|img)\b[^>]*\b(?:src|href)\s*=\s*[\"']?\s*(?:https?:)?//", re.I
)


def _period_text(periods: list[int], years: np.ndarray, calendar: bool) -> str:
    return ", ".join(
        f"{p} ({_rv.years_text(years[p - 1, 0], years[p - 1, 1], calendar)})"
        if 1 <= p <= len(years)
        else str(p)
        for p in periods
    )


def write_map(
    schedule: gpd.GeoDataFrame,
    openings: gpd.GeoDataFrame | None,
    path: str | Path,
    *,
    id_col: str = "stand_id",
    stratum_col: str = "stratum",
    reserve_col: str | None = "reserve",
    periods: int,
    title: str,
    basemap: str | None = None,
    age_col: str = "age",
    show_openings: bool = False,
    harvests: pd.DataFrame | None = None,
    start_year: int = 0,
    period_length_yr: float = 5.0,
    report_href: str | None = None,
    cautions: Sequence[str] | None = None,
) -> None:
    """Write a self-contained, offline HTML map of the plan.

    Stands are filled by harvest period (viridis, dark = early, light = late). Each period
    is one layer of the stands harvested in it, first harvest or a later one, so a stand
    cut twice is in two period layers. Stands never harvested are a light neutral,
    reserves have a dashed dark outline, inoperable stands are hatched; each period's
    openings are another layer (off at first). The legend gives calendar years, stand
    count and net area per period; the page links the report and carries the cautions.

    Parameters
    ----------
    schedule
        The ``schedule`` layer: ``period`` (first harvest), ``harvest_periods``, areas,
        ``operable``, terrain columns ...; any CRS (reprojected to EPSG:4326). Old column
        names are read too.
    openings
        The ``openings`` layer (or ``None``).
    path
        Target ``.html`` (written atomically).
    id_col, stratum_col, reserve_col
        Columns shown in tooltips / used to mark reserves.
    periods
        Number of planning periods.
    title
        Map title (shown in the legend and the page title; escaped).
    basemap
        Optional tile URL template (``https://.../{z}/{x}/{y}.png``); off by default so
        the map needs no network.
    age_col
        Column with the age at the start (``fields.age_field``); shown when present.
    show_openings
        Show the opening outlines when the map opens (they can always be switched on).
    harvests
        The ``harvests`` table, one row per harvest (``None``: the schedule's
        ``harvest_periods``, else ``period``).
    start_year, period_length_yr
        ``horizon.start_year`` (0: years from the plan start) and the period length, for
        the years of each period.
    report_href
        Link to the report, relative to the map (``None``: no link).
    cautions
        Cautions shown on the map (default :data:`spatialplan.report.CAUTIONS`).

    Raises
    ------
    OutputError
        The schedule has no CRS, the harvests table does not match it, ``report_href`` is
        not a relative path, or the file cannot be written.
    SettingsError
        ``basemap`` is not a tile URL template.
    """
    import folium
    from folium.utilities import JsCode

    from spatialplan._review import CAUTIONS

    path = Path(path)
    if schedule.crs is None:
        msg = f"cannot draw {path}: the schedule layer has no CRS"
        raise OutputError(msg)
    if basemap:
        _check_basemap(basemap)
    if report_href and re.match(r"^\s*([a-z][a-z0-9+.-]*:|//)", report_href, re.I):
        msg = f"the map links the report by a relative path, got {report_href!r}"
        raise OutputError(msg)
    stands = _rv.current_names(schedule.to_crs(4326), "schedule")
    events = _rv.harvest_events(stands, harvests, id_col)
    n = len(stands)
    reserve = _reserve_mask(stands, reserve_col)
    inoperable = _rv.inoperable_mask(stands) & ~reserve
    harvested = np.zeros(n, dtype=bool)
    harvested[events["pos"].to_numpy()] = True
    colours = period_colours(periods)
    years = _rv.period_years(periods, period_length_yr, start_year)
    calendar = bool(start_year)
    gross = np.nan_to_num(pd.to_numeric(stands.get("area_ha"), errors="coerce")) if (
        "area_ha" in stands.columns) else np.zeros(n)  # fmt: skip
    net_col = "net_area_ha" if "net_area_ha" in stands.columns else "area_ha"
    net = (
        np.nan_to_num(pd.to_numeric(stands[net_col], errors="coerce").to_numpy(float))
        if net_col in stands.columns
        else np.zeros(n)
    )

    labels = [
        ("Stand", id_col, 0),
        ("Stratum", stratum_col, 0),
        ("Age at start (yr)", age_col, 0),
        ("Stand area (gross, ha)", "area_ha", 2),
        ("Net area (ha)", "net_area_ha", 2),
        ("Harvest periods", "_periods_text", 0),
        ("Age at first harvest (yr)", "age_at_harvest_yr", 0),
        ("Volume, all harvests (m³)", "volume_m3", 0),
        ("NPV (discounted, with ending value)", "npv", 0),
        ("Opening at first harvest", "opening_id", 0),
        ("Harvest system", "harvest_system", 0),
        ("Mean slope (%)", "slope_pct_mean", 0),
        ("Area steeper than the limit (%)", "_steep_pct", 0),
    ]
    attrs = pd.DataFrame(stands.drop(columns=stands.geometry.name))
    by_stand = events.groupby("pos")["period"].apply(list)
    text = np.full(n, "not harvested", dtype=object)
    text[inoperable] = "not harvested (inoperable)"
    text[reserve] = "not harvested (reserve)"
    for pos, plist in by_stand.items():
        text[int(pos)] = _period_text([int(p) for p in plist], years, calendar)
    attrs["_periods_text"] = text
    if "steep_share" in attrs.columns:
        attrs["_steep_pct"] = 100.0 * pd.to_numeric(attrs["steep_share"], errors="coerce")
    if "opening_id" in attrs.columns:
        attrs["opening_id"] = attrs["opening_id"].where(attrs["opening_id"].astype(str) != "")
    records = attrs.to_dict(orient="records")
    tips = [_tooltip(r, labels) for r in records]

    m = folium.Map(
        location=[0, 0], tiles=None, zoom_start=12, control_scale=True, prefer_canvas=False,
        attribution_control=bool(basemap), zoom_snap=0.25, zoom_delta=0.5,
    )  # fmt: skip
    # folium links Leaflet, jQuery, Bootstrap and Font Awesome from CDNs; none of that is
    # needed here, and Leaflet itself is inlined below.
    m.default_js = []
    m.default_css = []
    js, css = leaflet_assets()
    root: Any = m.get_root()  # a branca Figure (header / html sections)
    root.header.add_child(folium.Element(f"<style>{css}</style>"), name="sp_leaflet_css")
    root.header.add_child(folium.Element(f"<script>{js}</script>"), name="sp_leaflet_js")
    root.header.add_child(folium.Element(f"<title>{html.escape(title)}</title>"), name="sp_title")
    root.header.add_child(folium.Element(_MAP_CSS), name="sp_css")
    if basemap:
        folium.TileLayer(basemap, attr=html.escape(basemap), name="Basemap", overlay=False).add_to(
            m
        )

    def stand_style(feature: dict[str, Any]) -> dict[str, Any]:
        k = feature["properties"]["sp_kind"]
        base = {"color": STAND_EDGE_COLOUR, "weight": 0.6, "fillOpacity": 0.85,
                "className": "sp-stand"}  # fmt: skip
        if k == "reserve":
            return {**base, "fillColor": NOT_HARVESTED_COLOUR, "color": RESERVE_COLOUR,
                    "weight": 2.0, "dashArray": "5 4"}  # fmt: skip
        if k == "inoperable":
            return {**base, "fillColor": f"url(#{_HATCH_ID})", "fillOpacity": 1.0,
                    "className": "sp-stand sp-inoperable"}  # fmt: skip
        if k == "none":
            return {**base, "fillColor": NOT_HARVESTED_COLOUR}
        return {**base, "fillColor": colours[int(k) - 1]}

    def opening_style(_feature: dict[str, Any]) -> dict[str, Any]:
        return {"color": OPENING_COLOUR, "weight": 2.2, "fill": False, "className": "sp-opening"}

    bind_tip = JsCode(
        "function(feature, layer) { layer.bindTooltip(feature.properties.sp_tip, {sticky: true}); }"
    )

    def add_stands(group: folium.FeatureGroup, rows: np.ndarray, kind: str) -> None:
        if not len(rows):
            return
        data = _features(stands.iloc[rows], [tips[i] for i in rows], [kind] * len(rows))
        folium.GeoJson(data, style_function=stand_style, on_each_feature=bind_tip,
                       control=False).add_to(group)  # fmt: skip

    for name, mask, kind, swatch in (
        ("Not harvested", ~harvested & ~reserve & ~inoperable, "none",
         f"background:{NOT_HARVESTED_COLOUR}"),
        ("Reserve", ~harvested & reserve, "reserve",
         f"background:{NOT_HARVESTED_COLOUR};border:2px dashed {RESERVE_COLOUR}"),
        ("Inoperable (too steep to log)", ~harvested & inoperable, "inoperable",
         f"background:{_HATCH_CSS}"),
    ):  # fmt: skip
        rows = np.flatnonzero(mask)
        if kind == "inoperable" and not inoperable.any():
            continue
        count = f"{len(rows)} stands, {gross[rows].sum():,.1f} ha gross"
        grp = folium.FeatureGroup(name=_layer_label(swatch, name, count), show=True)
        add_stands(grp, rows, kind)
        grp.add_to(m)
    if inoperable.any():
        root.html.add_child(folium.Element(_HATCH_SVG), name="sp_hatch")

    op4326 = None
    if openings is not None and len(openings):
        op_src = openings if openings.crs is not None else openings.set_crs(schedule.crs)
        op4326 = _rv.current_names(op_src.to_crs(4326), "openings")
    ev_pos = events["pos"].to_numpy()
    ev_per = events["period"].to_numpy()
    for p in range(1, periods + 1):
        rows = np.unique(ev_pos[ev_per == p])
        yrs = _rv.years_text(years[p - 1, 0], years[p - 1, 1], calendar)
        label = _layer_label(
            f"background:{colours[p - 1]}",
            f"Period {p} ({yrs})",
            f"{len(rows)} stands, {net[rows].sum():,.1f} ha net",
        )
        grp = folium.FeatureGroup(name=label, show=True)
        add_stands(grp, rows, str(p))
        grp.add_to(m)
    # Openings get their own layer per period: with all periods on at once the outlines
    # would trace nearly every harvested stand; one period's openings at a time reads.
    for p in range(1, periods + 1):
        if op4326 is None:
            break
        sel = op4326[op4326["period"].astype(int) == p]
        yrs = _rv.years_text(years[p - 1, 0], years[p - 1, 1], calendar)
        label = _layer_label(
            f"background:transparent;border:2px solid {OPENING_COLOUR}",
            f"Openings in period {p} ({yrs})",
            f"{len(sel)} openings",
        )
        grp = folium.FeatureGroup(name=label, show=show_openings)
        if len(sel):
            rec = pd.DataFrame(sel.drop(columns=sel.geometry.name))
            rec["_period_text"] = _period_text([p], years, calendar)
            otips = [
                _tooltip(r, [("Opening", "opening_id", 0), ("Period", "_period_text", 0),
                             ("Opening area (gross, ha)", "gross_area_ha", 1),
                             ("Stands", "stand_count", 0),
                             ("Cut in this period (gross, ha)", "new_harvest_gross_ha", 1),
                             ("Maximum opening (ha)", "max_opening_ha", 1)])
                for r in rec.to_dict("records")
            ]  # fmt: skip
            data = _features(sel, otips, ["opening"] * len(sel))
            folium.GeoJson(data, style_function=opening_style, on_each_feature=bind_tip,
                           control=False).add_to(grp)  # fmt: skip
        grp.add_to(m)
    folium.LayerControl(collapsed=False).add_to(m)
    # Group headings in the layer list (fixed words only; counts of our own layers).
    n_base = 2 + int(inoperable.any())
    heads = [(0, "Not harvested (stands, gross area)"),
             (n_base, "Harvested in period (stands, net area)"),
             (n_base + periods, "Openings of each period (off at first)")]  # fmt: skip
    root.script.add_child(folium.Element(_GROUP_JS % json.dumps(heads)), name="sp_groups")

    root.html.add_child(folium.Element(_head_html(title, report_href)))
    root.html.add_child(folium.Element(_cautions_html(CAUTIONS if cautions is None else cautions)))
    if len(stands):
        minx, miny, maxx, maxy = stands.total_bounds
        m.fit_bounds([[float(miny), float(minx)], [float(maxy), float(maxx)]])

    text_out = root.render()
    bad = _EXTERNAL.findall(text_out)
    if bad and not basemap:  # a folium change must not quietly bring back CDN links
        msg = f"internal error: the map would load web resources: {bad[:3]}"
        raise RuntimeError(msg)
    write_text_atomic(path, text_out, "map")
