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
import re
from functools import cache
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd

from spatialplan._io import write_text_atomic
from spatialplan.errors import OutputError, SettingsError
from spatialplan.inventory import is_reserve_flag
from spatialplan.outputs import (
    NOT_HARVESTED_COLOUR,
    OPENING_COLOUR,
    RESERVE_COLOUR,
    STAND_EDGE_COLOUR,
    _period_array,
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
    import json

    feats = [
        {"type": "Feature", "properties": {"sp_tip": t, "sp_kind": k}, "geometry": json.loads(g)}
        for t, k, g in zip(tips, kind, geo, strict=True)
    ]
    return {"type": "FeatureCollection", "features": feats}


def _legend_html(title: str, colours: list[str], n_by_period: list[int]) -> str:
    rows = []
    for p, (c, k) in enumerate(zip(colours, n_by_period, strict=True), start=1):
        rows.append(
            f'<div class="sp-row"><span class="sp-sw" style="background:{c}"></span>'
            f'Period {p} <span class="sp-n">({k})</span></div>'
        )
    rows.append(
        f'<div class="sp-row"><span class="sp-sw" style="background:{NOT_HARVESTED_COLOUR}">'
        "</span>Not harvested</div>"
    )
    rows.append(
        f'<div class="sp-row"><span class="sp-sw" style="background:{NOT_HARVESTED_COLOUR};'
        f'border:2px dashed {RESERVE_COLOUR}"></span>Reserve</div>'
    )
    rows.append(
        f'<div class="sp-row"><span class="sp-sw" style="background:transparent;'
        f'border:2px solid {OPENING_COLOUR}"></span>Opening (switch on by period)</div>'
    )
    return (
        "<style>"
        ".sp-legend{position:fixed;bottom:28px;right:12px;z-index:1000;background:#fff;"
        "padding:8px 10px;border:1px solid #999;border-radius:4px;font:13px/1.35 sans-serif;"
        "max-height:70vh;overflow:auto;box-shadow:0 1px 4px rgba(0,0,0,.3)}"
        ".sp-legend h4{margin:0 0 6px;font-size:14px}"
        ".sp-row{display:flex;align-items:center;gap:6px;margin:2px 0}"
        ".sp-sw{display:inline-block;width:18px;height:12px;border:1px solid #666;"
        "box-sizing:border-box}"
        ".sp-n{color:#666}.sp-tip th{text-align:left;padding-right:8px;font-weight:600}"
        ".sp-tip td{text-align:right}"
        "</style>"
        f'<div class="sp-legend" id="sp-legend"><h4>{html.escape(title)}</h4>'
        f"<div>Harvest period</div>{''.join(rows)}</div>"
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
) -> None:
    """Write a self-contained, offline HTML map of the plan.

    Stands are filled by harvest period (viridis, dark = early, light = late), unharvested
    stands in a light neutral, reserves with a dashed dark outline, openings outlined.
    Each period is one layer of stands harvested in it, and each period's openings
    another (off at first), all toggled in the layer control.

    Parameters
    ----------
    schedule
        Stands with ``period`` (0/null = not harvested) and optionally ``age``,
        ``age_at_harvest``, ``volume_m3``, ``value``; any CRS (reprojected to EPSG:4326).
    openings
        Frame from :func:`spatialplan.outputs.opening_table` (or ``None``).
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

    Raises
    ------
    OutputError
        The schedule has no CRS or the file cannot be written.
    SettingsError
        ``basemap`` is not a tile URL template.
    """
    import folium
    from folium.utilities import JsCode

    path = Path(path)
    if schedule.crs is None:
        msg = f"cannot draw {path}: the schedule layer has no CRS"
        raise OutputError(msg)
    if basemap:
        _check_basemap(basemap)
    stands = schedule.to_crs(4326)
    per = _period_array(stands["period"]) if "period" in stands else np.zeros(len(stands), int)
    reserve = _reserve_mask(stands, reserve_col)
    colours = period_colours(periods)

    labels = [
        ("Stand", id_col, 0),
        ("Stratum", stratum_col, 0),
        ("Age at start (yr)", age_col, 0),
        ("Period", "_period_text", 0),
        ("Age at harvest (yr)", "age_at_harvest", 0),
        ("Volume (m³)", "volume_m3", 0),
        ("Value (discounted)", "value", 0),
        ("Opening", "opening_id", 0),
    ]
    attrs = pd.DataFrame(stands.drop(columns=stands.geometry.name))
    attrs["_period_text"] = np.where(per > 0, per.astype(str), "not harvested")
    attrs.loc[reserve & (per == 0), "_period_text"] = "reserve"
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
        if k == "none":
            return {**base, "fillColor": NOT_HARVESTED_COLOUR}
        return {**base, "fillColor": colours[int(k) - 1]}

    def opening_style(_feature: dict[str, Any]) -> dict[str, Any]:
        return {"color": OPENING_COLOUR, "weight": 2.2, "fill": False, "className": "sp-opening"}

    bind_tip = JsCode(
        "function(feature, layer) { layer.bindTooltip(feature.properties.sp_tip, {sticky: true}); }"
    )

    def add_stands(group: folium.FeatureGroup, mask: np.ndarray, kind: list[str]) -> None:
        if not mask.any():
            return
        sel = np.flatnonzero(mask)
        data = _features(stands.iloc[sel], [tips[i] for i in sel], [kind[i] for i in sel])
        folium.GeoJson(data, style_function=stand_style, on_each_feature=bind_tip,
                       control=False).add_to(group)  # fmt: skip

    kind = [
        str(p) if p > 0 else ("reserve" if r else "none") for p, r in zip(per, reserve, strict=True)
    ]
    grp = folium.FeatureGroup(name="Not harvested", show=True)
    add_stands(grp, (per == 0) & ~reserve, kind)
    grp.add_to(m)
    grp = folium.FeatureGroup(name="Reserves", show=True)
    add_stands(grp, (per == 0) & reserve, kind)
    grp.add_to(m)

    op4326 = None
    if openings is not None and len(openings):
        op_src = openings if openings.crs is not None else openings.set_crs(schedule.crs)
        op4326 = op_src.to_crs(4326)
    for p in range(1, periods + 1):
        n_p = int((per == p).sum())
        grp = folium.FeatureGroup(name=f"Period {p} ({n_p} stands)", show=True)
        add_stands(grp, per == p, kind)
        grp.add_to(m)
    # Openings get their own layer per period: with all periods on at once the outlines
    # would trace nearly every harvested stand; one period's openings at a time reads.
    for p in range(1, periods + 1):
        if op4326 is None:
            break
        sel = op4326[op4326["period"].astype(int) == p]
        grp = folium.FeatureGroup(name=f"Openings in period {p} ({len(sel)})",
                                  show=show_openings)  # fmt: skip
        if len(sel):
            otips = [
                _tooltip(r, [("Opening", "opening_id", 0), ("Period", "period", 0),
                             ("Area (ha)", "area_ha", 1), ("Stands", "stand_count", 0),
                             ("Harvested this period (ha)", "new_harvest_ha", 1)])
                for r in pd.DataFrame(sel.drop(columns=sel.geometry.name)).to_dict("records")
            ]  # fmt: skip
            data = _features(sel, otips, ["opening"] * len(sel))
            folium.GeoJson(data, style_function=opening_style, on_each_feature=bind_tip,
                           control=False).add_to(grp)  # fmt: skip
        grp.add_to(m)
    folium.LayerControl(collapsed=False).add_to(m)

    n_by_period = [int((per == p).sum()) for p in range(1, periods + 1)]
    root.html.add_child(folium.Element(_legend_html(title, colours, n_by_period)))
    if len(stands):
        minx, miny, maxx, maxy = stands.total_bounds
        m.fit_bounds([[float(miny), float(minx)], [float(maxy), float(maxx)]])

    text = root.render()
    bad = _EXTERNAL.findall(text)
    if bad and not basemap:  # a folium change must not quietly bring back CDN links
        msg = f"internal error: the map would load web resources: {bad[:3]}"
        raise RuntimeError(msg)
    write_text_atomic(path, text, "map")
