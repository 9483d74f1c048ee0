"""Geometry under the budget: shared-border simplification, rounding, coordinate bytes.

Outside sources:
- shapely 2 (GEOS): ``is_valid`` (OGC validity), ``area``, ``union_all``, ``intersection``
  and ``length`` as the references for "valid", "no overlaps" (the union's area equals the
  sum of the parts' areas) and "no gaps" (the union has no holes the input did not have,
  and where two neighbours touch along a line, they do so with identical edges).
- Python's ``json`` module to read the demo file independently, and to count the bytes a
  GeoJSON ``coordinates`` array takes (RFC 7946 §3.1.1 positions, RFC 8259 numbers).
- The demo provinces (our own generated fixture) and a synthetic tiling built here: Voronoi
  cells of an invented wavy island, densified and bent by a smooth one-to-one warp so that
  borders wiggle, plus an enclave (a region inside another's hole), an offshore island
  (a MultiPolygon) and a T-junction.
"""

from __future__ import annotations

import itertools
import json
import math
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import shapely
import shapely.ops

from reduce._scenario import generate
from reduce.demo import SEED as DEMO_SEED
from reduce.maps.boundaries import Boundaries, load_boundaries
from reduce.maps.topology import (
    default_tolerance,
    geometry_bytes,
    quantize,
    simplify_shared,
)

# ------------------------------------------------------------------------------- the tilings


@pytest.fixture(scope="module")
def provinces(tmp_path_factory: pytest.TempPathFactory) -> Boundaries:
    """The demo provinces (the demo seed gives the same provinces at any row count)."""
    path = generate(tmp_path_factory.mktemp("demo"), rows=20_000, seed=DEMO_SEED).provinces
    return load_boundaries(path, "code")


def _wavy_ring(
    cx: float, cy: float, r: float, n: int, rng: np.random.Generator, amp: float
) -> np.ndarray:
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    rr = r * (
        1 + amp * np.sin(3 * t + rng.uniform(0, 6)) + 0.5 * amp * np.sin(7 * t + rng.uniform(0, 6))
    )
    return np.column_stack([cx + rr * np.cos(t), cy + rr * np.sin(t)])


def _warp(c: np.ndarray) -> np.ndarray:
    """A smooth map of the plane, one-to-one (amplitude x frequency < 1): borders wiggle,
    and a vertex shared by two polygons moves to the same place in both."""
    x, y = c[:, 0], c[:, 1]
    dx = 0.01 * np.sin(40 * y + 1.0) + 0.0008 * np.sin(300 * y + 0.5 * x)
    dy = 0.01 * np.sin(37 * x + 2.0) + 0.0008 * np.cos(290 * x - 0.5 * y)
    return np.column_stack([x + dx, y + dy])


def synthetic_tiling(seed: int = 11, n: int = 14) -> list[Any]:
    rng = np.random.default_rng(seed)
    cx, cy = 30.0, -20.0
    outline = shapely.Polygon(_wavy_ring(cx, cy, 1.0, 400, rng, 0.08))
    seeds: list[np.ndarray] = []
    while len(seeds) < n:
        p = rng.uniform(-0.9, 0.9, 2) + (cx, cy)
        if outline.contains(shapely.Point(p)):
            seeds.append(p)
    cells = shapely.get_parts(
        shapely.voronoi_polygons(
            shapely.multipoints(np.array(seeds)), extend_to=outline.buffer(0.5)
        )
    )
    # Node the coast and the cell borders once, densify each line once, polygonize: every
    # shared border has the same vertices on both sides.
    noded = shapely.segmentize(
        shapely.get_parts(shapely.union_all([outline.exterior, *(c.exterior for c in cells)])),
        0.005,
    )
    faces = [
        f
        for f in shapely.get_parts(shapely.polygonize(noded))
        if outline.contains(shapely.point_on_surface(f))
    ]
    faces.sort(key=lambda f: (round(f.centroid.x, 6), round(f.centroid.y, 6)))
    # An enclave: a small region inside a hole of the largest one.
    big = max(range(len(faces)), key=lambda i: faces[i].area)
    centre = shapely.ops.polylabel(faces[big], 0.001)
    lake = _wavy_ring(centre.x, centre.y, 0.05, 90, rng, 0.2)
    faces[big] = shapely.Polygon(faces[big].exterior.coords, [lake])
    faces.append(shapely.Polygon(lake))
    # An offshore island belonging to the coastal region nearest to it.
    island = shapely.Polygon(_wavy_ring(cx + 1.35, cy + 0.1, 0.12, 120, rng, 0.15))
    near = min(range(len(faces) - 1), key=lambda i: faces[i].distance(island))
    faces[near] = shapely.MultiPolygon([faces[near], island])
    return [shapely.transform(f, _warp) for f in faces]


def write_tiling(path: Path, geoms: Sequence[Any], codes: Sequence[str]) -> Path:
    features = [
        {
            "type": "Feature",
            "properties": {"code": c},
            "geometry": json.loads(shapely.to_geojson(g)),
        }
        for c, g in zip(codes, geoms, strict=True)
    ]
    path.write_text(json.dumps({"type": "FeatureCollection", "features": features}))
    return path


@pytest.fixture(scope="module")
def synthetic(tmp_path_factory: pytest.TempPathFactory) -> Boundaries:
    geoms = synthetic_tiling()
    # Ids scrambled, so sorted order is not the order the regions were made in.
    order = np.random.default_rng(3).permutation(len(geoms))
    codes = [f"S{int(i):02d}" for i in order]
    return load_boundaries(
        write_tiling(tmp_path_factory.mktemp("syn") / "s.geojson", geoms, codes), "code"
    )


@pytest.fixture(scope="module", params=["provinces", "synthetic"])
def tiling(request: pytest.FixtureRequest) -> Boundaries:
    b: Boundaries = request.getfixturevalue(request.param)
    return b


# ----------------------------------------------------------------------------------- helpers


def rings(geom: Any) -> Iterator[list[tuple[float, float]]]:
    for part in shapely.get_parts(geom):
        for ring in (part.exterior, *part.interiors):
            yield [tuple(p) for p in shapely.get_coordinates(ring).tolist()]


def edges(geom: Any) -> set[frozenset[tuple[float, float]]]:
    return {frozenset((a, b)) for r in rings(geom) for a, b in itertools.pairwise(r)}


def shared_runs(geom: Any, shared: set[frozenset[tuple[float, float]]]) -> set[tuple[Any, ...]]:
    """Maximal stretches of a polygon's rings made of ``shared`` edges, direction-free.

    Stretches that end where another starts are joined: a polygon pinched at a vertex
    (two parts touching there) walks a border in two pieces that its neighbour walks in one.
    """
    out: set[tuple[Any, ...]] = set()
    paths: list[list[tuple[float, float]]] = []
    for r in rings(geom):
        pts = r[:-1]
        m = len(pts)
        flags = [frozenset((pts[i], pts[(i + 1) % m])) in shared for i in range(m)]
        if all(flags):  # a whole ring (an enclave): compare as a cycle
            variants = [tuple(pts[i:] + pts[:i]) for i in range(m)]
            variants += [tuple((pts[::-1])[i:] + (pts[::-1])[:i]) for i in range(m)]
            out.add(("cycle", min(variants)))
            continue
        if not any(flags):
            continue
        start = flags.index(False)
        run: list[tuple[float, float]] = []
        for step in range(1, m + 1):
            i = (start + step) % m
            if flags[i]:
                run = run or [pts[i]]
                run.append(pts[(i + 1) % m])
            elif run:
                paths.append(run)
                run = []
    joined = True
    while joined:
        joined = False
        for a in range(len(paths)):
            for b in range(len(paths)):
                if a == b:
                    continue
                p, q = paths[a], paths[b]
                for qq in (q, q[::-1]):
                    if p[-1] == qq[0] and p[0] != qq[-1]:
                        paths[a] = p + qq[1:]
                        del paths[b]
                        joined = True
                        break
                if joined:
                    break
            if joined:
                break
    out.update(("path", min(tuple(r), tuple(r[::-1]))) for r in paths)
    return out


def neighbours(geoms: Sequence[Any], longer_than: float = 0.0) -> list[tuple[int, int]]:
    """Pairs of polygons that touch along a line (shapely's intersection, independently)."""
    pairs = []
    for i in range(len(geoms)):
        for j in range(i + 1, len(geoms)):
            border = shapely.intersection(geoms[i].boundary, geoms[j].boundary)
            if shapely.length(border) > longer_than:
                pairs.append((i, j))
    return pairs


def check_tiling(geoms: Sequence[Any], original: Sequence[Any], *, grid: float = 0.0) -> None:
    """Valid; no overlaps; no gaps; every pair of neighbours shares one identical border.

    Neighbours must stay neighbours, except (with ``grid``, after rounding) those whose
    border was under three grid steps long: rounding may shrink it to a point.
    """
    assert all(shapely.is_valid(g) for g in geoms)
    assert not any(g.is_empty for g in geoms)
    areas = [g.area for g in geoms]
    union = shapely.union_all(geoms)
    # No overlaps: the union's area is the sum of the parts' areas.
    assert math.isclose(union.area, sum(areas), rel_tol=1e-9)
    # No gaps: the union is the outline with no hole the input did not have, and its
    # area is its outline's area.
    before = shapely.union_all(original)
    assert shapely.get_num_geometries(union) == shapely.get_num_geometries(before)
    holes = sum(len(p.interiors) for p in shapely.get_parts(union))
    assert holes == sum(len(p.interiors) for p in shapely.get_parts(before)) == 0
    outline = shapely.union_all([shapely.Polygon(p.exterior) for p in shapely.get_parts(union)])
    assert math.isclose(union.area, outline.area, rel_tol=1e-12)
    # Neighbours stay neighbours, and along every stretch where two touch, they do so with
    # the same edges: the same coordinate sequence in both (one reversed).
    kept = neighbours(original, longer_than=3 * grid)
    assert kept and set(kept) <= set(neighbours(geoms))
    for i, j in neighbours(geoms):
        common = edges(geoms[i]) & edges(geoms[j])
        assert common, (i, j)
        touching = shapely.intersection(geoms[i].boundary, geoms[j].boundary)
        common_len = sum(math.dist(*tuple(e)) for e in common)
        assert math.isclose(shapely.length(touching), common_len, rel_tol=1e-9), (i, j)
        assert shared_runs(geoms[i], common) == shared_runs(geoms[j], common), (i, j)


def coordinates_bytes(geoms: Sequence[Any], digits: int) -> int:
    """Reference count: json.dumps of rounded [lon, lat] rings, compact separators."""
    total = 0
    for g in geoms:
        polys = [
            [[[round(x, digits) + 0.0, round(y, digits) + 0.0] for x, y in r] for r in rings(p)]
            for p in shapely.get_parts(g)
        ]
        for p in polys:
            for r in p:
                r[:] = [pt for k, pt in enumerate(r) if k == 0 or pt != r[k - 1]]
        doc: Any = polys[0] if shapely.get_type_id(g) == 3 else polys
        total += len(json.dumps(doc, separators=(",", ":")))
    return total


# ------------------------------------------------------------------------- the fixtures, sane


def test_the_inputs_are_valid_tilings(tiling: Boundaries) -> None:
    check_tiling(tiling.geoms, tiling.geoms)


def test_synthetic_tiling_has_an_enclave_an_island_and_wiggly_borders(
    synthetic: Boundaries,
) -> None:
    kinds = [g.geom_type for g in synthetic.geoms]
    assert kinds.count("MultiPolygon") == 1
    assert sum(len(p.interiors) for g in synthetic.geoms for p in shapely.get_parts(g)) == 1
    assert min(shapely.get_num_coordinates(np.asarray(synthetic.geoms))) >= 80


# ---------------------------------------------------------------------------- simplification


def test_simplified_tiling_is_valid_without_gaps_or_overlaps(tiling: Boundaries) -> None:
    tol = default_tolerance(tiling)
    simplified = simplify_shared(tiling, tol)
    assert len(simplified) == len(tiling.ids)
    assert [g.geom_type for g in simplified] == [g.geom_type for g in tiling.geoms]
    check_tiling(simplified, tiling.geoms)
    before = sum(shapely.get_num_coordinates(np.asarray(tiling.geoms)))
    after = sum(shapely.get_num_coordinates(np.asarray(simplified)))
    assert after < 0.8 * before


@pytest.mark.parametrize("factor", [10, 60])
def test_coarse_tolerances_still_keep_the_tiling_whole(tiling: Boundaries, factor: int) -> None:
    # Coarse enough that Douglas-Peucker on separate arcs makes some cross or collapse:
    # the arcs at fault are redone with smaller tolerances.
    simplified = simplify_shared(tiling, factor * default_tolerance(tiling))
    check_tiling(simplified, tiling.geoms)


def test_default_tolerance_changes_total_area_by_under_one_percent(
    tiling: Boundaries, record_property: Any
) -> None:
    tol = default_tolerance(tiling)
    simplified = simplify_shared(tiling, tol)
    a0 = np.array([g.area for g in tiling.geoms])
    a1 = np.array([g.area for g in simplified])
    total = abs(a1.sum() - a0.sum()) / a0.sum()
    worst = float(np.max(np.abs(a1 - a0) / a0))
    record_property("tolerance_degrees", tol)
    record_property("total_area_change", total)
    record_property("largest_region_area_change", worst)
    assert total < 0.01
    assert worst < 0.05


def test_bytes_saved_by_simplification_at_the_default_tolerance(
    provinces: Boundaries, record_property: Any, capsys: pytest.CaptureFixture[str]
) -> None:
    simplified = simplify_shared(provinces, default_tolerance(provinces))
    before, after = geometry_bytes(provinces.geoms, 6), geometry_bytes(simplified, 6)
    record_property("coordinate_bytes_before", before)
    record_property("coordinate_bytes_after", after)
    with capsys.disabled():
        print(
            f"\ndemo provinces, 6 digits: {before:,} -> {after:,} coordinate bytes "
            f"({1 - after / before:.0%} saved) at tolerance "
            f"{default_tolerance(provinces):.6f} degrees"
        )
    assert after < 0.75 * before


def test_geometry_bytes_counts_the_coordinates_as_geojson_writes_them(tiling: Boundaries) -> None:
    for digits in (6, 3):
        assert geometry_bytes(tiling.geoms, digits) == coordinates_bytes(tiling.geoms, digits)


def test_simplification_is_deterministic(synthetic: Boundaries) -> None:
    tol = 3 * default_tolerance(synthetic)
    a, b = simplify_shared(synthetic, tol), simplify_shared(synthetic, tol)
    assert all(shapely.equals_exact(x, y, tolerance=0.0) for x, y in zip(a, b, strict=True))


def test_zero_tolerance_gives_the_input_back(tiling: Boundaries) -> None:
    same = simplify_shared(tiling, 0.0)
    for g, h in zip(tiling.geoms, same, strict=True):
        assert shapely.equals(g, h)
        assert shapely.get_num_coordinates(g) == shapely.get_num_coordinates(h)


def test_simplifying_each_polygon_alone_fails_these_checks(synthetic: Boundaries) -> None:
    # The control: the checks above catch what shared arcs prevent.
    alone = [
        shapely.simplify(g, 3 * default_tolerance(synthetic), preserve_topology=True)
        for g in synthetic.geoms
    ]
    with pytest.raises(AssertionError):
        check_tiling(alone, synthetic.geoms)
    union = shapely.union_all(alone)
    assert not math.isclose(union.area, sum(g.area for g in alone), rel_tol=1e-9)


def test_a_t_junction_becomes_a_node(tmp_path: Path) -> None:
    # A tall region on the left; two on the right meet its side at (2, 1), which is not a
    # vertex of the tall region. Borders are bent so they have something to simplify.
    left = [(0, 0), (1, -0.01), (2, 0), (2, 2), (1, 2.01), (0, 2), (0, 0)]
    low = [(2, 0), (3, 0), (3, 1), (2.5, 1.002), (2, 1), (2, 0)]
    high = [(2, 1), (2.5, 1.002), (3, 1), (3, 2), (2, 2), (2, 1)]
    b = load_boundaries(
        write_tiling(
            tmp_path / "t.geojson", [shapely.Polygon(r) for r in (left, low, high)], ["L", "P", "Q"]
        ),
        "code",
    )
    out = simplify_shared(b, 0.05)
    check_tiling(out, b.geoms)
    assert (2.0, 1.0) in set(map(tuple, shapely.get_coordinates(out[0]).tolist()))
    # Bends below the tolerance are gone: each region is a plain rectangle now.
    assert [shapely.get_num_coordinates(g) for g in out] == [6, 5, 5]


def test_borders_computed_twice_are_merged_before_simplifying(tmp_path: Path) -> None:
    # Voronoi cells densified one by one: each side of a border gets its own interpolated
    # vertices, equal only up to the last bits, so the borders cross each other.
    rng = np.random.default_rng(8)
    seeds = shapely.multipoints(rng.uniform(0, 1, (7, 2)))
    frame = shapely.box(0, 0, 1, 1)
    cells = shapely.intersection(
        shapely.get_parts(shapely.voronoi_polygons(seeds, extend_to=frame)), frame
    )
    geoms = list(shapely.segmentize(cells, 0.003))
    b = load_boundaries(
        write_tiling(tmp_path / "v.geojson", geoms, [f"V{i}" for i in range(len(geoms))]), "code"
    )
    shared = [edges(b.geoms[i]) & edges(b.geoms[j]) for i, j in neighbours(b.geoms)]
    crossing = [
        (i, j)
        for i, j in itertools.combinations(range(len(geoms)), 2)
        if shapely.relate_pattern(b.geoms[i], b.geoms[j], "T********")
    ]
    assert crossing or sum(map(len, shared)) < 10  # the input is not a clean tiling
    out = simplify_shared(b, 0.001)
    check_tiling(out, quantize(b.geoms, 9))
    # Straight borders: only the corners are left.
    assert sum(shapely.get_num_coordinates(np.asarray(out))) < 0.1 * sum(
        shapely.get_num_coordinates(np.asarray(b.geoms))
    )


def test_negative_tolerance_is_refused(provinces: Boundaries) -> None:
    with pytest.raises(ValueError, match="tolerance must be a number >= 0 degrees"):
        simplify_shared(provinces, -1.0)


# --------------------------------------------------------------------------------- quantizing


@pytest.mark.parametrize("digits", [4, 3, 2])
def test_quantize_keeps_validity_and_shared_borders(tiling: Boundaries, digits: int) -> None:
    for geoms in (tiling.geoms, simplify_shared(tiling, default_tolerance(tiling))):
        q = quantize(geoms, digits)
        check_tiling(q, tiling.geoms, grid=10.0**-digits)
        c = np.concatenate([shapely.get_coordinates(g) for g in q])
        assert np.array_equal(c, np.round(c, digits))  # on the grid
        a0 = sum(g.area for g in geoms)
        assert abs(sum(g.area for g in q) - a0) / a0 < 10.0**-digits * 50


def test_quantize_where_plain_rounding_breaks_polygons(synthetic: Boundaries) -> None:
    # Control: rounding each vertex on its own, at 2 digits, makes invalid polygons here.
    rounded = [shapely.transform(g, lambda c: np.round(c, 2)) for g in synthetic.geoms]
    assert not all(shapely.is_valid(g) for g in rounded)
    check_tiling(quantize(synthetic.geoms, 2), synthetic.geoms, grid=0.01)


def test_quantize_refuses_bad_digits(provinces: Boundaries) -> None:
    with pytest.raises(ValueError, match="digits must be an integer from 0 to 15"):
        quantize(provinces.geoms, 16)
