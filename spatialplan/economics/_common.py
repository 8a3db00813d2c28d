"""Small helpers shared by the economics modules (private to the package)."""

from __future__ import annotations

import numpy as np
import pandas as pd

#: Oldest age (years) searched for a rotation when the settings give none.
DEFAULT_MAX_AGE = 300


def first_argmax(x: np.ndarray) -> np.ndarray:
    """Index of the largest value along the last axis, NaN never chosen (first on ties)."""
    x = np.where(np.isnan(x), -np.inf, x)
    return np.argmax(x, axis=-1)


def unique_rows(*cols: np.ndarray) -> tuple[list[np.ndarray], np.ndarray]:
    """Unique rows of aligned 1-D columns and the inverse (rows in order of first sight).

    Each column is factorised and the codes are combined pairwise (mixed radix, then
    factorised again, so the key never overflows): much faster than ``np.unique(axis=0)``.
    """
    key = np.zeros(len(cols[0]), dtype=np.int64)
    for c in cols:
        codes, uniq = pd.factorize(c, use_na_sentinel=False)
        key = pd.factorize(key * len(uniq) + codes, use_na_sentinel=False)[0]
    first = np.unique(key, return_index=True)[1]  # key codes 0, 1, ... in order of sight
    return [c[first] for c in cols], key.astype(np.int64)
