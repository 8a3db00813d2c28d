"""Plan outputs for GIS staff: the plan GeoPackage with its styles, write-back, a period raster.

The tables it stores (openings, periods, strata) are computed in :mod:`spatialplan.plan_tables`
and re-exported here.

The functions here take plain data (the schedule GeoDataFrame, the ``harvests`` table with
one row per harvest or, for a plan that harvests each stand at most once, the schedule's
integer ``period`` column; numpy arrays from the planning problem; settings) and return
frames or write files. Every file is written through :func:`spatialplan._io.atomic_path`, so a failure
part-way never leaves a half-written output and an earlier file stays intact.

Openness follows ``docs/architecture.md``: a stand harvested in period ``q`` is open in
periods ``q .. q + G - 1``, after every one of its harvests; a stand young at the start is open where ``initially_open``
says so. An *opening* is a connected group (over the adjacency edges) of stands open
in the same period.
"""

from __future__ import annotations

import logging
import shutil
import sqlite3
from collections.abc import Mapping
from pathlib import Path
from xml.sax.saxutils import escape as xml_escape
from xml.sax.saxutils import quoteattr

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from spatialplan._io import atomic_path
from spatialplan._review import period_array
from spatialplan.errors import OutputError
from spatialplan.plan_tables import (
    harvest_events,
    open_matrix,
    opening_table,
    period_table,
    strata_table,
)

__all__ = [
    "NOT_HARVESTED_COLOUR",
    "OPENING_COLOUR",
    "RESERVE_COLOUR",
    "harvest_events",
    "open_matrix",
    "opening_table",
    "period_colours",
    "period_table",
    "strata_table",
    "write_back",
    "write_period_raster",
    "write_plan_geopackage",
]

log = logging.getLogger(__name__)

# Light warm grey for stands the plan leaves standing; light enough to sit behind the
# palette's lightest period colour, neutral so it does not read as a period.
NOT_HARVESTED_COLOUR = "#e9e7e2"
RESERVE_COLOUR = "#202020"  # dashed outline of reserves; the pattern, not the hue, tells them apart
OPENING_COLOUR = "#d1495b"  # outline of openings (drawn without fill)
STAND_EDGE_COLOUR = "#6b6b6b"

_GPKG_APP_IDS = {0x47504B47, 0x47503130, 0x47503131}  # "GPKG", "GP10", "GP11"
_MARKER = "spatialplan plan output"


# ---------------------------------------------------------------------------------------
# palette
# ---------------------------------------------------------------------------------------
def period_colours(periods: int) -> list[str]:
    """Fill colour of each harvest period ``1 .. periods`` as ``#rrggbb``.

    Samples matplotlib's *viridis* map evenly between 0 and 0.9. Viridis is perceptually
    uniform and its lightness rises monotonically (van der Walt & Smith, "A better default
    colormap for Matplotlib", SciPy 2015), so early periods are dark and late ones light,
    which reads in order in colour, in greyscale and for the common colour-vision
    deficiencies. The top 10 % (bright yellow) is left out so the latest period stays
    clearly apart from the light neutral used for unharvested stands.

    Parameters
    ----------
    periods
        Number of planning periods (>= 1).

    Returns
    -------
    list of str
        ``periods`` hex colours, early to late.
    """
    from matplotlib import colormaps
    from matplotlib.colors import to_hex

    cmap = colormaps["viridis"]
    if periods <= 1:
        return [to_hex(cmap(0.45))]
    return [to_hex(cmap(x)) for x in np.linspace(0.0, 0.9, periods)]


# ---------------------------------------------------------------------------------------
# GeoPackage
# ---------------------------------------------------------------------------------------
def _write_layers(path: Path, layers: Mapping[str, pd.DataFrame], overwrite: bool = False) -> None:
    import pyogrio

    opts = {"OVERWRITE": "YES"} if overwrite else None
    for name, frame in layers.items():
        if isinstance(frame, gpd.GeoDataFrame):
            pyogrio.write_dataframe(
                frame, path, layer=name, driver="GPKG", layer_options=opts, promote_to_multi=None
            )
        else:
            df = pd.DataFrame(frame)
            pyogrio.write_dataframe(df, path, layer=name, driver="GPKG", layer_options=opts)
    with sqlite3.connect(path) as con:
        q = "UPDATE gpkg_contents SET description = ? WHERE table_name = ?"
        con.executemany(q, [(_MARKER, n) for n in layers])
    con.close()


def _rgba(hex_colour: str, alpha: int = 255) -> str:
    h = hex_colour.lstrip("#")
    return f"{int(h[0:2], 16)},{int(h[2:4], 16)},{int(h[4:6], 16)},{alpha}"


def _fill_symbol(name: str, fill: str, outline: str, width_mm: float, *,
                 fill_style: str = "solid", outline_style: str = "solid") -> str:  # fmt: skip
    props = {
        "color": _rgba(fill),
        "outline_color": _rgba(outline),
        "outline_style": outline_style,
        "outline_width": f"{width_mm:g}",
        "outline_width_unit": "MM",
        "style": fill_style,
        "joinstyle": "bevel",
    }
    opts = "".join(f'<Option type="QString" name="{k}" value="{v}"/>' for k, v in props.items())
    old = "".join(f'<prop k="{k}" v="{v}"/>' for k, v in props.items())
    return (
        f'<symbol type="fill" name={quoteattr(name)} alpha="1" clip_to_extent="1" force_rhr="0">'
        f'<layer class="SimpleFill" enabled="1" locked="0" pass="0">'
        f'<Option type="Map">{opts}</Option>{old}</layer></symbol>'
    )


def _schedule_qml(periods: int) -> str:
    cols = period_colours(periods)
    cats, syms = [], []
    for p, c in enumerate(cols, start=1):
        cats.append(f'<category render="true" value="{p}" symbol="{p - 1}" label="Period {p}"/>')
        syms.append(_fill_symbol(str(p - 1), c, STAND_EDGE_COLOUR, 0.15))
    k = len(cols)
    # Empty value: QGIS's catch-all class, which also takes null (not harvested).
    cats.append(f'<category render="true" value="" symbol="{k}" label="Not harvested"/>')
    syms.append(_fill_symbol(str(k), NOT_HARVESTED_COLOUR, STAND_EDGE_COLOUR, 0.15))
    return (
        '<qgis version="3.28.0" styleCategories="Symbology">'
        '<renderer-v2 type="categorizedSymbol" attr="period" symbollevels="0" '
        'enableorderby="0" forceraster="0">'
        f"<categories>{''.join(cats)}</categories><symbols>{''.join(syms)}</symbols>"
        "</renderer-v2><layerGeometryType>2</layerGeometryType></qgis>"
    )


def _openings_qml() -> str:
    sym = _fill_symbol("0", "#ffffff", OPENING_COLOUR, 0.6, fill_style="no")
    return (
        '<qgis version="3.28.0" styleCategories="Symbology">'
        '<renderer-v2 type="singleSymbol" symbollevels="0" enableorderby="0" forceraster="0">'
        f"<symbols>{sym}</symbols></renderer-v2>"
        "<layerGeometryType>2</layerGeometryType></qgis>"
    )


_SLD_HEAD = (
    '<?xml version="1.0" encoding="UTF-8"?>'
    '<StyledLayerDescriptor version="1.1.0" xmlns="http://www.opengis.net/sld" '
    'xmlns:ogc="http://www.opengis.net/ogc" xmlns:se="http://www.opengis.net/se">'
)


def _sld_rule(title: str, fill: str | None, stroke: str, width: float, flt: str) -> str:
    fill_xml = (
        f'<se:Fill><se:SvgParameter name="fill">{fill}</se:SvgParameter></se:Fill>' if fill else ""
    )
    return (
        f"<se:Rule><se:Name>{xml_escape(title)}</se:Name>{flt}<se:PolygonSymbolizer>{fill_xml}"
        f'<se:Stroke><se:SvgParameter name="stroke">{stroke}</se:SvgParameter>'
        f'<se:SvgParameter name="stroke-width">{width:g}</se:SvgParameter></se:Stroke>'
        "</se:PolygonSymbolizer></se:Rule>"
    )


def _schedule_sld(layer: str, periods: int) -> str:
    rules = []
    for p, c in enumerate(period_colours(periods), start=1):
        flt = (
            "<ogc:Filter><ogc:PropertyIsEqualTo><ogc:PropertyName>period</ogc:PropertyName>"
            f"<ogc:Literal>{p}</ogc:Literal></ogc:PropertyIsEqualTo></ogc:Filter>"
        )
        rules.append(_sld_rule(f"Period {p}", c, STAND_EDGE_COLOUR, 0.5, flt))
    rules.append(
        _sld_rule("Not harvested", NOT_HARVESTED_COLOUR, STAND_EDGE_COLOUR, 0.5, "<se:ElseFilter/>")
    )
    return (
        f"{_SLD_HEAD}<NamedLayer><se:Name>{xml_escape(layer)}</se:Name><UserStyle>"
        f"<se:Name>{xml_escape(layer)}</se:Name><se:FeatureTypeStyle>{''.join(rules)}"
        "</se:FeatureTypeStyle></UserStyle></NamedLayer></StyledLayerDescriptor>"
    )


def _openings_sld(layer: str) -> str:
    rule = _sld_rule("Opening", None, OPENING_COLOUR, 2.0, "")
    return (
        f"{_SLD_HEAD}<NamedLayer><se:Name>{xml_escape(layer)}</se:Name><UserStyle>"
        f"<se:Name>{xml_escape(layer)}</se:Name><se:FeatureTypeStyle>{rule}"
        "</se:FeatureTypeStyle></UserStyle></NamedLayer></StyledLayerDescriptor>"
    )


_LAYER_STYLES_DDL = """
CREATE TABLE IF NOT EXISTS layer_styles (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    f_table_catalog TEXT(256),
    f_table_schema TEXT(256),
    f_table_name TEXT(256),
    f_geometry_column TEXT(256),
    styleName TEXT(30),
    styleQML TEXT,
    styleSLD TEXT,
    useAsDefault BOOLEAN,
    description TEXT,
    owner TEXT(30),
    ui TEXT(30),
    update_time DATETIME DEFAULT (strftime('%Y-%m-%dT%H:%M:%fZ', 'now'))
)
"""


def _add_styles(path: Path, styled: Mapping[str, str], periods: int) -> None:
    """Write default styles: ``styled`` maps table name -> ``"schedule"`` or ``"openings"``."""
    con = sqlite3.connect(path)
    try:
        with con:
            geom_cols = dict(
                con.execute("SELECT table_name, column_name FROM gpkg_geometry_columns").fetchall()
            )
            con.execute(_LAYER_STYLES_DDL)
            have = con.execute(
                "SELECT 1 FROM gpkg_contents WHERE table_name = 'layer_styles'"
            ).fetchone()
            if not have:
                con.execute(
                    "INSERT INTO gpkg_contents (table_name, data_type, identifier, description, "
                    "last_change) VALUES ('layer_styles', 'attributes', 'layer_styles', "
                    "'default layer styles', strftime('%Y-%m-%dT%H:%M:%fZ', 'now'))"
                )
            rows = []
            for table, kind in styled.items():
                if table not in geom_cols:
                    continue
                if kind == "schedule":
                    qml, sld = _schedule_qml(periods), _schedule_sld(table, periods)
                    desc = "stands filled by harvest period (viridis, early dark to late light)"
                else:
                    qml, sld = _openings_qml(), _openings_sld(table)
                    desc = "openings outlined, no fill"
                rows.append(("", "", table, geom_cols[table], f"{table} by spatialplan", qml, sld,
                             1, desc, "", None))  # fmt: skip
                con.execute("DELETE FROM layer_styles WHERE f_table_name = ?", (table,))
            con.executemany(
                "INSERT INTO layer_styles (f_table_catalog, f_table_schema, f_table_name, "
                "f_geometry_column, styleName, styleQML, styleSLD, useAsDefault, description, "
                "owner, ui) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                rows,
            )
    finally:
        con.close()


def _periods_of(layers: Mapping[str, pd.DataFrame], schedule_name: str) -> int:
    if "periods" in layers and len(layers["periods"]) and "period" in layers["periods"]:
        return int(pd.to_numeric(layers["periods"]["period"]).max())
    if schedule_name in layers:
        return max(1, int(period_array(layers[schedule_name]["period"]).max()))
    return 1


def write_plan_geopackage(
    path: str | Path, layers: dict[str, gpd.GeoDataFrame | pd.DataFrame], styles: bool = True
) -> None:
    """Write all plan layers and tables into one GeoPackage, atomically.

    Parameters
    ----------
    path
        Target ``.gpkg``; replaced only when every layer has been written.
    layers
        Layer name -> frame. GeoDataFrames become feature layers in the CRS they carry;
        plain DataFrames become GeoPackage attribute tables (``periods``, ``strata``,
        ``run``).
    styles
        Add the ``layer_styles`` table with default styles for ``schedule`` and
        ``openings``.

    Raises
    ------
    OutputError
        The folder is missing or a layer cannot be written.
    """
    path = Path(path)
    if not path.parent.is_dir():
        msg = f"output folder {path.parent} does not exist"
        raise OutputError(msg)
    with atomic_path(path) as tmp:
        try:
            _write_layers(tmp, layers)
        except (OSError, RuntimeError, ValueError) as exc:  # GDAL/pyogrio errors
            msg = f"cannot write GeoPackage {path}: {exc}"
            raise OutputError(msg) from exc
        if styles:
            styled: dict[str, str] = {k: k for k in ("schedule", "openings") if k in layers}
            _add_styles(tmp, styled, _periods_of(layers, "schedule"))


def _is_geopackage(path: Path) -> bool:
    try:
        with open(path, "rb") as f:
            head = f.read(100)
    except OSError:
        return False
    if len(head) < 72 or not head.startswith(b"SQLite format 3\x00"):
        return False
    app_id = int.from_bytes(head[68:72], "big")
    return app_id in _GPKG_APP_IDS


def _read_layer(path: Path, layer: str) -> pd.DataFrame:
    import pyogrio

    return pyogrio.read_dataframe(path, layer=layer, fid_as_index=True)


def _same_frame(a: pd.DataFrame, b: pd.DataFrame) -> bool:
    if list(a.columns) != list(b.columns) or len(a) != len(b) or not a.index.equals(b.index):
        return False
    geo_a = isinstance(a, gpd.GeoDataFrame)
    if geo_a != isinstance(b, gpd.GeoDataFrame):
        return False
    if geo_a:
        ga, gb = a.geometry.name, b.geometry.name
        if ga != gb or a.crs != b.crs:
            return False
        wa = shapely.to_wkb(np.asarray(a[ga].values), hex=True)
        wb = shapely.to_wkb(np.asarray(b[gb].values), hex=True)
        if not np.array_equal(wa.astype(str), wb.astype(str)):
            return False
        a, b = pd.DataFrame(a.drop(columns=ga)), pd.DataFrame(b.drop(columns=gb))
    return bool(a.equals(b))


def write_back(
    input_gpkg: str | Path,
    layers: Mapping[str, gpd.GeoDataFrame | pd.DataFrame],
    prefix: str = "plan_",
) -> list[str]:
    """Add result layers to the input GeoPackage under prefixed names, safely.

    The layers are written into a copy next to the input; every layer the input already
    had (other than earlier ``prefix`` layers written by spatialplan) is read back from
    the copy and compared with the original (attributes and geometry WKB). Only then does
    the copy replace the input, atomically.

    Parameters
    ----------
    input_gpkg
        The stand layer's GeoPackage.
    layers
        Layer name -> frame, as for :func:`write_plan_geopackage`.
    prefix
        Prefix of the added layer names.

    Returns
    -------
    list of str
        Names of the layers written.

    Raises
    ------
    OutputError
        The input is not a GeoPackage, a prefixed name is taken by a layer spatialplan did
        not write, or an original layer would change.
    """
    import pyogrio

    src = Path(input_gpkg)
    if src.suffix.lower() != ".gpkg" or not _is_geopackage(src):
        msg = (
            f"--write-back needs the stands in a GeoPackage (.gpkg); {src} is not one. "
            "The plan is in the output GeoPackage; add its layers to your data by hand."
        )
        raise OutputError(msg)
    new = {f"{prefix}{k}": v for k, v in layers.items()}
    con = sqlite3.connect(f"file:{src}?mode=ro", uri=True)
    try:
        desc = dict(con.execute("SELECT table_name, description FROM gpkg_contents").fetchall())
    finally:
        con.close()
    clash = sorted(n for n in new if n in desc and desc[n] != _MARKER)
    if clash:
        msg = (
            f"cannot write back into {src}: layer(s) {', '.join(clash)} already exist and were "
            f"not written by spatialplan; choose another prefix"
        )
        raise OutputError(msg)
    original = [str(n) for n in pyogrio.list_layers(src)[:, 0]]
    keep = [n for n in original if n not in new and n != "layer_styles"]
    before = {n: _read_layer(src, n) for n in keep}
    with atomic_path(src) as tmp:
        shutil.copy2(src, tmp)
        try:
            _write_layers(tmp, new, overwrite=True)
        except (OSError, RuntimeError, ValueError) as exc:
            msg = f"cannot add plan layers to {src}: {exc}"
            raise OutputError(msg) from exc
        styled: dict[str, str] = {
            f"{prefix}{k}": k for k in ("schedule", "openings") if f"{prefix}{k}" in new
        }
        _add_styles(tmp, styled, _periods_of(layers, "schedule"))
        after_names = {str(n) for n in pyogrio.list_layers(tmp)[:, 0]}
        changed = [
            n for n in keep
            if n not in after_names or not _same_frame(before[n], _read_layer(tmp, n))
        ]  # fmt: skip
        if changed:
            msg = (
                f"write-back into {src} stopped: layer(s) {', '.join(changed)} would change; "
                "the file was left as it was"
            )
            raise OutputError(msg)
    return list(new)


# ---------------------------------------------------------------------------------------
# raster
# ---------------------------------------------------------------------------------------
def write_period_raster(
    schedule: gpd.GeoDataFrame, path: str | Path, cell_m: float, period_col: str = "period"
) -> None:
    """GeoTIFF of harvest period (0 = not harvested / outside, also the nodata value).

    Parameters
    ----------
    schedule
        Stands with ``period_col`` in a projected CRS (metres).
    path
        Target ``.tif`` (written atomically).
    cell_m
        Cell size in the CRS units (metres).

    Raises
    ------
    OutputError
        No projected CRS, a non-positive cell size, or a grid too large to write.
    """
    import rasterio
    from affine import Affine
    from rasterio.features import rasterize

    path = Path(path)
    if not cell_m or cell_m <= 0:
        msg = f"raster cell size must be positive, got {cell_m} (output.raster_cell_m)"
        raise OutputError(msg)
    if schedule.crs is None or not schedule.crs.is_projected:
        msg = f"cannot write {path}: the stand layer needs a projected CRS in metres"
        raise OutputError(msg)
    minx, miny, maxx, maxy = schedule.total_bounds
    width = max(1, int(np.ceil((maxx - minx) / cell_m)))
    height = max(1, int(np.ceil((maxy - miny) / cell_m)))
    if width * height > 400_000_000:
        msg = (
            f"raster {path} would have {width} x {height} cells; use a larger output.raster_cell_m"
        )
        raise OutputError(msg)
    per = period_array(schedule[period_col])
    dtype = "uint8" if per.max(initial=0) <= 255 else "uint16"
    transform = Affine(cell_m, 0.0, minx, 0.0, -cell_m, maxy)  # north-up, origin top-left
    shapes = [(g, int(p)) for g, p in zip(schedule.geometry.values, per, strict=True) if p > 0]
    grid = (
        rasterize(shapes, out_shape=(height, width), transform=transform, fill=0, dtype=dtype)
        if shapes
        else np.zeros((height, width), dtype=dtype)
    )
    with atomic_path(path) as tmp, rasterio.open(
        tmp, "w", driver="GTiff", width=width, height=height, count=1, dtype=dtype,
        crs=schedule.crs.to_wkt(), transform=transform, nodata=0, compress="deflate",
    ) as dst:  # fmt: skip
        dst.write(grid, 1)
        dst.set_band_description(1, "harvest period (0 = not harvested)")
