"""Verify's own reading of the yield table and its own growth curves.

Written apart from :mod:`spatialplan.growth` on purpose; the mathematics is the documented
one (``docs/methods.md``, Growth):

* a *stratum* is a stand's yield-key values as text joined by ``/``; a value like ``2.0``
  is written ``2`` so a class stored as a number matches the same class in a CSV;
* tabulated curves (volume, diameter, height) are read linearly between tabulated ages,
  with the point (0, 0) below the first tabulated age and the last value held beyond the
  last one: exactly what :func:`numpy.interp` does on the table with (0, 0) put in front;
* ``growth.chapman_richards.<stratum> = {A, k, c}`` gives ``V(t) = A (1 - exp(-k t))^c``
  (Richards 1959; Chapman 1961) and replaces a tabulated stratum of the same label or adds
  one; ``growth.height_chapman_richards`` does the same for heights;
* diameter comes from the table's diameter column, else ``growth.diameter_by_age``.
"""

from __future__ import annotations

import io
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from spatialplan.errors import InputError
from spatialplan.settings import ChapmanRichards, GrowthSettings, StratumCurve, YieldColumns

__all__ = [
    "Curves",
    "YieldRows",
    "build_curves",
    "key_text",
    "label_text",
    "read_yield_rows",
    "stratum_of",
]

_WHOLE_NUMBER = re.compile(r"^[+-]?\d+\.0*$")
_MAX_LISTED = 10  # problems named in one message

Curve = tuple[np.ndarray, np.ndarray]  # ages, values; (0, 0) in front where needed


def key_text(value: object) -> str:
    """One yield-key value as text, ``2.0`` written ``2``.

    >>> key_text(" 2.0 "), key_text(3.0), key_text("II"), key_text("-0.0")
    ('2', '3', 'II', '0')
    """
    text = str(value).strip()
    if _WHOLE_NUMBER.match(text):
        text = text.split(".")[0].lstrip("+")
        text = "0" if text == "-0" else text
    return text


def stratum_of(frame: pd.DataFrame, keys: Sequence[str]) -> np.ndarray:
    """Stratum label of every row: the key columns as :func:`key_text`, joined by ``/``."""
    parts = [frame[k].map(key_text) for k in keys]
    label = parts[0]
    for p in parts[1:]:
        label = label + "/" + p
    return label.to_numpy(dtype=object)


def label_text(text: str) -> str:
    """A stratum label written in settings, each ``/`` part like a key value."""
    return "/".join(key_text(p) for p in str(text).split("/"))


def _with_origin(ages: np.ndarray, values: np.ndarray) -> Curve:
    if ages[0] > 0:
        return np.concatenate([[0.0], ages]), np.concatenate([[0.0], values])
    return ages, values


@dataclass(frozen=True, eq=False)
class YieldRows:
    """A yield table as verify read it: per stratum its tabulated curves.

    Attributes
    ----------
    source
        Where the table came from (file name or ``<plan>:run.yields_csv``), for messages.
    volume
        Stratum label -> (ages, m3/ha), ages increasing, (0, 0) in front where needed.
    diameter
        Stratum label -> (ages, cm) for strata whose diameter cells are filled.
    """

    source: str
    volume: dict[str, Curve]
    diameter: dict[str, Curve] = field(default_factory=dict)

    @property
    def strata(self) -> list[str]:
        """Stratum labels in file order."""
        return list(self.volume)


def _numbers(raw: pd.DataFrame, column: str, label: np.ndarray, problems: list[str]) -> np.ndarray:
    text = raw[column].astype(str).str.strip()
    values = pd.to_numeric(text, errors="coerce").to_numpy(dtype=float)
    for i in np.flatnonzero(~np.isfinite(values) & (text != "").to_numpy()):
        problems.append(
            f"line {i + 2} (stratum {label[i]}): {column} {text.iloc[i]!r} is not a number"
        )
    return values


def read_yield_rows(
    source: str | Path | pd.DataFrame,
    key_fields: Sequence[str],
    columns: YieldColumns,
    name: str | None = None,
    *,
    is_text: bool = False,
) -> YieldRows:
    """Read a long-format yield table: key columns, age, volume and an optional diameter.

    Parameters
    ----------
    source
        A CSV file, CSV text (with ``is_text``) or a frame of the same columns.
    key_fields
        Key column names (as the stand attributes are named).
    columns
        Names of the age, volume and diameter columns.
    name
        Name used in messages (default: the file name).
    is_text
        ``source`` is CSV text, not a file name.

    Returns
    -------
    YieldRows

    Raises
    ------
    InputError
        Missing file or column, non-numeric, negative or repeated ages and volumes, all
        named with their CSV line.
    """
    if isinstance(source, pd.DataFrame):
        raw = source.astype(str).replace({"nan": "", "None": ""})
        where = name or "<yield frame>"
    else:
        where = name or str(source)
        if not is_text and not Path(source).is_file():
            msg = f"yield table not found: {source}"
            raise InputError(msg)
        try:
            raw = pd.read_csv(
                io.StringIO(str(source)) if is_text else source,
                dtype=str,
                keep_default_na=False,
                skipinitialspace=True,
            )
        except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as e:
            msg = f"yield table {where} cannot be read as CSV: {e}"
            raise InputError(msg) from None
    raw = raw.rename(columns=lambda c: str(c).strip()).reset_index(drop=True)
    needed = [*key_fields, columns.age_column, columns.volume_column]
    missing = [c for c in needed if c not in raw.columns]
    if missing:
        msg = (
            f"yield table {where} lacks column(s) {', '.join(missing)}; "
            f"it has: {', '.join(map(str, raw.columns))}"
        )
        raise InputError(msg)
    label = stratum_of(raw, key_fields)
    problems: list[str] = []
    age = _numbers(raw, columns.age_column, label, problems)
    vol = _numbers(raw, columns.volume_column, label, problems)
    has_dia = columns.diameter_column in raw.columns
    dia = _numbers(raw, columns.diameter_column, label, problems) if has_dia else None
    for i in np.flatnonzero(np.isnan(age) | np.isnan(vol)):
        problems.append(f"line {i + 2} (stratum {label[i]}): age and volume are needed")
    for i in np.flatnonzero((age < 0) | (vol < 0)):
        problems.append(f"line {i + 2} (stratum {label[i]}): negative age or volume")
    volume: dict[str, Curve] = {}
    diameter: dict[str, Curve] = {}
    for lab in pd.unique(label):
        rows = np.flatnonzero(label == lab)
        order = rows[np.argsort(age[rows], kind="stable")]
        ages = age[order]
        if np.any(np.diff(ages) == 0):
            problems.append(f"stratum {lab}: an age is tabulated twice")
        volume[str(lab)] = _with_origin(ages, vol[order])
        if dia is not None and np.isfinite(dia[order]).all():
            diameter[str(lab)] = _with_origin(ages, dia[order])
        elif dia is not None and np.isfinite(dia[order]).any():
            problems.append(f"stratum {lab}: {columns.diameter_column} is filled on some rows only")
    if problems:
        more = f"; and {len(problems) - _MAX_LISTED} more" if len(problems) > _MAX_LISTED else ""
        msg = f"yield table {where}: " + "; ".join(problems[:_MAX_LISTED]) + more
        raise InputError(msg)
    return YieldRows(where, volume, diameter)


def _chapman_richards(t: np.ndarray, curve: ChapmanRichards) -> np.ndarray:
    return curve.A * (1.0 - np.exp(-curve.k * np.maximum(t, 0.0))) ** curve.c


def _settings_curves(curves: Mapping[str, StratumCurve]) -> dict[str, Curve]:
    out = {}
    for lab, cur in curves.items():
        order = np.argsort(np.asarray(cur.ages, dtype=float))
        out[label_text(lab)] = _with_origin(
            np.asarray(cur.ages, dtype=float)[order], np.asarray(cur.values, dtype=float)[order]
        )
    return out


@dataclass(frozen=True, eq=False)
class Curves:
    """Volume, diameter and height by stratum and age, as verify evaluates them.

    Build it with :func:`build_curves`. Every method takes (k,) stratum labels and (k,)
    ages and returns (k,) values.
    """

    source: str
    volume_table: dict[str, Curve]
    volume_cr: dict[str, ChapmanRichards]
    diameter_table: dict[str, Curve]
    height_table: dict[str, Curve]
    height_cr: dict[str, ChapmanRichards]

    @property
    def strata(self) -> set[str]:
        """Strata with a volume curve."""
        return set(self.volume_table) | set(self.volume_cr)

    @property
    def has_height(self) -> bool:
        """True when the settings give any height curve."""
        return bool(self.height_table or self.height_cr)

    @staticmethod
    def _evaluate(
        strata: np.ndarray,
        ages: np.ndarray,
        table: Mapping[str, Curve],
        cr: Mapping[str, ChapmanRichards],
    ) -> np.ndarray:
        strata = np.asarray(strata, dtype=object)
        ages = np.broadcast_to(np.asarray(ages, dtype=float), strata.shape)
        out = np.full(strata.shape, np.nan)
        for lab in pd.unique(strata):
            rows = strata == lab
            if lab in cr:  # a parametric curve replaces a tabulated one of the same stratum
                out[rows] = _chapman_richards(ages[rows], cr[lab])
            elif lab in table:
                out[rows] = np.interp(ages[rows], *table[lab])
        return out

    def volume(self, strata: np.ndarray, ages: np.ndarray) -> np.ndarray:
        """Volume in m3/ha.

        Raises
        ------
        InputError
            Some strata have no volume curve (all are named).
        """
        missing = sorted(set(map(str, pd.unique(np.asarray(strata, dtype=object)))) - self.strata)
        if missing:
            msg = f"no yield curve for stratum {', '.join(missing)} in {self.source}"
            raise InputError(msg)
        return self._evaluate(strata, ages, self.volume_table, self.volume_cr)

    def diameter(self, strata: np.ndarray, ages: np.ndarray) -> np.ndarray:
        """Mean diameter in cm; NaN for strata without a diameter curve."""
        return self._evaluate(strata, ages, self.diameter_table, {})

    def height(self, strata: np.ndarray, ages: np.ndarray) -> np.ndarray:
        """Top height in m; NaN for strata without a height curve."""
        return self._evaluate(strata, ages, self.height_table, self.height_cr)


def build_curves(rows: YieldRows | None, growth: GrowthSettings) -> Curves:
    """Combine a yield table (or none) with the curves of the ``[growth]`` settings."""
    diameter = _settings_curves(growth.diameter_by_age)
    if rows is not None:
        diameter.update(rows.diameter)  # the table's own diameter column wins
    sources = ([rows.source] if rows is not None else []) + (
        ["[growth] settings"] if growth.chapman_richards else []
    )
    return Curves(
        source=" and ".join(sources) or "no yield table",
        volume_table=dict(rows.volume) if rows is not None else {},
        volume_cr={label_text(k): v for k, v in growth.chapman_richards.items()},
        diameter_table=diameter,
        height_table=_settings_curves(growth.height_by_age),
        height_cr={label_text(k): v for k, v in growth.height_chapman_richards.items()},
    )
