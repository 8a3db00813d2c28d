"""Adjacency of small test layers, computed without the package (shared by scheduler tests)."""

from __future__ import annotations

import networkx as nx
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


def opening_breaches(pr, cuts: list[set[int]] | list[list[int]]) -> list[str]:
    """Over-size openings and unit-restriction breaches of a plan, by networkx.

    ``cuts[i]`` holds the harvest periods of stand ``i``. A stand cut in ``q`` is open in
    ``q .. q + G - 1`` after every harvest, and stands young at the start are open where
    ``initially_open`` says so (common practice, no source); an opening breaks the rule when
    it holds a stand opened by a cut and is larger than the limit.
    """
    n, P = pr.n_stands, pr.periods
    g = nx.Graph()
    g.add_nodes_from(range(n))
    g.add_edges_from(map(tuple, np.asarray(pr.edges)))
    G = pr.green_up_periods
    out = []
    for p in range(1, P + 1):
        new = {i for i in range(n) if any(q <= p <= q + G[i] - 1 for q in cuts[i])}
        opn = new | {i for i in range(n) if pr.initially_open[i, p - 1]}
        sub = g.subgraph(opn)
        if pr.max_opening_ha is not None:
            for comp in nx.connected_components(sub):
                if comp & new and sum(pr.opening_area_ha[i] for i in comp) > pr.max_opening_ha:
                    out.append(f"opening {p} {sorted(comp)}")
        if pr.unit_restriction:
            for a, b in sub.edges:
                if a in new or b in new:
                    out.append(f"unit {p} {a}-{b}")
    return out
