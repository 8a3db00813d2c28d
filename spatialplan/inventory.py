"""Read and validate a stand layer.

Any polygon layer that pyogrio/GDAL reads is accepted (GeoPackage, Shapefile, GeoJSON,
FlatGeobuf, ...). A field mapping (:class:`spatialplan.settings.FieldMap`) says which
attributes hold the stand id, the age at the start of the plan and the yield keys.

Problems are collected for all stands and reported together, each naming the stands:

* errors make the layer unusable for planning (``InventoryResult.raise_for_errors``);
* warnings are shown but do not stop a run (repaired geometry, overlaps, dropped stands).

Areas and distances are computed in a projected *working CRS*: the layer's own CRS when it
is projected, otherwise the UTM zone pyproj estimates for the layer (said in a message).
The original CRS is kept for outputs.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import re
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import shapely
from pyproj import CRS, Geod

from spatialplan.errors import InputError
from spatialplan.settings import FieldMap

__all__ = [
    "RESERVE_TRUE_WORDS",
    "InventoryResult",
    "Problem",
    "age_class_table",
    "find_overlaps",
    "is_reserve_flag",
    "list_vector_layers",
    "match_strata",
    "polygon_area_ha",
    "read_stands",
    "read_vector_layer",
    "text_key",
    "unit_to_metre",
]

log = logging.getLogger(__name__)

MAX_PLAUSIBLE_AGE_YR = 1000.0  # older than any managed even-aged stand (common practice, no source)
MAX_PLAUSIBLE_COORD_M = 1.0e8  # projected coordinates beyond 100,000 km are a unit/CRS mistake
OVERLAP_TOLERANCE_M2 = 1.0  # overlaps smaller than this are digitising noise
_INT_TEXT = re.compile(r"^[+-]?\d+\.0*$")
#: Words (compared stripped and case-insensitively) that flag a stand as reserved. The one
#: list used wherever a reserve flag is read: inventory, verify and the map.
RESERVE_TRUE_WORDS = frozenset({"1", "true", "t", "yes", "y", "reserve", "reserved", "r", "x"})
#: Words that say "not reserved"; anything else that is not a number is a bad flag value.
_RESERVE_FALSE_WORDS = frozenset({"0", "false", "f", "no", "n", "", "none", "nan"})


@dataclass(frozen=True)
class Problem:
    """One finding about the inventory."""

    severity: str  # "error" | "warning" | "info"
    kind: str  # short machine name, e.g. "duplicate_id"
    message: str
    stand_ids: tuple[str, ...] = ()

    def text(self, max_ids: int = 20) -> str:
        """The message with up to ``max_ids`` stand ids appended."""
        if not self.stand_ids:
            return self.message
        ids = ", ".join(self.stand_ids[:max_ids])
        more = f" and {len(self.stand_ids) - max_ids} more" if len(self.stand_ids) > max_ids else ""
        return f"{self.message}: {ids}{more}"


@dataclass
class InventoryResult:
    """A validated stand layer.

    Attributes
    ----------
    stands
        Working frame (projected CRS, positions ``0 .. n-1``) with ``stand_id``, ``age``,
        the yield-key columns as text, ``stratum``, ``area_ha``, ``reserve``,
        ``cost_class``, ``unit`` and geometry.
    attributes
        The original attribute columns of the kept stands, aligned with ``stands``.
    source_crs
        CRS of the input layer (outputs are written in it).
    working_crs
        Projected CRS used for areas and distances.
    path, layer
        Where the stands came from.
    problems
        All findings, errors first.
    """

    stands: gpd.GeoDataFrame
    attributes: pd.DataFrame
    source_crs: CRS
    working_crs: CRS
    path: Path
    layer: str | None
    problems: list[Problem] = field(default_factory=list)
    fields: FieldMap = field(default_factory=FieldMap)

    @property
    def errors(self) -> list[Problem]:
        """Problems that make the layer unusable."""
        return [p for p in self.problems if p.severity == "error"]

    @property
    def warnings(self) -> list[Problem]:
        """Problems that are reported but do not stop a run."""
        return [p for p in self.problems if p.severity != "error"]

    def raise_for_errors(self) -> None:
        """Raise :class:`InputError` listing every error, if there are any."""
        if self.errors:
            lines = [f"{self.path}: the stand layer has {len(self.errors)} problem(s):"]
            lines += [f"  - {p.text()}" for p in self.errors]
            raise InputError("\n".join(lines))


def text_key(values: pd.Series) -> pd.Series:
    """Attribute values as comparable text: ``2.0`` and ``2`` both become ``"2"``.

    Layers exported from different systems store the same class as int, float or text;
    yield tables are matched on this normalised text.
    """

    def one(v: object) -> str | None:
        if v is None or (isinstance(v, float) and math.isnan(v)):
            return None
        if isinstance(v, float | np.floating) and float(v).is_integer():
            return str(int(v))
        s = str(v).strip()
        if _INT_TEXT.match(s):  # "2.0" in a text field matches 2 in a yield table
            s = s.split(".")[0].lstrip("+")
            s = "0" if s == "-0" else s
        return s if s else None

    return values.map(one).astype(object)


def list_vector_layers(path: str | Path, what: str = "stand layer") -> list[tuple[str, str | None]]:
    """Layers in a vector file as ``(name, geometry type)``; raises :class:`InputError`."""
    p = Path(path)
    if not p.exists():
        msg = f"{what} not found: {p}"
        raise InputError(msg)
    try:
        layers = pyogrio.list_layers(p)
    except Exception as exc:  # pyogrio raises DataSourceError and friends
        msg = f"{p} is not a vector file GDAL can read ({_short(exc)})"
        raise InputError(msg) from None
    return [(str(n), None if g is None else str(g)) for n, g in layers]


def _short(exc: Exception) -> str:
    s = str(exc).strip().splitlines()
    return s[0] if s else type(exc).__name__


def read_vector_layer(
    path: str | Path,
    layer: str | None,
    *,
    what: str = "stand layer",
    holds: str = "the stands",
    layer_hint: str = "--layer (or fields.layer)",
    expect: str = "stands must be polygons",
) -> tuple[gpd.GeoDataFrame, str | None]:
    """Read one layer of a vector file with messages that say what to do.

    Parameters
    ----------
    path, layer
        File and layer name (``None``: the only spatial layer).
    what, holds, layer_hint, expect
        Words for messages: what the file is, what the layer holds, how to name the
        layer, what geometry is expected.

    Returns
    -------
    (GeoDataFrame, layer name or None)
    """
    path = Path(path)
    layers = list_vector_layers(path, what)
    if not layers:
        msg = f"{what} {path} contains no layers"
        raise InputError(msg)
    names = [n for n, _ in layers]
    if layer is None:
        spatial = [n for n, g in layers if g is not None]
        if len(layers) > 1:
            if len(spatial) == 1:
                layer = spatial[0]
            else:
                msg = (
                    f"{path} has {len(layers)} layers; say which holds {holds} with "
                    f"{layer_hint}: {', '.join(names)}"
                )
                raise InputError(msg)
    elif layer not in names:
        msg = f"layer '{layer}' not found in {path}; layers there: {', '.join(names)}"
        raise InputError(msg)
    if path.suffix.lower() == ".shp":
        missing = [ext for ext in (".dbf", ".shx") if not _sidecar(path, ext).exists()]
        if ".dbf" in missing:
            msg = (
                f"{path}: the Shapefile's attribute file {path.with_suffix('.dbf').name} is missing"
            )
            raise InputError(msg)
    try:
        gdf = pyogrio.read_dataframe(path, layer=layer)
    except Exception as exc:
        msg = f"cannot read layer {layer or names[0]!r} of {path}: {_short(exc)}"
        raise InputError(msg) from None
    if not isinstance(gdf, gpd.GeoDataFrame) or gdf.geometry.name not in gdf.columns:
        msg = f"layer {layer or names[0]!r} of {path} has no geometry; {expect}"
        raise InputError(msg)
    return gdf, layer


def _sidecar(path: Path, ext: str) -> Path:
    for cand in (path.with_suffix(ext), path.with_suffix(ext.upper())):
        if cand.exists():
            return cand
    return path.with_suffix(ext)


def _resolve_field(columns: list[str], wanted: str, role: str, path: Path) -> str:
    if wanted in columns:
        return wanted
    lower = {c.lower(): c for c in columns}
    if wanted.lower() in lower:
        return lower[wanted.lower()]
    msg = (
        f"{path}: field '{wanted}' ({role}) not found; fields in the layer: "
        f"{', '.join(columns) or '(none)'}. Map it with --{role.replace('_', '-')} or in [fields]"
    )
    raise InputError(msg)


def _working_crs(
    gdf: gpd.GeoDataFrame, crs_override: str | None, path: Path
) -> tuple[CRS, CRS, list[Problem]]:
    problems: list[Problem] = []
    if gdf.crs is None:
        if crs_override is None:
            msg = (
                f"{path}: the layer has no coordinate reference system (a Shapefile without its "
                ".prj?); give it with --crs EPSG:xxxx or fields.crs"
            )
            raise InputError(msg)
        try:
            src = CRS.from_user_input(crs_override)
        except Exception:
            msg = f"--crs / fields.crs value '{crs_override}' is not a CRS pyproj knows"
            raise InputError(msg) from None
        problems.append(
            Problem("info", "crs_assigned", f"layer has no CRS; assumed {src.to_string()}")
        )
    else:
        src = CRS.from_user_input(gdf.crs)
    if src.is_geographic:
        g = gdf.set_crs(src, allow_override=True)
        valid = g.geometry[~(g.geometry.isna() | g.geometry.is_empty)]
        if len(valid) == 0:
            return src, src, problems
        b = valid.total_bounds
        if b[0] < -180.5 or b[2] > 180.5 or b[1] < -90.5 or b[3] > 90.5:
            msg = (
                f"{path}: the layer says its CRS is geographic ({src.name}) but coordinates reach "
                f"{b[0]:.0f}, {b[1]:.0f} .. {b[2]:.0f}, {b[3]:.0f}, which are not degrees; "
                "fix the CRS (assign the right one with --crs after removing the wrong .prj)"
            )
            raise InputError(msg)
        work = gpd.GeoSeries(valid, crs=src).estimate_utm_crs()
        problems.append(
            Problem(
                "info",
                "reprojected",
                f"layer CRS {src.name} is in degrees; areas and distances are computed in "
                f"{work.name} ({work.to_string()}); outputs keep {src.to_string()}",
            )
        )
        return src, work, problems
    if not src.is_projected:
        msg = f"{path}: CRS {src.name} is neither projected nor geographic; give a projected CRS"
        raise InputError(msg)
    unit = (src.axis_info[0].unit_name or "").lower() if src.axis_info else ""
    if unit and unit not in ("metre", "meter", "m"):
        problems.append(
            Problem("info", "crs_units", f"CRS units are {unit}; areas are converted to hectares")
        )
    return src, src, problems


def read_stands(path: str | Path, fields: FieldMap | None = None) -> InventoryResult:
    """Read a stand layer and validate it.

    Parameters
    ----------
    path
        Any polygon layer GDAL reads.
    fields
        Field mapping, layer name and CRS override.

    Returns
    -------
    InventoryResult
        Validated stands and every problem found. Call
        :meth:`InventoryResult.raise_for_errors` before planning.

    Raises
    ------
    InputError
        When the file cannot be read at all, a mapped field is missing, the layer has no
        CRS (and none was given) or holds points or lines instead of polygons.
    """
    fields = fields or FieldMap()
    path = Path(path)
    gdf, layer = read_vector_layer(path, fields.layer)
    if len(gdf) == 0:
        msg = f"{path}: layer {layer or ''} is empty (no stands)".replace("  ", " ")
        raise InputError(msg)
    cols = [c for c in gdf.columns if c != gdf.geometry.name]
    id_f = _resolve_field(cols, fields.id_field, "id_field", path)
    age_f = _resolve_field(cols, fields.age_field, "age_field", path)
    key_fs = [_resolve_field(cols, k, "yield_keys", path) for k in fields.yield_keys]
    reserve_f = (
        _resolve_field(cols, fields.reserve_field, "reserve_field", path)
        if fields.reserve_field
        else None
    )
    cost_f = (
        _resolve_field(cols, fields.cost_class_field, "cost_class_field", path)
        if fields.cost_class_field
        else None
    )
    unit_f = (
        _resolve_field(cols, fields.unit_field, "unit_field", path) if fields.unit_field else None
    )

    # Record the names as found (a case-insensitive match may differ from the mapping).
    fields = dataclasses.replace(
        fields,
        id_field=id_f,
        age_field=age_f,
        yield_keys=tuple(key_fs),
        reserve_field=reserve_f,
        cost_class_field=cost_f,
        unit_field=unit_f,
        layer=layer if layer is not None else fields.layer,
    )
    src_crs, work_crs, problems = _working_crs(gdf, fields.crs, path)
    gdf = gdf.set_crs(src_crs, allow_override=True)

    # ---- ids -------------------------------------------------------------------------
    ids = text_key(gdf[id_f])
    row_label = pd.Series([f"row {i + 1}" for i in range(len(gdf))], index=gdf.index)
    label = ids.where(ids.notna(), row_label).astype(str)
    missing_id = ids.isna()
    if missing_id.any():
        problems.append(
            Problem(
                "error",
                "missing_id",
                f"{int(missing_id.sum())} stand(s) have no id in '{id_f}'",
                tuple(label[missing_id]),
            )
        )
    dup = ids.notna() & ids.duplicated(keep=False)
    if dup.any():
        problems.append(
            Problem(
                "error",
                "duplicate_id",
                f"stand ids in '{id_f}' must be unique; repeated",
                tuple(sorted(set(ids[dup]))),
            )
        )

    # ---- geometry --------------------------------------------------------------------
    geom = gdf.geometry.values
    null = pd.Series(shapely.is_missing(geom) | shapely.is_empty(geom), index=gdf.index)
    gtype = pd.Series(shapely.get_type_id(geom), index=gdf.index)
    # 3 Polygon, 6 MultiPolygon, 7 GeometryCollection (may hold polygons)
    wrong = ~null & ~gtype.isin([3, 6, 7])
    if wrong.any():
        kinds = sorted(set(gdf.geometry[wrong].geom_type))
        msg = (
            f"{path}: stands must be polygons, but {int(wrong.sum())} feature(s) are "
            f"{'/'.join(kinds)}; is this the right layer?"
        )
        if wrong.all():
            raise InputError(msg)
        problems.append(Problem("error", "not_polygon", msg, tuple(label[wrong])))
    invalid = ~null & ~wrong & ~pd.Series(shapely.is_valid(geom), index=gdf.index)
    geom = geom.copy()
    if invalid.any():
        reasons = shapely.is_valid_reason(geom[invalid.values])
        fixed = shapely.make_valid(geom[invalid.values])
        geom[invalid.values] = _polygonal(fixed)
        detail = sorted({r.split("[")[0].strip() for r in reasons})
        problems.append(
            Problem(
                "warning",
                "repaired_geometry",
                f"{int(invalid.sum())} invalid polygon(s) repaired with make_valid "
                f"(polygon parts kept; {'; '.join(detail)})",
                tuple(label[invalid]),
            )
        )
    gc = ~null & ~wrong & (gtype == 7)
    if gc.any():
        geom[gc.values] = _polygonal(geom[gc.values])
    work = gpd.GeoSeries(geom, index=gdf.index, crs=src_crs)
    if work_crs != src_crs:
        work = work.to_crs(work_crs)
    unit_factor = unit_to_metre(work_crs)
    area_ha = pd.Series(
        polygon_area_ha(geom, src_crs)
        if src_crs.is_geographic
        else polygon_area_ha(work.values, work_crs),
        index=gdf.index,
    )
    empty_now = ~null & ~wrong & (shapely.is_empty(work.values) | (area_ha <= 0))
    if null.any():
        problems.append(
            Problem(
                "warning",
                "empty_geometry",
                f"{int(null.sum())} stand(s) with null or empty geometry excluded",
                tuple(label[null]),
            )
        )
    if empty_now.any():
        problems.append(
            Problem(
                "warning",
                "zero_area",
                f"{int(empty_now.sum())} stand(s) with zero area (after repair) excluded",
                tuple(label[empty_now]),
            )
        )
    valid_geo = work[~(null | wrong | empty_now)]
    if len(valid_geo):
        b = valid_geo.total_bounds * unit_factor
        if np.abs(b).max() > MAX_PLAUSIBLE_COORD_M:
            msg = (
                f"{path}: coordinates up to {np.abs(b).max():.3g} m are implausible for "
                f"{work_crs.name}; check the CRS and coordinate units"
            )
            raise InputError(msg)

    # ---- ages ------------------------------------------------------------------------
    raw_age = gdf[age_f]
    age = pd.to_numeric(raw_age, errors="coerce").astype(float)
    non_num = age.isna() & raw_age.notna() & (raw_age.astype(str).str.strip() != "")
    miss_age = age.isna() & ~non_num
    if non_num.any():
        problems.append(
            Problem(
                "error",
                "age_not_numeric",
                f"age field '{age_f}' is not a number",
                tuple(label[non_num]),
            )
        )
    if miss_age.any():
        problems.append(
            Problem("error", "age_missing", f"age field '{age_f}' is empty", tuple(label[miss_age]))
        )
    neg = age < 0
    if neg.any():
        problems.append(
            Problem("error", "age_negative", f"age field '{age_f}' is negative", tuple(label[neg]))
        )
    absurd = age > MAX_PLAUSIBLE_AGE_YR
    if absurd.any():
        problems.append(
            Problem(
                "error",
                "age_absurd",
                f"age field '{age_f}' above {MAX_PLAUSIBLE_AGE_YR:.0f} years is not plausible "
                "(wrong field or unit?)",
                tuple(label[absurd]),
            )
        )

    # ---- yield keys, reserve, cost class, unit -----------------------------------------
    keys = {k: text_key(gdf[k]) for k in key_fs}
    no_key = pd.Series(False, index=gdf.index)
    for _k, v in keys.items():
        no_key |= v.isna()
    if no_key.any():
        problems.append(
            Problem(
                "error",
                "yield_key_missing",
                f"yield-key field(s) {', '.join(key_fs)} empty",
                tuple(label[no_key]),
            )
        )
    stratum = pd.Series(
        ["/".join(str(keys[k][i]) for k in key_fs) for i in gdf.index], index=gdf.index
    )
    reserve = pd.Series(False, index=gdf.index)
    if reserve_f:
        reserve, bad = _parse_flags(gdf[reserve_f])
        if bad.any():
            problems.append(
                Problem(
                    "error",
                    "reserve_value",
                    f"reserve field '{reserve_f}' must be yes/no, true/false or 1/0",
                    tuple(label[bad]),
                )
            )
    cost = (
        text_key(gdf[cost_f])
        if cost_f
        else pd.Series([None] * len(gdf), index=gdf.index, dtype=object)
    )
    unit = (
        text_key(gdf[unit_f])
        if unit_f
        else pd.Series([None] * len(gdf), index=gdf.index, dtype=object)
    )

    keep = ~(null | wrong | empty_now)
    stands = gpd.GeoDataFrame(
        {
            "stand_id": label,
            "age": age,
            **{k: keys[k] for k in key_fs},
            "stratum": stratum,
            "area_ha": area_ha,
            "reserve": reserve.astype(bool),
            "cost_class": cost,
            "unit": unit,
        },
        geometry=work.values,
        crs=work_crs,
        index=gdf.index,
    )[keep.values].reset_index(drop=True)
    attributes = pd.DataFrame(gdf.drop(columns=gdf.geometry.name))[keep.values].reset_index(
        drop=True
    )

    if len(stands) == 0:
        problems.append(Problem("error", "no_stands", "no usable stands are left"))
    else:
        ov = find_overlaps(stands.geometry.values, stands["stand_id"].to_numpy())
        if len(ov):
            pairs = tuple(f"{a}~{b} ({m2 / 1e4:.3f} ha)" for a, b, m2 in ov[:50])
            kind = "duplicate or overlapping"
            problems.append(
                Problem(
                    "warning",
                    "overlap",
                    f"{len(ov)} pair(s) of {kind} stands (overlap > {OVERLAP_TOLERANCE_M2:g} m2); "
                    "their shared area is counted twice",
                    pairs,
                )
            )
    problems.sort(key=lambda p: {"error": 0, "warning": 1, "info": 2}[p.severity])
    return InventoryResult(stands, attributes, src_crs, work_crs, path, layer, problems, fields)


def polygon_area_ha(geoms: np.ndarray, crs: CRS) -> np.ndarray:
    """Areas in hectares: geodesic on the ellipsoid for degrees, planar otherwise.

    Planar areas are converted from the CRS's linear unit (feet, ...) to metres.
    """
    geoms = np.asarray(geoms, dtype=object)
    if crs.is_geographic:
        # Exact on the CRS's ellipsoid, unlike any single projection.
        geod = crs.get_geod() or Geod(ellps="WGS84")
        out = np.zeros(len(geoms))
        for i, g in enumerate(geoms):
            if g is not None and not g.is_empty and g.geom_type in ("Polygon", "MultiPolygon"):
                out[i] = abs(geod.geometry_area_perimeter(g)[0])
        return out / 10_000.0
    return np.asarray(shapely.area(geoms), dtype=float) * unit_to_metre(crs) ** 2 / 10_000.0


def unit_to_metre(crs: CRS) -> float:
    """Length of the CRS's first axis unit in metres (1 when unknown)."""
    try:
        f = crs.axis_info[0].unit_conversion_factor
        return float(f) if f else 1.0
    except (IndexError, AttributeError):
        return 1.0


def _polygonal(geoms: np.ndarray) -> np.ndarray:
    """Keep only the polygon parts of each geometry (make_valid may add lines/points)."""
    out = np.empty(len(geoms), dtype=object)
    for i, g in enumerate(geoms):
        if g is None or g.is_empty:
            out[i] = shapely.Polygon()
            continue
        parts = [p for p in shapely.get_parts(g) if p.geom_type in ("Polygon", "MultiPolygon")]
        flat = []
        for p in parts:
            flat.extend(shapely.get_parts(p))
        flat = [p for p in flat if p.area > 0]
        out[i] = (
            shapely.Polygon()
            if not flat
            else (flat[0] if len(flat) == 1 else shapely.MultiPolygon(flat))
        )
    return out


def is_reserve_flag(values: Iterable[object]) -> np.ndarray:
    """True where a reserve-flag value means "reserved".

    A value is reserved when it is one of :data:`RESERVE_TRUE_WORDS` (any case, spaces
    around ignored), a non-zero number or ``True``; empty values, ``False``, 0 and every
    other word are not.

    Parameters
    ----------
    values
        Flag values of any type (a Series, a list or an array).

    Returns
    -------
    numpy.ndarray
        (n,) bool.

    Examples
    --------
    >>> is_reserve_flag(["Reserved", " x", "no", 2.0, 0, None, True, "maybe"]).tolist()
    [True, True, False, True, False, False, True, False]
    """
    s = pd.Series(list(values) if not isinstance(values, pd.Series) else values, dtype=object)
    num = pd.to_numeric(s, errors="coerce")
    words = s.map(lambda v: "" if v is None else str(v).strip().lower())
    return (words.isin(RESERVE_TRUE_WORDS) | (num.notna() & (num != 0))).to_numpy(dtype=bool)


def _parse_flags(values: pd.Series) -> tuple[pd.Series, pd.Series]:
    """Reserve flags and the values that are neither a flag word nor a number."""
    yes = pd.Series(is_reserve_flag(values), index=values.index)
    txt = text_key(values).map(lambda v: "" if v is None else str(v).strip().lower())
    known = yes | txt.isin(_RESERVE_FALSE_WORDS) | pd.to_numeric(txt, errors="coerce").notna()
    return yes, ~known


def find_overlaps(
    geoms: np.ndarray, ids: np.ndarray, min_area_m2: float = OVERLAP_TOLERANCE_M2
) -> list[tuple[str, str, float]]:
    """Pairs of stands whose interiors overlap by more than ``min_area_m2``.

    Returns
    -------
    list of (id_a, id_b, overlap_m2), largest first.
    """
    tree = shapely.STRtree(geoms)
    left, right = tree.query(geoms, predicate="intersects")
    sel = left < right
    left, right = left[sel], right[sel]
    if len(left) == 0:
        return []
    inter = shapely.area(shapely.intersection(geoms[left], geoms[right]))
    big = inter > min_area_m2
    out = [
        (str(ids[a]), str(ids[b]), float(m))
        for a, b, m in zip(left[big], right[big], inter[big], strict=True)
    ]
    out.sort(key=lambda t: -t[2])
    return out


def match_strata(
    inv: InventoryResult, strata: set[str] | list[str], source: str, skip_unmatched: bool = False
) -> InventoryResult:
    """Check that every stand's stratum has a yield curve.

    Parameters
    ----------
    inv
        The inventory.
    strata
        Stratum labels that have a yield table or curve.
    source
        Name of the yield source for messages (e.g. the CSV path).
    skip_unmatched
        Exclude unmatched stands (warning) instead of reporting an error.

    Returns
    -------
    InventoryResult
        ``inv`` itself, or a copy without the unmatched stands.
    """
    avail = set(strata)
    st = inv.stands
    bad = ~st["stratum"].isin(avail)
    if not bad.any():
        unused = sorted(avail - set(st["stratum"]))
        if unused:
            inv.problems.append(
                Problem(
                    "info",
                    "unused_yield",
                    f"yield curves with no stand in the layer: {', '.join(unused)}",
                )
            )
        return inv
    missing = sorted(set(st.loc[bad, "stratum"]))
    keys = ", ".join(inv.fields.yield_keys)
    msg = (
        f"no yield curve in {source} for stratum {', '.join(repr(m) for m in missing[:10])}"
        f" (yield keys {keys}; available: {', '.join(sorted(avail)[:10])})"
    )
    if skip_unmatched:
        inv.problems.append(
            Problem(
                "warning",
                "unmatched_excluded",
                msg + "; stands excluded",
                tuple(st.loc[bad, "stand_id"]),
            )
        )
        keep = ~bad.to_numpy()
        return InventoryResult(
            st[keep].reset_index(drop=True),
            inv.attributes[keep].reset_index(drop=True),
            inv.source_crs,
            inv.working_crs,
            inv.path,
            inv.layer,
            inv.problems,
            inv.fields,
        )
    inv.problems.insert(
        0,
        Problem(
            "error",
            "unmatched_stratum",
            msg + " (or pass --skip-unmatched)",
            tuple(st.loc[bad, "stand_id"]),
        ),
    )
    return inv


def age_class_table(
    stands: pd.DataFrame, age: np.ndarray | None = None, width_yr: float = 10.0
) -> pd.DataFrame:
    """Area (ha) by age class ``[k w, (k + 1) w)`` of ``w = width_yr`` years.

    Classes of whole years are labelled by their first and last year (``0-9``, ``10-19``
    ...), others by their limits (``0-<2.5``).

    Examples
    --------
    >>> df = pd.DataFrame({"age": [3.0, 12.0, 19.5, 40.0], "area_ha": [1.0, 2.0, 3.0, 4.0]})
    >>> age_class_table(df).values.tolist()
    [['0-9', 1.0], ['10-19', 5.0], ['40-49', 4.0]]
    """
    a = np.asarray(stands["age"].to_numpy() if age is None else age, dtype=float)
    ok = np.isfinite(a)  # missing or junk ages are reported by read_stands, not classed here
    w = float(width_yr)
    lo = np.floor(a[ok] / w) * w
    whole = w.is_integer()
    labels = [f"{v:g}-{v + w - 1:g}" if whole else f"{v:g}-<{v + w:g}" for v in lo]
    area = stands["area_ha"].to_numpy()[ok]
    df = pd.DataFrame({"age_class": labels, "lo": lo, "area_ha": area})
    out = df.groupby(["lo", "age_class"], as_index=False)["area_ha"].sum().sort_values("lo")
    return out[["age_class", "area_ha"]].reset_index(drop=True)
