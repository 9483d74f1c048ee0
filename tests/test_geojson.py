"""The GeoJSON layout: hex cells and region polygons as RFC 7946 geometries, and the bytes.

Outside sources:
- RFC 7946 (GeoJSON): §3.1.1 positions are [longitude, latitude]; §3.1.6 rings are closed
  (first position = last, at least four positions), exteriors counter-clockwise and holes
  clockwise; §3.1.9 geometries crossing the antimeridian are cut into parts on ±180;
  §3.3 FeatureCollection and Feature members; §6.1 foreign members.
- RFC 8259 (JSON) through Python's ``json`` module: the bytes parse, and hold no NaN or
  Infinity (the module accepts those tokens unless told otherwise, so the test refuses them).
- The ``h3`` bindings of the H3 C library: ``cell_to_boundary`` (vertices as (lat, lng)),
  ``latlng_to_cell``, ``cell_to_children``, ``get_res0_cells``, ``cell_to_latlng``.
- The shoelace formula for signed area (> 0 counter-clockwise), written out here.
"""

from __future__ import annotations

import itertools
import json
import math
from typing import Any

import h3
import numpy as np
import pytest
import shapely
from shapely.geometry import shape

from reduce.maps.geojson import feature_collection, hex_polygon, polygon_geometry


def signed_area(ring: list[list[float]]) -> float:
    """Shoelace over a closed ring of [x, y]: positive when counter-clockwise."""
    return 0.5 * sum(x0 * y1 - x1 * y0 for (x0, y0), (x1, y1) in itertools.pairwise(ring))


def strict_json(data: bytes) -> Any:
    def refuse(token: str) -> None:
        raise AssertionError(f"non-RFC 8259 token {token}")

    return json.loads(data, parse_constant=refuse)


def cyclic_variants(seq: list[Any]) -> list[list[Any]]:
    return [seq[i:] + seq[:i] for i in range(len(seq))]


def crosses_antimeridian(cell: str) -> bool:
    lngs = [lng for _, lng in h3.cell_to_boundary(cell)]
    return any(abs(a - b) > 180 for a, b in zip(lngs, lngs[1:] + lngs[:1]))


def cells_at(res: int) -> list[str]:
    return [c for r0 in sorted(h3.get_res0_cells()) for c in sorted(h3.cell_to_children(r0, res))]


def check_rings(geometry: dict[str, Any]) -> None:
    """RFC 7946 §3.1.6 on every ring: closed, >= 4 positions, exterior CCW, holes CW."""
    polygons = (
        geometry["coordinates"] if geometry["type"] == "MultiPolygon" else [geometry["coordinates"]]
    )
    for rings in polygons:
        for i, ring in enumerate(rings):
            assert ring[0] == ring[-1] and len(ring) >= 4
            assert all(a != b for a, b in itertools.pairwise(ring))  # no repeated positions
            assert (signed_area(ring) > 0) if i == 0 else (signed_area(ring) < 0)


# ------------------------------------------------------------------------------------ hex cells


@pytest.mark.parametrize("res", [0, 3, 5, 9, 15])
def test_hex_boundary_is_h3s_boundary_lon_first_ccw_and_closed(res: int) -> None:
    rng = np.random.default_rng(res)
    lats = np.degrees(np.arcsin(rng.uniform(-0.97, 0.97, 60)))
    lngs = rng.uniform(-170, 170, 60)
    cells = {h3.latlng_to_cell(float(a), float(b), res) for a, b in zip(lats, lngs)}
    cells.add(h3.latlng_to_cell(10.0, 100.0, res))
    checked = 0
    for cell in sorted(cells):
        if crosses_antimeridian(cell):
            continue
        g = hex_polygon(cell, 6)
        assert g["type"] == "Polygon" and len(g["coordinates"]) == 1
        check_rings(g)
        ring = np.asarray(g["coordinates"][0][:-1])
        # h3 gives (lat, lng); the same vertices, swapped to [lng, lat], within rounding
        # (half a unit of the 6th decimal), in h3's order or reversed: we promise only
        # counter-clockwise.
        want = [[lng, lat] for lat, lng in h3.cell_to_boundary(cell)]
        candidates = cyclic_variants(want) + cyclic_variants(want[::-1])
        assert any(
            len(c) == len(ring) and np.abs(ring - np.asarray(c)).max() <= 0.5e-6 + 1e-12
            for c in candidates
        ), cell
        checked += 1
    assert checked >= 30


def test_hex_coordinates_are_lon_first() -> None:
    g = hex_polygon(h3.latlng_to_cell(10.0, 100.0, 6), 6)
    ring = g["coordinates"][0]
    assert all(99.5 < x < 100.5 and 9.5 < y < 10.5 for x, y in ring)


@pytest.mark.parametrize("digits", [0, 1, 3, 6])
def test_hex_coordinates_are_rounded_to_digits(digits: int) -> None:
    cell = h3.latlng_to_cell(-33.8, 151.2, 2)
    ring = hex_polygon(cell, digits)["coordinates"][0]
    for x, y in ring:
        assert round(x, digits) == x and round(y, digits) == y
    text = json.dumps(ring)
    decimals = [
        len(t.split(".")[1])
        for t in text.replace("[", " ").replace("]", " ").replace(",", " ").split()
        if "." in t
    ]
    assert max(decimals) <= max(digits, 1)  # 3.0 is written with one decimal


def test_the_cell_at_lat_0_lon_179_9_is_cut_on_the_antimeridian() -> None:
    cell = h3.latlng_to_cell(0.0, 179.9, 3)
    assert crosses_antimeridian(cell)  # per h3's own boundary
    g = hex_polygon(cell, 12)
    assert g["type"] == "MultiPolygon" and len(g["coordinates"]) == 2
    check_antimeridian_cell(cell, g)
    xs = sorted(x for part in g["coordinates"] for x, _ in part[0])
    assert xs[0] == -180.0 and xs[-1] == 180.0


def check_antimeridian_cell(cell: str, g: dict[str, Any]) -> None:
    check_rings(g)
    for part in g["coordinates"]:
        xs = [x for x, _ in part[0]]
        assert all(-180.0 <= x <= 180.0 for x in xs)
        assert max(xs) <= 0 or min(xs) >= 0  # each part on one side of the antimeridian
        assert shape({"type": "Polygon", "coordinates": part}).is_valid
    # Area in a frame shifted by 360 degrees, where the cell does not wrap: the parts
    # together cover exactly the cell.
    shifted_cell = [
        [lng + 360.0 if lng < 0 else lng, lat] for lat, lng in h3.cell_to_boundary(cell)
    ]
    cell_area = abs(signed_area(shifted_cell + shifted_cell[:1]))
    # The western part (longitudes <= 0) moves east by 360 degrees, next to the other.
    parts = [
        shapely.Polygon([(x + 360.0 if max(xx for xx, _ in p[0]) <= 0 else x, y) for x, y in p[0]])
        for p in g["coordinates"]
    ]
    union = shapely.union_all(parts)
    assert math.isclose(union.area, cell_area, rel_tol=1e-9)
    assert math.isclose(sum(p.area for p in parts), cell_area, rel_tol=1e-9)


@pytest.mark.parametrize("res", [0, 1, 2, 3])
def test_every_antimeridian_cell_is_cut_into_parts_within_range(res: int) -> None:
    cells = [c for c in cells_at(res) if crosses_antimeridian(c)]
    polar = {h3.latlng_to_cell(90.0, 0.0, res), h3.latlng_to_cell(-90.0, 0.0, res)}
    assert len(cells) >= 10
    for cell in cells:
        g = hex_polygon(cell, 12)
        if cell in polar:
            continue
        assert g["type"] == "MultiPolygon" and len(g["coordinates"]) == 2, cell
        check_antimeridian_cell(cell, g)
    for cell in cells_at(res)[:: 7 + res]:  # and the others stay single polygons
        if not crosses_antimeridian(cell):
            assert hex_polygon(cell, 6)["type"] == "Polygon"


@pytest.mark.parametrize("res", [0, 1, 2, 5])
def test_a_cell_around_a_pole_reaches_the_pole_along_the_antimeridian(res: int) -> None:
    for pole in (90.0, -90.0):
        cell = h3.latlng_to_cell(pole, 0.0, res)
        g = hex_polygon(cell, 9)
        assert g["type"] == "Polygon"
        check_rings(g)
        poly = shape(g)
        assert poly.is_valid
        xs = [x for x, _ in g["coordinates"][0]]
        assert min(xs) == -180.0 and max(xs) == 180.0
        assert [pole] == sorted({y for _, y in g["coordinates"][0] if abs(y) == 90.0})
        # Points near the pole (any longitude) are inside; the cell's centre too.
        assert poly.covers(shapely.Point(37.0, pole * 0.99999))
        lat, lng = h3.cell_to_latlng(cell)
        assert poly.covers(shapely.Point(lng, lat))


def test_bad_cell_and_digits_are_refused() -> None:
    with pytest.raises(ValueError, match="not an H3 cell"):
        hex_polygon("zz", 6)
    with pytest.raises(ValueError, match="digits must be an integer from 0 to 15"):
        hex_polygon(h3.latlng_to_cell(0.0, 0.0, 4), -1)


# ----------------------------------------------------------------------------- region polygons


def test_polygon_winding_is_fixed_exterior_ccw_holes_cw() -> None:
    # Exterior given clockwise, hole given counter-clockwise: both wrong per §3.1.6.
    shell = [(0, 0), (0, 4), (4, 4), (4, 0), (0, 0)]
    hole = [(1, 1), (3, 1), (3, 3), (1, 3), (1, 1)]
    poly = shapely.Polygon(shell, [hole])
    assert signed_area([list(p) for p in shell]) < 0 and signed_area([list(p) for p in hole]) > 0
    g = polygon_geometry(poly, 3)
    assert g["type"] == "Polygon" and len(g["coordinates"]) == 2
    check_rings(g)
    assert shape(g).equals(poly)


def test_multipolygon_keeps_its_type_and_every_part_is_oriented() -> None:
    a = shapely.Polygon([(0, 0), (0, 1), (1, 1), (1, 0)])
    b = shapely.Polygon([(5, 5), (6, 5), (6, 6), (5, 6)], [[(5.2, 5.2), (5.2, 5.8), (5.8, 5.8)]])
    g = polygon_geometry(shapely.MultiPolygon([a, b]), 4)
    assert g["type"] == "MultiPolygon" and len(g["coordinates"]) == 2
    check_rings(g)
    one = polygon_geometry(shapely.MultiPolygon([a]), 4)
    assert one["type"] == "MultiPolygon" and len(one["coordinates"]) == 1


def test_rounding_removes_consecutive_duplicates_and_collapsed_holes() -> None:
    ring = [(0.0, 0.0), (1.00001, 0.0), (1.00002, 0.00001), (1.0, 1.0), (0.0, 1.0), (0.0, 0.0)]
    tiny_hole = [(0.5, 0.5), (0.50001, 0.5), (0.50001, 0.50001), (0.5, 0.5)]
    g = polygon_geometry(shapely.Polygon(ring, [tiny_hole]), 3)
    assert g["coordinates"] == [[[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0], [0.0, 0.0]]]
    neg = polygon_geometry(shapely.Polygon([(-0.0001, 0), (1, 0), (1, 1), (-0.0001, 1)]), 2)
    text = json.dumps(neg)
    assert "-0.0" not in text  # -0.0001 rounds to 0.0, written without a sign


def test_polygon_geometry_refuses_other_types() -> None:
    with pytest.raises(ValueError, match="takes a Polygon or MultiPolygon, not LineString"):
        polygon_geometry(shapely.LineString([(0, 0), (1, 1)]), 3)


# ------------------------------------------------------------------------------ the collection


def test_feature_collection_bytes_parse_in_order_without_nan() -> None:
    cells = [h3.latlng_to_cell(0.0, 179.9, 3), h3.latlng_to_cell(10.0, 10.0, 5)]
    geoms = [hex_polygon(c, 6) for c in cells]
    props = {
        "hex": cells,
        "rate": [float("nan"), np.float64(2.5)],
        "reports": [np.int64(3), 7],
        "flag": [np.bool_(True), None],
        "peak": [np.float32("inf"), -math.inf],
    }
    extra = {
        "reduce": {
            "format": "reduce.geojson/1",
            "level": {"hex": 5},
            "accounting": {"input_rows": 10, "invalid_rows": 0},
        },
        "ratio": float("nan"),
    }
    data = feature_collection(geoms, props, extra=extra)
    doc = strict_json(data)
    assert list(doc) == ["type", "features", "reduce", "ratio"]
    assert doc["type"] == "FeatureCollection" and doc["ratio"] is None
    assert [list(f) for f in doc["features"]] == [["type", "geometry", "properties"]] * 2
    assert [f["properties"] for f in doc["features"]] == [
        {"hex": cells[0], "rate": None, "reports": 3, "flag": True, "peak": None},
        {"hex": cells[1], "rate": 2.5, "reports": 7, "flag": None, "peak": None},
    ]
    assert doc["features"][0]["geometry"]["type"] == "MultiPolygon"
    assert doc["features"][1]["geometry"] == geoms[1]
    assert feature_collection(geoms, props, extra=extra) == data  # deterministic bytes
    assert b"NaN" not in data and b"Infinity" not in data


def test_feature_collection_checks_lengths_extras_and_big_integers() -> None:
    g = [hex_polygon(h3.latlng_to_cell(0.0, 0.0, 2), 5)]
    with pytest.raises(ValueError, match="property 'n' has 2 values for 1 geometries"):
        feature_collection(g, {"n": [1, 2]})
    with pytest.raises(ValueError, match="extra member 'features' would replace"):
        feature_collection(g, {}, extra={"features": []})
    with pytest.raises(ValueError, match="beyond ±2\\^53"):
        feature_collection(g, {"n": [2**53]})
    assert strict_json(feature_collection(g, {"n": [2**53 - 1]}))["features"][0]["properties"] == {
        "n": 2**53 - 1
    }
    empty = strict_json(feature_collection([], {}))
    assert empty == {"type": "FeatureCollection", "features": []}
