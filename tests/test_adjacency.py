"""Adjacency graph: hand-drawn layers checked against networkx reference graphs, shapely
DE-9IM predicates and a plain geopandas sjoin + boundary-intersection method."""

from __future__ import annotations

import geopandas as gpd
import networkx as nx
import numpy as np
import pytest
import shapely

from spatialplan.adjacency import build_adjacency, connected_openings
from spatialplan.errors import InputError
from spatialplan.synthetic import voronoi_forest

CRS = "EPSG:32610"


def squares(cells: list[tuple[int, int]], side: float = 100.0) -> np.ndarray:
    """Axis-aligned squares at integer grid cells (hand-drawn layers)."""
    return np.array(
        [shapely.box(i * side, j * side, (i + 1) * side, (j + 1) * side) for i, j in cells]
    )


def edge_set(edges: np.ndarray) -> set[tuple[int, int]]:
    return {(int(a), int(b)) for a, b in edges}


def sjoin_graph(gdf: gpd.GeoDataFrame, min_shared: float = 1.0) -> dict[tuple[int, int], float]:
    """Independent adjacency of a clean layer: geopandas sjoin on 'intersects', then the
    length of the intersection of the two boundaries (exact where vertices are shared)."""
    g = gdf[["geometry"]].reset_index(drop=True)
    j = gpd.sjoin(g, g, predicate="intersects")
    j = j[j.index < j["index_right"]]
    a = j.index.to_numpy()
    b = j["index_right"].to_numpy()
    geo = g.geometry.to_numpy()
    shared = shapely.length(
        shapely.intersection(shapely.boundary(geo[a]), shapely.boundary(geo[b]))
    )
    return {
        (int(x), int(y)): float(s) for x, y, s in zip(a, b, shared, strict=True) if s > min_shared
    }


def test_row_of_squares_is_a_path_graph() -> None:
    res = build_adjacency(squares([(i, 0) for i in range(5)]), ids=list("ABCDE"))
    # networkx reference: a row of 5 squares is the path graph P5
    assert edge_set(res.edges) == set(nx.path_graph(5).edges)
    assert nx.utils.graphs_equal(nx.Graph(res.graph.edges), nx.Graph(nx.path_graph(5).edges))
    # each pair shares one full 100 m side (geometry of the drawing)
    np.testing.assert_allclose(res.shared_m, 100.0, atol=1e-9)
    assert res.graph.nodes[2]["stand_id"] == "C"
    assert res.graph.edges[1, 2]["shared_m"] == pytest.approx(100.0)
    assert res.edges.dtype.kind == "i"
    assert (res.edges[:, 0] < res.edges[:, 1]).all()


def test_checkerboard_corner_contacts() -> None:
    cells = [(i, j) for i in range(4) for j in range(4) if (i + j) % 2 == 0]
    geoms = squares(cells)
    assert len(build_adjacency(geoms).edges) == 0  # corner-only contact is not adjacency
    res = build_adjacency(geoms, corner_adjacency=True)
    # reference 1: cells one step apart diagonally (drawing)
    diag = {
        (a, b)
        for a in range(len(cells))
        for b in range(a + 1, len(cells))
        if abs(cells[a][0] - cells[b][0]) == 1 and abs(cells[a][1] - cells[b][1]) == 1
    }
    # reference 2: shapely's DE-9IM 'touches' predicate on every pair
    touch = {
        (a, b)
        for a in range(len(cells))
        for b in range(a + 1, len(cells))
        if shapely.touches(geoms[a], geoms[b])
    }
    assert edge_set(res.edges) == diag == touch
    np.testing.assert_allclose(res.shared_m, 0.0, atol=1e-6)


def test_ring_around_a_hole_is_a_cycle() -> None:
    # 3 x 3 grid without its centre, listed around the ring
    ring = [(0, 0), (1, 0), (2, 0), (2, 1), (2, 2), (1, 2), (0, 2), (0, 1)]
    res = build_adjacency(squares(ring))
    # networkx reference: the 8 cells form the cycle C8; the diagonal contacts at the
    # hole's corners are corner-only and do not count
    assert edge_set(res.edges) == {tuple(sorted(e)) for e in nx.cycle_graph(8).edges}
    assert nx.is_isomorphic(res.graph, nx.cycle_graph(8))


def test_stand_with_a_hole_and_an_island() -> None:
    outer = shapely.Polygon(
        [(0, 0), (300, 0), (300, 300), (0, 300)], [[(100, 100), (200, 100), (200, 200), (100, 200)]]
    )
    island = shapely.box(100, 100, 200, 200)
    east = shapely.box(300, 0, 400, 300)
    res = build_adjacency(np.array([outer, island, east]))
    assert edge_set(res.edges) == {(0, 1), (0, 2)}
    # island shares the whole 400 m hole boundary; east shares 300 m (drawing)
    np.testing.assert_allclose(res.shared_m, [400.0, 300.0], atol=1e-9)


def test_matches_sjoin_boundary_method_on_generated_layer() -> None:
    gdf = voronoi_forest(300, seed=5)
    res = build_adjacency(gdf.geometry)
    ref = sjoin_graph(gdf)
    got = dict(zip(map(tuple, res.edges.tolist()), res.shared_m, strict=True))
    assert set(got) == set(ref)
    for k, v in ref.items():
        assert got[k] == pytest.approx(v, abs=1e-3)


def test_shrunk_grid_same_graph_with_default_tolerance() -> None:
    geoms = squares([(i, j) for i in range(5) for j in range(4)])
    clean = build_adjacency(geoms)
    shrunk = build_adjacency(shapely.buffer(geoms, -0.2, join_style="mitre"))  # 0.4 m gaps
    assert edge_set(shrunk.edges) == edge_set(clean.edges)
    # facing edges of the shrunk squares are 100 - 2 x 0.2 m long (drawing)
    np.testing.assert_allclose(shrunk.shared_m, 99.6, atol=1e-6)
    assert shrunk.warnings == []


def test_shrunk_generated_layer_same_graph() -> None:
    gdf = voronoi_forest(400, seed=11)
    clean = build_adjacency(gdf.geometry)
    shrunk = build_adjacency(gdf.geometry.buffer(-0.2))  # round negative buffer, 0.4 m gaps
    a, b = edge_set(clean.edges), edge_set(shrunk.edges)
    assert b <= a  # shrinking never creates adjacency
    clean_len = dict(zip(map(tuple, clean.edges.tolist()), clean.shared_m, strict=True))
    # A shrink by d shortens a shared edge by d cot(angle/2) at each end, so only edges
    # barely above the 1 m threshold may drop out; none of 3 m or more may.
    assert all(clean_len[e] < 3.0 for e in a - b)
    shr_len = dict(zip(map(tuple, shrunk.edges.tolist()), shrunk.shared_m, strict=True))
    diff = np.array([clean_len[e] - shr_len[e] for e in b])
    assert diff.min() > -1e-6
    assert np.median(diff) < 0.5


def test_wide_gaps_and_overlaps_are_reported() -> None:
    geoms = squares([(0, 0), (1, 0)])
    apart = np.array([geoms[0], shapely.affinity.translate(geoms[1], 0.8)])  # 0.8 m gap
    res = build_adjacency(apart, ids=["S1", "S2"])
    assert len(res.edges) == 0
    assert list(res.gaps[["stand_a", "stand_b"]].iloc[0]) == ["S1", "S2"]
    assert res.gaps["gap_m"].iloc[0] == pytest.approx(0.8)
    assert any("S1-S2" in w and "0.80 m gap" in w for w in res.warnings)
    over = np.array([geoms[0], shapely.affinity.translate(geoms[1], -10.0)])  # 10 m overlap
    res = build_adjacency(over, ids=["S1", "S2"])
    # overlap area of two 100 m squares shifted by 10 m is 10 x 100 m2 (box arithmetic)
    assert res.overlaps["overlap_m2"].iloc[0] == pytest.approx(1000.0)
    assert any("S1-S2" in w and "overlap" in w for w in res.warnings)
    assert edge_set(res.edges) == {(0, 1)}


def test_geographic_crs_is_projected() -> None:
    gdf = voronoi_forest(60, seed=2)
    proj = build_adjacency(gdf.geometry)
    geo = build_adjacency(gdf.geometry.to_crs("EPSG:4326"))
    assert edge_set(geo.edges) == edge_set(proj.edges)
    assert any("geographic" in w for w in geo.warnings)


def test_bad_ids_raise() -> None:
    with pytest.raises(InputError, match="ids"):
        build_adjacency(squares([(0, 0), (1, 0)]), ids=["a"])


def test_connected_openings_match_networkx() -> None:
    gdf = voronoi_forest(200, seed=4)
    res = build_adjacency(gdf.geometry)
    rng = np.random.default_rng(0)
    for _ in range(5):
        mask = rng.random(len(gdf)) < 0.4
        got = {tuple(c.tolist()) for c in connected_openings(res.edges, mask)}
        # networkx reference: components of the subgraph induced by open stands
        ref = {
            tuple(sorted(c))
            for c in nx.connected_components(res.graph.subgraph(np.flatnonzero(mask).tolist()))
        }
        assert got == ref
    assert connected_openings(res.edges, np.zeros(len(gdf), bool)) == []
