"""Stand growth: yield tables, Chapman-Richards curves, MAI/CAI and their culmination.

A *stratum* is the set of stands sharing the same yield-key values; its label is the values
joined by ``/`` (``DF/II``). Volumes are m3/ha, ages years, diameters cm, heights m.

Interpolation rules for every tabulated curve (volume, diameter, height): linear between
tabulated ages, the point (0, 0) assumed below the first tabulated age, flat (the last value)
past the last tabulated age.
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from spatialplan.errors import InputError
from spatialplan.settings import ChapmanRichards, GrowthSettings, StratumCurve, YieldColumns

__all__ = [
    "GrowthModel",
    "YieldTable",
    "build_growth_model",
    "cai_table",
    "chapman_richards",
    "chapman_richards_derivative",
    "cr_mai",
    "cr_mai_culmination_age",
    "load_yield_table",
    "mai",
    "mai_culmination_age_table",
    "normalize_key",
    "stratum_label",
    "stratum_labels",
    "yield_table_from_frame",
]

_MAX_LISTED = 40  # problems listed in one message; the rest are counted
_INT_FLOAT = re.compile(r"^[+-]?\d+\.0*$")


# ---------------------------------------------------------------------------------------
# stratum labels
# ---------------------------------------------------------------------------------------
def normalize_key(value: object) -> str:
    """One yield-key value as comparable text.

    Whitespace is stripped and integer-valued decimals lose their fraction (``"2.0"`` ->
    ``"2"``), so a site class read as a float from a GeoPackage still matches ``2`` in a CSV.

    >>> normalize_key(" 2.0 "), normalize_key(3.0), normalize_key("II"), normalize_key("2.5")
    ('2', '3', 'II', '2.5')
    """
    s = str(value).strip()
    if _INT_FLOAT.match(s):
        s = s.split(".")[0]
        if s in ("-0", "+0"):
            s = "0"
        s = s.lstrip("+")
    return s


def stratum_label(values: Sequence[object]) -> str:
    """Stratum label of one stand: its yield-key values joined by ``/``.

    >>> stratum_label(["DF", 2.0])
    'DF/2'
    """
    return "/".join(normalize_key(v) for v in values)


def stratum_labels(df: pd.DataFrame, keys: Sequence[str]) -> np.ndarray:
    """Stratum labels of every row of ``df`` (vectorised :func:`stratum_label`).

    Parameters
    ----------
    df
        Frame holding the key columns.
    keys
        Key column names, in label order.

    Returns
    -------
    numpy.ndarray
        (n,) object array of labels.
    """
    if len(keys) == 0:
        msg = "at least one yield key is needed to form stratum labels"
        raise InputError(msg)
    parts = []
    for k in keys:
        col = df[k].astype(str).str.strip()
        col = col.where(~col.str.match(_INT_FLOAT.pattern), col.str.split(".").str[0])
        col = col.str.lstrip("+").replace({"-0": "0"})
        parts.append(col)
    lab = parts[0]
    for p in parts[1:]:
        lab = lab + "/" + p
    return lab.to_numpy(dtype=object)


# ---------------------------------------------------------------------------------------
# curve evaluation shared by tables and settings curves
# ---------------------------------------------------------------------------------------
def _curve_xy(ages: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Prepend the (0, 0) point when the first tabulated age is above 0."""
    ages = np.asarray(ages, dtype=float)
    values = np.asarray(values, dtype=float)
    if ages[0] > 0:
        ages = np.concatenate([[0.0], ages])
        values = np.concatenate([[0.0], values])
    return ages, values


def _evaluate(
    strata: object,
    ages: object,
    tables: Mapping[str, tuple[np.ndarray, np.ndarray]],
    curves: Mapping[str, ChapmanRichards] | None = None,
) -> np.ndarray:
    """Evaluate per-stratum curves; NaN where a stratum has none.

    Labels are factorised once to integer codes (string comparison over every (stand,
    period) cell would dominate the run time); the loop runs over strata only. ``strata``
    has shape (n,) (or any shape that is a prefix of the ages' shape) and broadcasts over
    trailing age axes.
    """
    lab = np.asarray(strata, dtype=object)
    a = np.asarray(ages, dtype=float)
    if lab.ndim == 0:
        lab = lab.reshape(1)
    codes, uniques = pd.factorize(lab.ravel(), use_na_sentinel=False)
    codes = codes.reshape(lab.shape)
    if a.ndim < codes.ndim:
        a = a.reshape(a.shape + (1,) * (codes.ndim - a.ndim))
    lead = lab.ndim
    shape = np.broadcast_shapes(codes.shape + (1,) * (a.ndim - lead), a.shape)
    # One row per label position, trailing age axes flattened: gather rows per stratum.
    row_codes = np.broadcast_to(codes, shape[:lead]).ravel()
    a2 = np.broadcast_to(a, shape).reshape(len(row_codes), -1)
    out = np.full(a2.shape, np.nan)
    curves = curves or {}
    order = np.argsort(row_codes, kind="stable")
    bounds = np.searchsorted(row_codes[order], np.arange(len(uniques) + 1))
    for k, u in enumerate(uniques):
        if u not in curves and u not in tables:
            continue
        rows = order[bounds[k] : bounds[k + 1]]
        x = a2[rows]
        if u in curves:
            cr = curves[u]
            out[rows] = chapman_richards(np.maximum(x, 0.0), cr.A, cr.k, cr.c)
        else:
            xs, ys = tables[u]
            out[rows] = np.interp(x, xs, ys)
    return out.reshape(shape)


def _unknown(strata: object, known: set[str]) -> list[str]:
    lab = np.asarray(strata, dtype=object).ravel()
    return sorted({str(u) for u in pd.unique(lab) if u not in known})


# ---------------------------------------------------------------------------------------
# yield tables
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class YieldTable:
    """A validated long-format yield table.

    Attributes
    ----------
    key_fields
        Key column names (as the stand attributes are named).
    frame
        Cleaned table: key columns as text, ``age`` / ``volume`` (and ``diameter``) as float,
        under the column names given by :class:`~spatialplan.settings.YieldColumns`.
    columns
        Column names used.
    source
        File name (or a description) used in messages.
    """

    key_fields: tuple[str, ...]
    frame: pd.DataFrame
    columns: YieldColumns = field(default_factory=YieldColumns)
    source: str = "<yield table>"
    _vol: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict, repr=False)
    _dia: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        c = self.columns
        labels = stratum_labels(self.frame, self.key_fields)
        has_dia = c.diameter_column in self.frame.columns
        for lab in pd.unique(labels):
            sub = self.frame[labels == lab]
            ages = sub[c.age_column].to_numpy(float)
            self._vol[lab] = _curve_xy(ages, sub[c.volume_column].to_numpy(float))
            if has_dia:
                d = sub[c.diameter_column].to_numpy(float)
                if np.isfinite(d).all():
                    self._dia[lab] = _curve_xy(ages, d)

    @property
    def strata(self) -> list[str]:
        """Stratum labels in file order."""
        return list(self._vol)

    @property
    def has_diameter(self) -> bool:
        """True when at least one stratum has a diameter curve."""
        return bool(self._dia)

    def has_stratum(self, label: str) -> bool:
        """True when the table holds ``label``."""
        return label in self._vol

    def tabulated(self, label: str) -> pd.DataFrame:
        """Rows of one stratum."""
        labels = stratum_labels(self.frame, self.key_fields)
        return self.frame[labels == label]

    def volume(self, strata: object, ages: object) -> np.ndarray:
        """Volume (m3/ha) by linear interpolation, vectorised.

        Parameters
        ----------
        strata
            (n,) stratum labels.
        ages
            (n,) or (n, P) ages in years (a scalar or (P,) row broadcasts too).

        Returns
        -------
        numpy.ndarray
            Volumes with the broadcast shape; (0, 0) below the first age, flat after the last.

        Raises
        ------
        InputError
            A label is not in the table.
        """
        bad = _unknown(strata, set(self._vol))
        if bad:
            msg = f"yield table {self.source} has no stratum {', '.join(bad)}"
            raise InputError(msg)
        return _evaluate(strata, ages, self._vol)

    def diameter(self, strata: object, ages: object) -> np.ndarray | None:
        """Mean diameter (cm) by the same interpolation, or ``None`` without a diameter column.

        Strata whose diameter cells are empty get NaN.
        """
        if self.columns.diameter_column not in self.frame.columns:
            return None
        return _evaluate(strata, ages, self._dia)

    def to_csv_text(self) -> str:
        """The cleaned table as CSV text (what the output GeoPackage records)."""
        return self.frame.to_csv(index=False, lineterminator="\n")


def load_yield_table(
    path: str | Path, key_fields: Sequence[str], columns: YieldColumns | None = None
) -> YieldTable:
    """Read and validate a long-format yield-table CSV.

    Parameters
    ----------
    path
        CSV file: the key columns (named like the stand attributes), an age column, a volume
        column (m3/ha) and optionally a mean-diameter column (cm).
    key_fields
        Key column names.
    columns
        Column names of age, volume and diameter.

    Returns
    -------
    YieldTable

    Raises
    ------
    InputError
        Every problem at once, naming the file, key and line: missing or unreadable file,
        missing columns (with the columns that exist), non-numeric values, ages not strictly
        increasing per key, duplicate ages, negative volumes.
    """
    p = Path(path)
    if not p.is_file():
        msg = f"yield table not found: {p}"
        raise InputError(msg)
    try:
        df = pd.read_csv(p, dtype=str, keep_default_na=False, skipinitialspace=True)
    except UnicodeDecodeError:
        bad = [i for i, ln in enumerate(p.read_bytes().split(b"\n"), start=1) if not _is_utf8(ln)]
        where = f" (line {bad[0]})" if bad else ""
        msg = f"yield table {p} is not UTF-8 text{where}; save it as CSV UTF-8"
        raise InputError(msg) from None
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        msg = f"yield table {p} cannot be read as CSV: {exc}"
        raise InputError(msg) from None
    return yield_table_from_frame(df, key_fields, columns, source=str(p))


def _is_utf8(raw: bytes) -> bool:
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError:
        return False
    return True


def yield_table_from_frame(
    df: pd.DataFrame,
    key_fields: Sequence[str],
    columns: YieldColumns | None = None,
    source: str = "<yield table>",
) -> YieldTable:
    """Validate a yield table given as a frame (e.g. the CSV text stored in a GeoPackage).

    Row numbers in messages are CSV lines, counting the header as line 1.

    Parameters
    ----------
    df
        Raw table; values may be text.
    key_fields, columns
        As for :func:`load_yield_table`.
    source
        Name used in messages.

    Returns
    -------
    YieldTable
    """
    columns = columns or YieldColumns()
    key_fields = tuple(key_fields)
    df = df.rename(columns=lambda c: str(c).strip())
    need = [*key_fields, columns.age_column, columns.volume_column]
    missing = [c for c in need if c not in df.columns]
    if missing:
        msg = (
            f"yield table {source} lacks column(s) {', '.join(missing)}; "
            f"it has: {', '.join(map(str, df.columns))}"
        )
        if len(df.columns) == 1 and any(sep in str(df.columns[0]) for sep in ";\t|"):
            msg += "; the file looks ';'-, tab- or '|'-separated: save it comma-separated"
        raise InputError(msg)
    if len(df) == 0:
        msg = f"yield table {source} has no rows"
        raise InputError(msg)
    has_dia = columns.diameter_column in df.columns
    keep = need + ([columns.diameter_column] if has_dia else [])
    raw = df[keep].reset_index(drop=True)
    line = np.arange(len(raw)) + 2
    labels = stratum_labels(raw, key_fields)
    problems: list[str] = []

    def num(col: str, allow_empty: bool) -> np.ndarray:
        txt = raw[col].astype(str).str.strip()
        vals = pd.to_numeric(txt, errors="coerce").to_numpy(float, copy=True)
        empty = (txt == "").to_numpy()
        bad = ~np.isfinite(vals) & ~(empty & allow_empty)
        for i in np.flatnonzero(bad):
            problems.append(
                f"line {line[i]} (key {labels[i]}): {col} {txt.iloc[i]!r} is not a number"
            )
        vals[empty] = np.nan
        return vals

    for k in key_fields:
        empty = (raw[k].astype(str).str.strip() == "").to_numpy()
        for i in np.flatnonzero(empty):
            problems.append(f"line {line[i]}: key column {k} is empty")
    age = num(columns.age_column, allow_empty=False)
    vol = num(columns.volume_column, allow_empty=False)
    dia = num(columns.diameter_column, allow_empty=True) if has_dia else None
    for i in np.flatnonzero(age < 0):
        problems.append(f"line {line[i]} (key {labels[i]}): negative age {age[i]:g}")
    for i in np.flatnonzero(vol < 0):
        problems.append(f"line {line[i]} (key {labels[i]}): negative volume {vol[i]:g}")
    if dia is not None:
        for i in np.flatnonzero(dia < 0):
            problems.append(f"line {line[i]} (key {labels[i]}): negative diameter {dia[i]:g}")
    # Order checks per key, in file order (tables are small: a plain loop is clearest).
    seen: dict[str, dict[float, int]] = {}
    last: dict[str, tuple[float, int]] = {}
    for row, (lab, a) in enumerate(zip(labels, age.tolist(), strict=True)):
        if not np.isfinite(a):
            continue
        prev = seen.setdefault(lab, {})
        if a in prev:
            problems.append(
                f"line {line[row]} (key {lab}): duplicate row for age {a:g} "
                f"(also on line {prev[a]})"
            )
        elif lab in last and a < last[lab][0]:
            problems.append(
                f"line {line[row]} (key {lab}): ages not strictly increasing "
                f"({a:g} after {last[lab][0]:g} on line {last[lab][1]})"
            )
        prev.setdefault(a, int(line[row]))
        if lab not in last or a > last[lab][0]:
            last[lab] = (a, int(line[row]))
    if dia is not None:
        for lab in pd.unique(labels):
            m = labels == lab
            e = (
                np.isnan(dia[m])
                & (raw[columns.diameter_column].astype(str).str.strip() == "")[m].to_numpy()
            )
            if e.any() and not e.all():
                first = line[np.flatnonzero(m)[np.flatnonzero(e)[0]]]
                problems.append(
                    f"line {first} (key {lab}): {columns.diameter_column} is empty on some rows "
                    "of this key; fill every row or leave the key's column empty"
                )
    if problems:
        more = len(problems) - _MAX_LISTED
        body = "\n  ".join(problems[:_MAX_LISTED])
        tail = f"\n  ... and {more} more" if more > 0 else ""
        msg = f"yield table {source} has {len(problems)} problem(s):\n  {body}{tail}"
        raise InputError(msg)
    clean = pd.DataFrame({k: raw[k].astype(str).str.strip() for k in key_fields})
    for k in key_fields:  # same normalisation as stratum labels
        clean[k] = [normalize_key(v) for v in clean[k]]
    clean[columns.age_column] = age
    clean[columns.volume_column] = vol
    if dia is not None:
        clean[columns.diameter_column] = dia
    return YieldTable(key_fields=key_fields, frame=clean, columns=columns, source=source)


def yield_table_from_csv_text(
    text: str, key_fields: Sequence[str], columns: YieldColumns | None = None, source: str = ""
) -> YieldTable:
    """Parse CSV text (as :meth:`YieldTable.to_csv_text` writes) and validate it."""
    df = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False)
    return yield_table_from_frame(df, key_fields, columns, source=source or "<yields_csv>")


# ---------------------------------------------------------------------------------------
# Chapman-Richards and increments
# ---------------------------------------------------------------------------------------
def chapman_richards(t: object, A: float, k: float, c: float) -> np.ndarray:
    """Chapman-Richards curve ``A (1 - exp(-k t))**c`` (Richards 1959; Chapman 1961).

    >>> float(chapman_richards(0.0, 500, 0.03, 3))
    0.0
    """
    t = np.asarray(t, dtype=float)
    return A * (-np.expm1(-k * t)) ** c


def chapman_richards_derivative(t: object, A: float, k: float, c: float) -> np.ndarray:
    """``dV/dt = A c k exp(-k t) (1 - exp(-k t))**(c - 1)`` (the continuous CAI)."""
    t = np.asarray(t, dtype=float)
    return A * c * k * np.exp(-k * t) * (-np.expm1(-k * t)) ** (c - 1.0)


def cr_mai(t: object, A: float, k: float, c: float) -> np.ndarray:
    """Mean annual increment ``V(t) / t`` of a Chapman-Richards curve (NaN at t <= 0)."""
    t = np.asarray(t, dtype=float)
    return mai(chapman_richards(t, A, k, c), t)


def cr_mai_culmination_age(k: float, c: float) -> float:
    """Exact age at which the MAI of a Chapman-Richards curve culminates.

    MAI is highest where CAI = MAI, i.e. ``t V'(t) = V(t)``; with ``x = k t`` this is
    ``exp(x) - 1 = c x``, independent of the asymptote ``A``. The positive root exists only
    for ``c > 1``; it is found by Newton's method from the right, where the convex function
    ``exp(x) - 1 - c x`` converges monotonically.

    Parameters
    ----------
    k, c
        Rate and shape parameters (``k > 0``).

    Returns
    -------
    float
        Culmination age in years, or NaN when ``c <= 1``: MAI then falls from age 0 onward
        (no interior maximum).

    >>> round(cr_mai_culmination_age(0.03, 3.0), 4)
    63.4605
    """
    if not (k > 0) or not (c > 1):
        return math.nan
    x = 2.0 * math.log(c) + 2.0  # exp(x0) = e^2 c^2 > 1 + c x0 for every c > 1
    for _ in range(200):
        f = math.expm1(x) - c * x
        step = f / (math.exp(x) - c)
        x -= step
        if abs(step) <= 1e-15 * max(x, 1e-300):
            break
    return x / k


def mai(vol: object, ages: object) -> np.ndarray:
    """Mean annual increment ``V(t) / t`` (m3/ha/yr), element-wise; NaN where ``t <= 0``."""
    v = np.asarray(vol, dtype=float)
    a = np.asarray(ages, dtype=float)
    v, a = np.broadcast_arrays(v, a)
    out = np.full(v.shape, np.nan)
    np.divide(v, a, out=out, where=a > 0)
    return out


def cai_table(vol: object, ages: object) -> np.ndarray:
    """Current annual increment as differences along the last axis.

    ``CAI[i] = (V[i] - V[i-1]) / (t[i] - t[i-1])`` with ``V = 0`` at ``t = 0`` before the
    first value. On a 1-year grid this is the annual difference ``V(t) - V(t - 1)``.

    Parameters
    ----------
    vol
        Volumes, last axis over ``ages``.
    ages
        (m,) increasing ages (> 0).
    """
    v = np.asarray(vol, dtype=float)
    a = np.asarray(ages, dtype=float)
    v0 = np.concatenate([np.zeros((*v.shape[:-1], 1)), v], axis=-1)
    a0 = np.concatenate([[0.0], a])
    return np.diff(v0, axis=-1) / np.diff(a0)


def mai_culmination_age_table(vol: object, ages: object) -> np.ndarray | float:
    """Age of the highest MAI along the last axis (first one on ties).

    Returns a float for 1-D input, else an array over the leading axes.
    """
    v = np.asarray(vol, dtype=float)
    a = np.asarray(ages, dtype=float)
    m = np.where(np.isnan(mai(v, a)), -np.inf, mai(v, a))
    idx = np.argmax(m, axis=-1)
    res = a[idx]
    return float(res) if np.ndim(res) == 0 else res


# ---------------------------------------------------------------------------------------
# the growth model used by the pipeline
# ---------------------------------------------------------------------------------------
def _settings_curves(curves: Mapping[str, StratumCurve], what: str) -> dict:
    out = {}
    for lab, cur in curves.items():
        if len(cur.ages) == 0 or len(cur.ages) != len(cur.values):
            msg = (
                f"setting 'growth.{what}.{lab}' needs equally long, non-empty 'ages' and "
                "'values' lists"
            )
            from spatialplan.errors import SettingsError

            raise SettingsError(msg)
        a = np.asarray(cur.ages, float)
        if np.any(np.diff(a) <= 0):
            from spatialplan.errors import SettingsError

            msg = f"setting 'growth.{what}.{lab}.ages' must be strictly increasing"
            raise SettingsError(msg)
        out[normalize_label(lab)] = _curve_xy(a, np.asarray(cur.values, float))
    return out


def normalize_label(label: str) -> str:
    """Normalise a stratum label given in settings (each ``/`` part like a key value)."""
    return "/".join(normalize_key(p) for p in str(label).split("/"))


@dataclass(frozen=True, eq=False)
class GrowthModel:
    """Volume, diameter and height by stratum and age (tables plus parametric curves).

    Build it with :func:`build_growth_model`. Chapman-Richards curves from the settings
    override a tabulated stratum of the same label or add a new one.
    """

    key_fields: tuple[str, ...]
    table: YieldTable | None
    volume_cr: dict[str, ChapmanRichards]
    diameter_curves: dict[str, tuple[np.ndarray, np.ndarray]]
    height_curves: dict[str, tuple[np.ndarray, np.ndarray]]
    height_cr: dict[str, ChapmanRichards]

    @property
    def strata(self) -> list[str]:
        """Every stratum with a volume curve (table order, then parametric-only ones)."""
        tab = self.table.strata if self.table is not None else []
        return tab + [s for s in self.volume_cr if s not in set(tab)]

    def has_stratum(self, label: str) -> bool:
        """True when ``label`` has a volume curve."""
        return label in self.volume_cr or (self.table is not None and self.table.has_stratum(label))

    def volume(self, strata: object, ages: object) -> np.ndarray:
        """Volume in m3/ha, vectorised over (n,) strata and (n,) or (n, P) ages.

        Raises
        ------
        InputError
            Some labels have no volume curve (all are listed).
        """
        bad = _unknown(strata, set(self.strata))
        if bad:
            msg = f"no yield curve for stratum {', '.join(bad)}"
            raise InputError(msg)
        tabs = self.table._vol if self.table is not None else {}
        return _evaluate(strata, ages, tabs, self.volume_cr)

    def diameter(self, strata: object, ages: object) -> np.ndarray:
        """Mean diameter in cm: table column, else ``growth.diameter_by_age``, else NaN."""
        tab = dict(self.diameter_curves)
        if self.table is not None:
            tab.update(self.table._dia)
        return _evaluate(strata, ages, tab)

    def height(self, strata: object, ages: object) -> np.ndarray | None:
        """Top height in m from ``growth.height_by_age`` / ``height_chapman_richards``.

        Returns ``None`` when the settings hold no height curve at all; NaN for strata
        without one.
        """
        if not self.height_curves and not self.height_cr:
            return None
        return _evaluate(strata, ages, self.height_curves, self.height_cr)


def build_growth_model(
    table: YieldTable | None, growth: GrowthSettings, key_fields: Sequence[str]
) -> GrowthModel:
    """Combine a yield table with the parametric and by-age curves of the settings.

    Parameters
    ----------
    table
        Validated yield table, or ``None`` when every stratum is parametric.
    growth
        ``[growth]`` settings.
    key_fields
        Yield-key attribute names.

    Returns
    -------
    GrowthModel
    """
    return GrowthModel(
        key_fields=tuple(key_fields),
        table=table,
        volume_cr={normalize_label(k): v for k, v in growth.chapman_richards.items()},
        diameter_curves=_settings_curves(growth.diameter_by_age, "diameter_by_age"),
        height_curves=_settings_curves(growth.height_by_age, "height_by_age"),
        height_cr={normalize_label(k): v for k, v in growth.height_chapman_richards.items()},
    )
