"""Property tests: random, often broken, stand layers never crash ``check`` or ``plan``.

Layers are drawn on a small grid of 200 m cells and then damaged: bow-ties, slivers,
duplicates, overlaps, holes, multipolygons, empty and null geometries; attribute tables get
duplicate, missing and non-ASCII ids and junk ages. The properties: no unhandled exception
(exit code 70, "internal error", a traceback), inputs unchanged, and every plan written
passes the independent ``verify`` command.
"""

from __future__ import annotations

import geopandas as gpd
import shapely
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from spatialplan.synthetic import synthetic_yield_table
from tests.robustness.conftest import GuardedCli

CELL = 200.0
X0, Y0 = 500_000.0, 5_000_000.0
MAX_STANDS = 12


def _cell(k: int) -> shapely.Polygon:
    i, j = k % 4, k // 4
    return shapely.box(X0 + i * CELL, Y0 + j * CELL, X0 + (i + 1) * CELL, Y0 + (j + 1) * CELL)


@st.composite
def geometry(draw: st.DrawFn, k: int, previous: list) -> shapely.Geometry | None:
    """Stand ``k``'s geometry: usually its grid cell, sometimes broken in one of many ways."""
    c = _cell(k)
    x, y, x1, y1 = c.bounds
    kind = draw(
        st.sampled_from(
            [
                "cell",
                "cell",
                "cell",
                "cell",
                "bowtie",
                "sliver",
                "duplicate",
                "overlap",
                "hole",
                "multi",
                "empty",
                "null",
                "collinear",
                "spike",
            ]
        )
    )
    if kind == "bowtie":
        return shapely.Polygon([(x, y), (x1, y1), (x1, y), (x, y1)])
    if kind == "sliver":
        w = draw(st.sampled_from([1e-6, 1e-3, 0.5]))
        return shapely.box(x, y, x1, y + w)
    if kind == "duplicate" and previous:
        return draw(st.sampled_from(previous))
    if kind == "overlap":
        d = draw(st.floats(10.0, 150.0))
        return shapely.box(x - d, y, x1, y1)
    if kind == "hole":
        return c.difference(shapely.box(x + 50, y + 50, x1 - 50, y1 - 50))
    if kind == "multi":
        return shapely.MultiPolygon(
            [shapely.box(x, y, x + 80, y + 80), shapely.box(x + 120, y + 120, x1, y1)]
        )
    if kind == "empty":
        return shapely.Polygon()
    if kind == "null":
        return None
    if kind == "collinear":
        return shapely.Polygon([(x, y), (x + 50, y), (x1, y)])
    if kind == "spike":  # a ring that doubles back on itself
        return shapely.Polygon([(x, y), (x1, y), (x1, y1), (x1, y1 + 50), (x1, y1), (x, y1)])
    return c


AGES = st.one_of(
    st.integers(0, 200),
    st.integers(0, 200),
    st.integers(0, 200),
    st.floats(0, 200, allow_nan=False),
    st.just(None),
    st.just(-5),
    st.just(5000),
    st.just("old"),
    st.just(""),
    st.just(" 45 "),
)
IDS = st.one_of(st.just(None), st.sampled_from(["S01", "Å-1", "森", "<b>x</b>", "7", "7.0"]))


@st.composite
def stand_layer(draw: st.DrawFn) -> gpd.GeoDataFrame:
    n = draw(st.integers(1, MAX_STANDS))
    geoms: list = []
    for k in range(n):
        geoms.append(draw(geometry(k, [g for g in geoms if g is not None])))
    # Clean attributes half of the time, so that many examples get as far as a plan.
    messy = draw(st.booleans())
    ids = [draw(IDS) if messy and draw(st.booleans()) else f"T{k:02d}" for k in range(n)]
    ages = [draw(AGES) if messy else draw(st.integers(1, 150)) for _ in range(n)]
    keys = ["S1", "S2", "S3", "S9", None] if messy else ["S1", "S2", "S3"]
    strata = [draw(st.sampled_from(keys)) for _ in range(n)]
    return gpd.GeoDataFrame(
        {"stand_id": ids, "age": [None if a is None else str(a) for a in ages],
         "stratum": strata},
        geometry=geoms, crs="EPSG:32610",
    )  # fmt: skip


@settings(
    max_examples=20,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(
    layer=stand_layer(),
    skip_unmatched=st.booleans(),
    no_map=st.booleans(),
    max_opening=st.sampled_from(["5", "10", "40"]),
)
def test_check_and_plan_never_crash(
    tmp_path_factory, layer: gpd.GeoDataFrame, skip_unmatched: bool, no_map: bool, max_opening: str
) -> None:
    d = tmp_path_factory.mktemp("fuzz")
    stands = d / "stands.gpkg"
    layer.to_file(stands, layer="stands", driver="GPKG")
    yields = d / "yields.csv"
    synthetic_yield_table(["S1", "S2", "S3"]).to_csv(yields, index=False)
    run = GuardedCli()
    run.guard(stands, yields)
    extra = ["--skip-unmatched"] if skip_unmatched else []
    res = run("check", stands, "--yields", yields, *extra)
    assert res.exit_code in (0, 1), res.output
    out = d / "plan.gpkg"
    res = run(
        "plan",
        stands,
        "--yields",
        yields,
        "--out",
        out,
        "--price",
        "40",
        "--periods",
        "2",
        "--time-limit",
        "1",
        "--workers",
        "1",
        "--max-opening",
        max_opening,
        *extra,
        *(["--no-map"] if no_map else []),
    )
    assert res.exit_code in (0, 1, 2, 3), res.output
    event(f"plan exit code {res.exit_code}")  # --hypothesis-show-statistics shows the mix
    assert "failed independent verification" not in res.output, res.output
    if res.exit_code == 0:
        assert out.is_file()
        res = run("verify", out)
        assert res.exit_code == 0, res.output
    else:
        assert res.output.count("error:") == 1, res.output
        assert not out.exists()


@settings(
    max_examples=15,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(
    periods=st.integers(1, 4),
    period_length=st.sampled_from(["1", "5", "10"]),
    max_opening=st.floats(0.5, 50.0),
    green_up=st.integers(1, 4),
    min_age=st.sampled_from(["0", "30", "80", "200"]),
    flow=st.sampled_from(["0", "0.05", "0.5", "1"]),
    non_declining=st.booleans(),
    volume_min=st.sampled_from([None, None, 1500.0, 1e8]),
    seed=st.integers(0, 3),
)
def test_random_rules_give_verified_plans_or_clear_errors(
    tmp_path_factory,
    periods: int,
    period_length: str,
    max_opening: float,
    green_up: int,
    min_age: str,
    flow: str,
    non_declining: bool,
    volume_min: float | None,
    seed: int,
) -> None:
    from spatialplan.synthetic import voronoi_forest

    d = tmp_path_factory.mktemp("rules")
    stands = d / "stands.gpkg"
    voronoi_forest(15, seed=seed, mean_area_ha=8.0).to_file(stands, layer="stands", driver="GPKG")
    yields = d / "yields.csv"
    synthetic_yield_table().to_csv(yields, index=False)
    toml = d / "rules.toml"
    toml.write_text("" if volume_min is None else f"[rules]\nperiod_volume_min_m3 = {volume_min}\n")
    run = GuardedCli()
    run.guard(stands, yields, toml)
    out = d / "plan.gpkg"
    res = run(
        "plan",
        stands,
        "--yields",
        yields,
        "--out",
        out,
        "--price",
        "40",
        "--no-map",
        "--settings",
        toml,
        "--periods",
        periods,
        "--period-length",
        period_length,
        "--max-opening",
        f"{max_opening:.3f}",
        "--green-up",
        green_up,
        "--min-age",
        min_age,
        "--flow-tolerance",
        flow,
        "--time-limit",
        "1",
        "--workers",
        "1",
        *(["--non-declining"] if non_declining else []),
    )
    event(f"plan exit code {res.exit_code}")
    assert res.exit_code in (0, 2, 3), res.output  # the inputs themselves are valid
    if res.exit_code == 0:
        assert run("verify", out).exit_code == 0
    else:
        assert res.output.count("error:") == 1 and not out.exists(), res.output
