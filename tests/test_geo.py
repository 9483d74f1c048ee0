"""Regions from boundaries: loading GeoJSON polygons and assigning points to them.

Outside sources:
- shapely 2 (GEOS) ``covers`` predicate, called point by point as a brute-force reference
  for ``assign`` (boundary points count as inside); ``shapely.geometry.shape`` to read the
  file independently.
- Python's ``json`` module to read the boundaries file independently of the loader.
- RFC 7946 (GeoJSON) §3.1.1 positions are [longitude, latitude]; §3.3 FeatureCollection.
- Arithmetic on an axis-aligned grid of unit squares, where points on shared edges and
  corners are exactly representable, for the smallest-id rule.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest
import shapely
from shapely.geometry import shape

from reduce._scenario import generate
from reduce.demo import SEED as DEMO_SEED
from reduce.errors import ReduceError, SourceError
from reduce.maps.boundaries import Boundaries, assign, assign_expr, load_boundaries

# ------------------------------------------------------------------------------------ fixtures


@pytest.fixture(scope="module")
def provinces_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo provinces (the demo seed gives the same provinces at any row count)."""
    return generate(tmp_path_factory.mktemp("demo"), rows=20_000, seed=DEMO_SEED).provinces


@pytest.fixture(scope="module")
def provinces(provinces_path: Path) -> Boundaries:
    return load_boundaries(provinces_path, "code")


def write_collection(path: Path, features: list[dict[str, Any]]) -> Path:
    path.write_text(json.dumps({"type": "FeatureCollection", "features": features}))
    return path


def square_feature(code: Any, x: float, y: float, size: float = 1.0) -> dict[str, Any]:
    ring = [[x, y], [x + size, y], [x + size, y + size], [x, y + size], [x, y]]
    return {
        "type": "Feature",
        "properties": {"code": code},
        "geometry": {"type": "Polygon", "coordinates": [ring]},
    }


def brute_force(b: Boundaries, lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    """Reference: for each point, the first polygon (sorted ids) that covers it."""
    out = np.full(lat.size, -1, dtype=np.int32)
    points = shapely.points(lon, lat)
    for k in reversed(range(len(b.geoms))):  # smaller indexes overwrite larger ones
        out[shapely.covers(b.geoms[k], points)] = k
    return out


def covering_sets(b: Boundaries, lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    points = shapely.points(lon, lat)
    return np.column_stack([shapely.covers(g, points) for g in b.geoms])


# ------------------------------------------------------------------------------------- loading


def test_load_sorts_by_id_and_keeps_each_geometry(
    provinces_path: Path, provinces: Boundaries
) -> None:
    raw = json.loads(provinces_path.read_text())  # Python's json, shapely's reader
    by_code = {f["properties"]["code"]: shape(f["geometry"]) for f in raw["features"]}
    assert provinces.ids == tuple(sorted(by_code))
    assert len(provinces.ids) == 12
    for code, geom in zip(provinces.ids, provinces.geoms, strict=True):
        assert shapely.equals_exact(geom, by_code[code], tolerance=0.0)
    assert provinces.path == provinces_path
    with pytest.raises(AttributeError):
        provinces.ids = ()  # type: ignore[misc]


def test_integer_ids_are_read_as_their_decimal_text(tmp_path: Path) -> None:
    path = write_collection(
        tmp_path / "b.geojson", [square_feature(10, 0, 0), square_feature(9, 1, 0)]
    )
    b = load_boundaries(path, "code")
    assert b.ids == ("10", "9")  # text order, like every other key


def test_multipolygon_and_holes_are_accepted(tmp_path: Path) -> None:
    outer = [[0, 0], [4, 0], [4, 4], [0, 4], [0, 0]]
    hole = [[1, 1], [1, 3], [3, 3], [3, 1], [1, 1]]
    island = [[10, 10], [11, 10], [11, 11], [10, 10]]
    path = write_collection(
        tmp_path / "b.geojson",
        [
            {
                "type": "Feature",
                "properties": {"code": "M"},
                "geometry": {"type": "MultiPolygon", "coordinates": [[outer, hole], [island]]},
            },
            square_feature("H", 1, 1, 2.0),
        ],
    )
    b = load_boundaries(path, "code")
    assert b.ids == ("H", "M")
    got = assign(np.array([2.0, 0.5, 10.2, 3.0, 20.0]), np.array([2.0, 0.5, 10.5, 2.0, 20.0]), b)
    # (2,2) inside the hole is H's; (0.5,0.5) is M's; the island point is M's; (2,3) lies on
    # the hole's edge, covered by both: H sorts first; (20,20) is outside.
    assert got.tolist() == [0, 1, 1, 0, -1]


def error_of(path: Path, id_property: str = "code") -> str:
    with pytest.raises(SourceError) as exc:
        load_boundaries(path, id_property)
    msg = str(exc.value)
    assert "\n" not in msg
    assert isinstance(exc.value, ReduceError) and exc.value.exit_code == 2
    return msg


def test_a_missing_boundaries_file_is_an_error(tmp_path: Path) -> None:
    path = tmp_path / "nope.geojson"
    assert error_of(path) == f"{path}: boundaries file not found; check the path"


def test_a_boundaries_file_that_is_not_json_is_an_error(tmp_path: Path) -> None:
    path = tmp_path / "b.geojson"
    path.write_text('{"type": "FeatureCollection",\n "features": [}')
    assert error_of(path) == (
        f"{path}: not valid JSON (line 2, column 15); save the boundaries as GeoJSON (RFC 7946)"
    )


def test_not_a_feature_collection_errors(tmp_path: Path) -> None:
    path = tmp_path / "b.geojson"
    path.write_text(json.dumps(square_feature("A", 0, 0)))
    assert error_of(path) == (
        f"{path}: not a GeoJSON FeatureCollection (top-level type is 'Feature'); save the "
        "boundaries as a FeatureCollection of Polygon or MultiPolygon features"
    )
    path.write_text("[1, 2]")
    assert error_of(path) == (
        f"{path}: not a GeoJSON FeatureCollection (top-level type is 'list'); save the "
        "boundaries as a FeatureCollection of Polygon or MultiPolygon features"
    )
    path.write_text('{"type": "FeatureCollection", "features": []}')
    assert error_of(path) == (
        f"{path}: the FeatureCollection has no features; add the region polygons"
    )


def test_feature_without_id_names_its_index(tmp_path: Path) -> None:
    other = square_feature("B", 1, 0)
    other["properties"] = {"name": "no code here"}
    path = write_collection(tmp_path / "b.geojson", [square_feature("A", 0, 0), other])
    assert error_of(path) == (
        f"{path}: feature 1 has no 'code' property; give every feature an 'code' or name "
        "another id property"
    )
    assert error_of(path, "name") == (
        f"{path}: feature 0 has no 'name' property; give every feature an 'name' or name "
        "another id property"
    )


def test_duplicate_polygon_ids_are_an_error(tmp_path: Path) -> None:
    path = write_collection(
        tmp_path / "b.geojson",
        [square_feature("A", 0, 0), square_feature("B", 1, 0), square_feature("A", 2, 0)],
    )
    assert error_of(path) == (
        f"{path}: id 'A' (property 'code') appears in features 0 and 2; make the ids unique, "
        "or merge those features into one MultiPolygon"
    )


def test_non_polygon_geometry_error(tmp_path: Path) -> None:
    point: dict[str, Any] = {
        "type": "Feature",
        "properties": {"code": "P"},
        "geometry": {"type": "Point", "coordinates": [1.0, 2.0]},
    }
    path = write_collection(tmp_path / "b.geojson", [square_feature("A", 0, 0), point])
    assert error_of(path) == (
        f"{path}: feature 1 ('P') is a Point, not a Polygon or MultiPolygon; region "
        "boundaries must be polygons"
    )
    point["geometry"] = None
    path = write_collection(tmp_path / "b.geojson", [point])
    assert error_of(path) == (
        f"{path}: feature 0 ('P') has no geometry; give it a Polygon or MultiPolygon"
    )


def test_invalid_polygon_error_says_how_to_make_it_valid(tmp_path: Path) -> None:
    bowtie = {
        "type": "Feature",
        "properties": {"code": "X"},
        "geometry": {"type": "Polygon", "coordinates": [[[0, 0], [2, 2], [2, 0], [0, 2], [0, 0]]]},
    }
    path = write_collection(tmp_path / "b.geojson", [square_feature("A", 5, 5), bowtie])
    assert error_of(path) == (
        f"{path}: feature 1 ('X') is not a valid polygon (Self-intersection[1 1]); make it "
        "valid, e.g. with shapely.make_valid"
    )


def test_malformed_polygon_coordinates_are_an_error(tmp_path: Path) -> None:
    bad = {
        "type": "Feature",
        "properties": {"code": "X"},
        "geometry": {"type": "Polygon", "coordinates": [[[0, 0], [1, "east"], [1, 1], [0, 0]]]},
    }
    path = write_collection(tmp_path / "b.geojson", [bad])
    msg = error_of(path)
    assert msg.startswith(f"{path}: feature 0 ('X') has malformed Polygon coordinates (")
    assert msg.endswith("); write closed rings of [longitude, latitude] positions (RFC 7946)")


# ------------------------------------------------------------------------------------ assigning


def points_on_and_around(b: Boundaries, seed: int = 20240611) -> tuple[np.ndarray, np.ndarray]:
    """>= 20,000 points: random ones over and around the provinces, every vertex, points
    interpolated along every edge, points a hair off the coast, and far outside."""
    rng = np.random.default_rng(seed)
    xmin, ymin, xmax, ymax = shapely.total_bounds(np.asarray(b.geoms, dtype=object))
    n = 20_000
    lon = [rng.uniform(xmin - 0.2, xmax + 0.2, n)]
    lat = [rng.uniform(ymin - 0.2, ymax + 0.2, n)]
    for g in b.geoms:
        c = shapely.get_coordinates(g)
        lon.append(c[:, 0])  # every vertex, shared ones included
        lat.append(c[:, 1])
        t = rng.uniform(0, 1, (3, len(c) - 1))  # along every edge, and each midpoint
        for tt in (*t, np.full(len(c) - 1, 0.5)):
            lon.append(c[:-1, 0] + tt * (c[1:, 0] - c[:-1, 0]))
            lat.append(c[:-1, 1] + tt * (c[1:, 1] - c[:-1, 1]))
    outline = shapely.union_all(b.geoms)
    coast = shapely.get_coordinates(outline.exterior)
    centre = np.asarray(outline.centroid.coords[0])
    away = (coast - centre) / np.linalg.norm(coast - centre, axis=1)[:, None]
    for eps in (1e-9, -1e-9):
        lon.append(coast[:, 0] + eps * away[:, 0])
        lat.append(coast[:, 1] + eps * away[:, 1])
    lon.append(np.array([0.0, 179.0, -179.0, xmin - 5.0]))
    lat.append(np.array([0.0, 80.0, -80.0, ymin]))
    return np.concatenate(lat), np.concatenate(lon)


def test_assign_equals_brute_force_covers_with_smallest_id(provinces: Boundaries) -> None:
    lat, lon = points_on_and_around(provinces)
    assert lat.size >= 20_000
    got = assign(lat, lon, provinces)
    assert got.dtype == np.int32
    want = brute_force(provinces, lat, lon)
    assert np.array_equal(got, want)
    # The comparison exercises every case: outside, inside one, on a shared border.
    cover = covering_sets(provinces, lat, lon).sum(axis=1)
    assert (cover == 0).sum() > 1000
    assert (cover == 1).sum() > 10_000
    # Shared vertices, and the interpolated border points that land exactly on a border
    # (most land a rounding step to one side; the grid test below covers exact edges).
    assert (cover >= 2).sum() >= 50
    assert (cover >= 3).sum() >= 10  # the nodes where three provinces meet


def test_shared_vertices_go_to_the_smallest_id(provinces: Boundaries) -> None:
    # Owners found from the vertex lists alone (no geometry predicate): a vertex shared by
    # several provinces is on each one's boundary, so covered by each.
    owners: dict[tuple[float, float], set[int]] = {}
    for k, g in enumerate(provinces.geoms):
        for x, y in shapely.get_coordinates(g).tolist():
            owners.setdefault((x, y), set()).add(k)
    shared = {v: ks for v, ks in owners.items() if len(ks) >= 2}
    assert len(shared) >= 20
    verts = np.asarray(list(shared))
    got = assign(verts[:, 1], verts[:, 0], provinces)
    assert got.tolist() == [min(ks) for ks in shared.values()]
    assert any(len(ks) >= 3 for ks in shared.values())


def test_points_exactly_on_grid_edges_and_corners_go_to_the_smallest_id(tmp_path: Path) -> None:
    # A 3 x 3 grid of unit squares, ids scrambled so sorted order is not grid order.
    codes = ["G", "C", "I", "A", "E", "H", "B", "F", "D"]
    feats = [
        square_feature(codes[3 * r + c], float(c), float(r)) for r in range(3) for c in range(3)
    ]
    b = load_boundaries(write_collection(tmp_path / "grid.geojson", feats), "code")
    rng = np.random.default_rng(5)
    xs: list[float] = []
    ys: list[float] = []
    for _ in range(4000):  # exact: multiples of 1/8 and 1/2 are binary fractions
        xs.append(int(rng.integers(0, 25)) / 8.0)
        ys.append(int(rng.integers(0, 25)) / 8.0)
    xs += [0.5, 1.0, 1.0, 2.0, 3.0, 0.0, 1.5, -0.125, 3.125]
    ys += [1.0, 0.5, 1.0, 2.0, 3.0, 0.0, 3.0, 1.0, 2.0]
    x, y = np.asarray(xs), np.asarray(ys)

    def expected(px: float, py: float) -> int:
        # Squares whose closed box holds the point; the smallest code wins.
        hits = [
            codes[3 * r + c]
            for r in range(3)
            for c in range(3)
            if c <= px <= c + 1 and r <= py <= r + 1
        ]
        return b.ids.index(min(hits)) if hits else -1

    got = assign(y, x, b)
    assert got.tolist() == [expected(px, py) for px, py in zip(xs, ys, strict=True)]
    on_edges = sum(
        1
        for px, py in zip(xs, ys, strict=True)
        if (px % 1 == 0 or py % 1 == 0) and 0 <= px <= 3 and 0 <= py <= 3
    )
    assert on_edges > 1000


def test_invalid_coordinates_get_minus_one(tmp_path: Path) -> None:
    # A region touching the corner of the valid range (lat 90, lon 180).
    corner = {
        "type": "Feature",
        "properties": {"code": "N"},
        "geometry": {
            "type": "Polygon",
            "coordinates": [[[170, 80], [180, 80], [180, 90], [170, 90], [170, 80]]],
        },
    }
    b = load_boundaries(write_collection(tmp_path / "b.geojson", [corner]), "code")
    lat = np.array([85.0, 90.0, np.nan, 85.0, np.inf, 85.0, 90.0 + 1e-9, 85.0, -np.inf, 95.0])
    lon = np.array([175.0, 180.0, 175.0, np.nan, 175.0, -np.inf, 175.0, 180 + 1e-9, 175.0, 175.0])
    assert assign(lat, lon, b).tolist() == [0, 0, -1, -1, -1, -1, -1, -1, -1, -1]


def test_assign_keeps_shape_and_accepts_lists(provinces: Boundaries) -> None:
    assert assign(np.array([]), np.array([]), provinces).shape == (0,)
    g = provinces.geoms[3]
    p = g.representative_point()
    grid = assign(np.full((2, 3), p.y), np.full((2, 3), p.x), provinces)
    assert grid.shape == (2, 3) and (grid == 3).all()
    assert assign([p.y], [p.x], provinces).tolist() == [3]  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="lat has shape"):
        assign(np.zeros(3), np.zeros(4), provinces)


def test_assign_is_the_same_in_chunks_and_at_once(provinces: Boundaries) -> None:
    lat, lon = points_on_and_around(provinces, seed=3)
    whole = assign(lat, lon, provinces)
    parts = np.concatenate(
        [assign(lat[i : i + 997], lon[i : i + 997], provinces) for i in range(0, lat.size, 997)]
    )
    assert np.array_equal(whole, parts)


# ------------------------------------------------------------------------ the polars expression


def test_assign_expr_in_a_streaming_collect(provinces: Boundaries, tmp_path: Path) -> None:
    lat, lon = points_on_and_around(provinces, seed=11)
    lat_l: list[float | None] = lat.tolist()
    lon_l: list[float | None] = lon.tolist()
    lat_l[5] = None  # a null coordinate has no region
    lon_l[7] = None
    path = tmp_path / "points.parquet"
    pl.DataFrame({"lat": lat_l, "lon": lon_l, "n": range(len(lat_l))}).write_parquet(
        path, row_group_size=5_000
    )
    lf = (
        pl.scan_parquet(path)
        .with_columns(assign_expr("lat", "lon", provinces).alias("province"))
        .select("n", "province")
    )
    streamed = lf.collect(engine="streaming").sort("n")
    assert streamed.schema["province"] == pl.String
    want_idx = brute_force(provinces, lat, lon)
    want = [provinces.ids[i] if i >= 0 else None for i in want_idx.tolist()]
    want[5] = want[7] = None
    assert streamed.get_column("province").to_list() == want
    # The same expression in a grouped streaming query (as the one-scan partial uses keys).
    counts = (
        pl.scan_parquet(path)
        .group_by(assign_expr("lat", "lon", provinces))
        .agg(pl.len())
        .collect(engine="streaming")
    )
    got_counts = dict(zip(counts["region"].to_list(), counts["len"].to_list(), strict=True))
    want_counts: dict[str | None, int] = {}
    for w in want:
        want_counts[w] = want_counts.get(w, 0) + 1
    assert got_counts == want_counts


def test_assign_expr_handles_integer_and_float32_columns(provinces: Boundaries) -> None:
    p = provinces.geoms[0].representative_point()
    df = pl.DataFrame(
        {"la": [p.y, 0.0], "lo": [p.x, 0.0]}, schema={"la": pl.Float32, "lo": pl.Float32}
    )
    out = df.lazy().select(assign_expr("la", "lo", provinces)).collect(engine="streaming")
    assert out.columns == ["region"]
    # Float32 rounding may move the point; the answer must be what assign gives for it.
    idx = assign(
        df["la"].cast(pl.Float64).to_numpy(), df["lo"].cast(pl.Float64).to_numpy(), provinces
    )
    assert out["region"].to_list() == [provinces.ids[i] if i >= 0 else None for i in idx.tolist()]
    assert out["region"][1] is None
    ints = pl.DataFrame({"la": [0, 1], "lo": [0, 1]})
    assert ints.select(assign_expr("la", "lo", provinces))["region"].to_list() == [None, None]
