"""Adjacency of small test layers, computed without the package (shared by scheduler tests)."""

from __future__ import annotations

import numpy as np
import shapely


def grid_edges(rows: int, cols: int) -> np.ndarray:
    """Rook adjacency of a rows x cols grid of squares (shared sides only)."""
    e = []
    for r in range(rows):
        for c in range(cols):
            i = r * cols + c
            if c + 1 < cols:
                e.append((i, i + 1))
            if r + 1 < rows:
                e.append((i, i + cols))
    return np.array(e, dtype=np.int64)


def touch_edges(gdf) -> np.ndarray:
    """Stands sharing more than 1 m of boundary (shapely, independent of the package)."""
    g = np.asarray(gdf.geometry.values)
    a, b = shapely.STRtree(g).query(g, predicate="intersects")
    e = []
    for i, j in zip(a, b, strict=True):
        if i < j and shapely.length(shapely.intersection(g[i].boundary, g[j].boundary)) > 1.0:
            e.append((int(i), int(j)))
    return np.array(e, dtype=np.int64).reshape(-1, 2)
