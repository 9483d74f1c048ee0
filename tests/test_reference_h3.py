"""Hex cells checked against the H3 C library's Python bindings (``h3``) and the H3 docs.

Outside sources:
- ``h3`` (h3-py 4.x, bindings of the H3 C library): ``latlng_to_cell``, ``cell_to_parent``,
  ``int_to_str``, ``get_num_cells``, ``get_res0_cells``, ``is_pentagon``.
- H3 documentation, "Tables of Cell Statistics Across Resolutions"
  (https://h3geo.org/docs/core-library/restable/): 122 cells at resolution 0, and
  2 + 120·7^r cells at resolution r; 12 of the cells at every resolution are pentagons
  (H3 docs, "Overview of the H3 geospatial indexing system": from memory).
- DESIGN contract: a hex column holds H3 cells as 15-character lowercase hex strings.
"""

from __future__ import annotations

import re
from collections import Counter
from pathlib import Path

import h3
import numpy as np
import polars as pl
import pytest

import reduce
from reduce import aggregate
from tests._builders import fit_payload, payload_frame, scan, write_case

HEX_STRING = re.compile(r"^[0-9a-f]{15}$")


def _points(seed: int = 20240601) -> pl.DataFrame:
    """>= 10,000 random points on the sphere plus antimeridian, near-pole and edge points."""
    rng = np.random.default_rng(seed)
    n = 10_000
    # Uniform on the sphere: latitude from arcsin of a uniform sine.
    lat = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    lon = rng.uniform(-180, 180, n)
    # Antimeridian band, both sides: lon in [179.99, 180] and [-180, -179.99].
    m = 600
    am_lat = rng.uniform(-80, 80, m)
    am_lon = rng.uniform(179.99, 180.0, m) * rng.choice([-1.0, 1.0], m)
    # Near the poles: |lat| > 89.9, any longitude.
    np_lat = rng.uniform(89.9, 90.0, m) * rng.choice([-1.0, 1.0], m)
    np_lon = rng.uniform(-180, 180, m)
    # Exact edges of the valid range (valid coordinates per the contract).
    edge_lat = np.array([90.0, -90.0, 0.0, 0.0, 89.9999, -89.9999, 45.0, -45.0])
    edge_lon = np.array([0.0, 0.0, 180.0, -180.0, 180.0, -180.0, 179.9999999, -179.9999999])
    all_lat = np.concatenate([lat, am_lat, np_lat, edge_lat])
    all_lon = np.concatenate([lon, am_lon, np_lon, edge_lon])
    return pl.DataFrame(
        {
            "pid": [f"p{i:05d}" for i in range(len(all_lat))],
            "lat": all_lat,
            "lon": all_lon,
        }
    )


@pytest.fixture(scope="module")
def points() -> pl.DataFrame:
    pts = _points()
    assert pts.height >= 10_000 + 2 * 600
    assert (pts["lon"].abs() >= 179.99).sum() >= 600
    assert (pts["lat"].abs() > 89.9).sum() >= 600
    return pts


def _hex_recipe(folder: Path, points: pl.DataFrame, levels: list[int]) -> Path:
    # One category per point, so every row of the result names the cell of one point.
    return write_case(
        folder,
        points,
        source={"lat": "lat", "lon": "lon"},
        group={"hex": {"levels": levels}, "category": {"column": "pid"}},
        measures={"n": "count"},
    )


@pytest.mark.parametrize("res", [0, 5, 9, 15])
def test_payload_hex_cells_equal_h3_latlng_to_cell(
    tmp_path: Path, points: pl.DataFrame, res: int
) -> None:
    # Reference: h3.latlng_to_cell (H3 C library) on every point, in the payload's string form.
    recipe = _hex_recipe(tmp_path, points, [res])
    payload = fit_payload(recipe)
    got = dict(zip(*payload_frame(payload).select("pid", "hex").to_dict(as_series=False).values()))
    expected = {
        pid: h3.latlng_to_cell(la, lo, res)
        for pid, la, lo in points.select("pid", "lat", "lon").iter_rows()
    }
    assert payload["accounting"]["invalid_rows"] == 0
    assert len(got) == len(expected)
    wrong = {k: (got.get(k), v) for k, v in expected.items() if got.get(k) != v}
    assert not wrong, f"{len(wrong)} points differ, e.g. {list(wrong.items())[:3]}"


def test_scan_partial_cells_equal_h3_on_antimeridian_and_pole_points(
    tmp_path: Path, points: pl.DataFrame
) -> None:
    # Reference: h3.latlng_to_cell, integer form (h3.str_to_int), on the partial's UInt64 keys.
    hard = points.filter((pl.col("lon").abs() >= 179.99) | (pl.col("lat").abs() > 89.9))
    recipe = _hex_recipe(tmp_path, hard, [15])
    p = scan(recipe)
    got = dict(p.table.select("pid", "hex").iter_rows())
    for pid, la, lo in hard.select("pid", "lat", "lon").iter_rows():
        assert got[pid] == h3.str_to_int(h3.latlng_to_cell(la, lo, 15)), (pid, la, lo)


@pytest.mark.parametrize("res", range(16))
def test_h3_cell_count_matches_documented_table(res: int) -> None:
    # Source: H3 docs, "Tables of Cell Statistics Across Resolutions": 122 cells at
    # resolution 0 and 2 + 120·7^r at resolution r (the formula reproduces every row).
    assert h3.get_num_cells(res) == 2 + 120 * 7**res
    if res == 0:
        assert h3.get_num_cells(0) == 122


def test_pipeline_finds_all_122_resolution0_cells(tmp_path: Path) -> None:
    # Source: H3 docs table, 122 cells at resolution 0. One point at the centre of every
    # base cell must give 122 distinct cells, exactly h3.get_res0_cells().
    cells = sorted(h3.get_res0_cells())
    centers = [h3.cell_to_latlng(c) for c in cells]
    pts = pl.DataFrame({"lat": [c[0] for c in centers], "lon": [c[1] for c in centers]})
    recipe = write_case(
        tmp_path,
        pts,
        source={"lat": "lat", "lon": "lon"},
        group={"hex": {"resolution": 0}},
        measures={"n": "count"},
    )
    payload = fit_payload(recipe)
    assert payload["rows"] == 122
    assert sorted(payload["columns"]["hex"]) == cells
    assert payload["columns"]["n"] == [1] * 122


def test_rollup_of_all_resolution1_cells_gives_122_parents_with_7_or_6_children(
    tmp_path: Path,
) -> None:
    # Source: H3 docs table: 2 + 120·7 = 842 cells at resolution 1, 122 at resolution 0;
    # hexagons have 7 children, the 12 pentagons 6 (12·6 + 110·7 = 842).
    res1 = sorted(c for base in h3.get_res0_cells() for c in h3.cell_to_children(base, 1))
    assert len(res1) == 2 + 120 * 7
    centers = [h3.cell_to_latlng(c) for c in res1]
    pts = pl.DataFrame({"lat": [c[0] for c in centers], "lon": [c[1] for c in centers]})
    recipe_path = write_case(
        tmp_path,
        pts,
        source={"lat": "lat", "lon": "lon"},
        group={"hex": {"levels": [1, 0]}},
        measures={"n": "count"},
    )
    recipe = reduce.load_recipe(recipe_path)
    p = scan(recipe)
    assert p.table.height == 842
    up = aggregate.finalize(recipe, aggregate.rollup(recipe, p, hex_res=0, time_bin=None))
    counts = {h3.int_to_str(c): n for c, n in up.select("hex", "n").iter_rows()}
    assert len(counts) == 122
    pentagons = {c for c in counts if h3.is_pentagon(c)}
    assert len(pentagons) == 12
    assert all(counts[c] == 6 for c in pentagons)
    assert all(counts[c] == 7 for c in counts if c not in pentagons)


def test_rolled_up_cells_equal_h3_latlng_to_cell_at_that_resolution(
    tmp_path: Path, points: pl.DataFrame
) -> None:
    # Reference: h3.latlng_to_cell at each coarser resolution. A roll-up puts each point in the
    # cell that contains it, not in the H3 parent of its finest cell (the two differ near cell
    # edges, because H3 children are not exactly contained in their parent: H3 docs on
    # hierarchical non-containment, from memory), on points spread over the sphere,
    # antimeridian and poles included.
    recipe_path = _hex_recipe(tmp_path, points, [15, 12, 9, 5, 0])
    recipe = reduce.load_recipe(recipe_path)
    p = scan(recipe)
    rows = points.select("pid", "lat", "lon").rows()
    parents_differ = 0
    for res in (12, 9, 5, 0):
        up = aggregate.visible(recipe, aggregate.rollup(recipe, p, hex_res=res, time_bin=None))
        got = {pid: h3.int_to_str(c) for pid, c in up.table.select("pid", "hex").iter_rows()}
        expected = {pid: h3.latlng_to_cell(la, lo, res) for pid, la, lo in rows}
        assert got == expected, f"resolution {res}"
        assert up.hex_res == res
        parents_differ += sum(
            h3.cell_to_parent(h3.latlng_to_cell(la, lo, 15), res) != expected[pid]
            for pid, la, lo in rows
        )
    assert parents_differ > 0  # parents would have been wrong here: the check has teeth


def test_rolled_up_counts_per_cell_equal_direct_h3_counts(
    tmp_path: Path, points: pl.DataFrame
) -> None:
    # Reference: Counter of h3.latlng_to_cell(p, r) over the points.
    recipe_path = write_case(
        tmp_path,
        points,
        source={"lat": "lat", "lon": "lon"},
        group={"hex": {"levels": [9, 6, 3]}},
        measures={"n": "count"},
    )
    recipe = reduce.load_recipe(recipe_path)
    p = scan(recipe)
    pts = points.select("lat", "lon").rows()
    for res in (6, 3):
        final = aggregate.finalize(recipe, aggregate.rollup(recipe, p, hex_res=res, time_bin=None))
        got = {h3.int_to_str(c): n for c, n in final.select("hex", "n").iter_rows()}
        assert got == dict(Counter(h3.latlng_to_cell(la, lo, res) for la, lo in pts))


@pytest.mark.parametrize("res", [0, 7, 15])
def test_payload_hex_strings_are_15_lowercase_hex_chars_equal_to_h3_int_to_str(
    tmp_path: Path, points: pl.DataFrame, res: int
) -> None:
    # DESIGN contract + reference h3.int_to_str of the partial's integer cell.
    sample = points.head(2000)
    recipe_path = _hex_recipe(tmp_path, sample, [res])
    recipe = reduce.load_recipe(recipe_path)
    ints = dict(scan(recipe).table.select("pid", "hex").iter_rows())
    frame = payload_frame(fit_payload(recipe_path))
    for pid, s in frame.select("pid", "hex").iter_rows():
        assert isinstance(s, str) and HEX_STRING.match(s), s
        assert s == h3.int_to_str(ints[pid])
        assert h3.is_valid_cell(s) and h3.get_resolution(s) == res
