"""Every hex level is exact: each point counts in the cell that contains it at that level's
resolution, as ``h3.latlng_to_cell`` gives it, for every measure, top-k and suppression.

Outside sources:
- ``h3`` (h3-py 4.x, bindings of the H3 C library): ``latlng_to_cell``, ``cell_to_parent``,
  ``cell_to_boundary``, ``int_to_str``.
- DuckDB: the same aggregation written in SQL over points indexed directly with the ``h3``
  bindings (count, sum, mean, min, max, count(DISTINCT), a top-k with a remainder row by a
  window rank, and a HAVING for suppression).

The points are placed where H3 parents go wrong: clusters on the edges and corners of coarse
cells, plus the antimeridian and both poles. Each test also checks that parents would have
given other numbers on the same points, so it cannot pass by accident.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import duckdb
import h3
import numpy as np
import polars as pl
import pytest

import reduce
from reduce import aggregate, cells
from reduce.budget import all_levels
from reduce.pipeline import Reducer
from tests._builders import payload_frame, write_case

LEVELS = [9, 7, 5]
KINDS = ("a", "b", "c", "d")


def _edge_points(seed: int, n_corners: int = 40, per: int = 60) -> pl.DataFrame:
    """Points within a few hundred metres of corners of resolution-5 and -7 cells, plus points
    at the antimeridian and the poles; each with a kind, a float x, an int y and a who."""
    rng = np.random.default_rng(seed)
    lat: list[float] = []
    lon: list[float] = []
    for i in range(n_corners):
        res = 5 if i % 2 else 7
        c = h3.latlng_to_cell(float(rng.uniform(-60, 60)), float(rng.uniform(-179, 179)), res)
        vla, vlo = h3.cell_to_boundary(c)[int(rng.integers(0, 6))]
        span = 0.004 if res == 5 else 0.002  # degrees: a cluster straddling the corner
        lat += list(vla + rng.uniform(-span, span, per))
        lon += list(vlo + rng.uniform(-span, span, per))
    # Antimeridian, both sides, and both poles.
    m = 200
    lat += list(rng.uniform(-70, 70, m))
    lon += list(rng.uniform(179.995, 180.0, m) * rng.choice([-1.0, 1.0], m))
    lat += list(rng.uniform(89.95, 90.0, m) * rng.choice([-1.0, 1.0], m))
    lon += list(rng.uniform(-180, 180, m))
    n = len(lat)
    lon = [((x + 180.0) % 360.0) - 180.0 if abs(x) > 180 else x for x in lon]
    return pl.DataFrame(
        {
            "lat": lat,
            "lon": lon,
            "kind": rng.choice(list(KINDS), n, p=[0.4, 0.3, 0.2, 0.1]),
            "x": rng.normal(5, 2, n).round(3),
            "y": rng.integers(0, 50, n),
            "who": rng.integers(0, 30, n),
        }
    )


MEASURES = {
    "n": "count",
    "sx": {"sum": "x"},
    "sy": {"sum": "y"},
    "mx": {"mean": "x"},
    "lo": {"min": "y"},
    "hi": {"max": "y"},
    "d": {"distinct": "who"},
}


def _direct(points: pl.DataFrame, res: int) -> pl.DataFrame:
    """The points with their cell at ``res`` indexed directly (h3 bindings)."""
    cells = [h3.latlng_to_cell(la, lo, res) for la, lo in points.select("lat", "lon").rows()]
    return points.with_columns(pl.Series("hex", cells))


def _parents_differ(points: pl.DataFrame, fine: int, res: int) -> int:
    return sum(
        h3.cell_to_parent(h3.latlng_to_cell(la, lo, fine), res) != h3.latlng_to_cell(la, lo, res)
        for la, lo in points.select("lat", "lon").rows()
    )


def _duckdb(
    points: pl.DataFrame, res: int, *, k: int | None = None, min_n: int | None = None
) -> pl.DataFrame:
    """Reference rows at ``res`` (DuckDB SQL over directly indexed points)."""
    con = duckdb.connect()
    con.register("pts", _direct(points, res).to_arrow())
    base = """SELECT hex, kind, count(*) AS n, sum(x) AS sx, sum(y) AS sy, avg(x) AS mx,
                     min(y) AS lo, max(y) AS hi, count(DISTINCT who) AS d
              FROM pts GROUP BY hex, kind"""
    if k is not None:
        # Top k kinds per cell by count (ties by label), the others folded into 'other'
        # with every measure recomputed over the folded points (a remainder row).
        base = f"""WITH ranked AS (
                     SELECT hex, kind, row_number() OVER (PARTITION BY hex
                            ORDER BY count(*) DESC, kind ASC) AS rk
                     FROM pts GROUP BY hex, kind),
                   labelled AS (
                     SELECT p.*, CASE WHEN r.rk <= {k} THEN p.kind ELSE 'other' END AS k2
                     FROM pts p JOIN ranked r USING (hex, kind))
                   SELECT hex, k2 AS kind, count(*) AS n, sum(x) AS sx, sum(y) AS sy,
                          avg(x) AS mx, min(y) AS lo, max(y) AS hi,
                          count(DISTINCT who) AS d
                   FROM labelled GROUP BY hex, k2"""
    if min_n is not None:
        base = f"SELECT * FROM ({base}) WHERE n >= {min_n}"
    return con.sql(base + " ORDER BY hex, kind").pl()


def _compare(got: pl.DataFrame, want: pl.DataFrame, where: str) -> None:
    got = got.sort("hex", "kind")
    assert got.height == want.height, f"{where}: {got.height} rows vs {want.height}"
    assert got.get_column("hex").to_list() == want.get_column("hex").to_list(), where
    assert got.get_column("kind").to_list() == want.get_column("kind").to_list(), where
    for m in ("n", "sy", "lo", "hi", "d"):
        assert got.get_column(m).to_list() == want.get_column(m).to_list(), f"{where}: {m}"
    for m in ("sx", "mx"):
        for a, b in zip(got.get_column(m).to_list(), want.get_column(m).to_list()):
            assert math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-9), f"{where}: {m}"


def _recipe(folder: Path, points: pl.DataFrame, *, prune: dict[str, Any] | None = None) -> Path:
    return write_case(
        folder,
        points,
        source={"lat": "lat", "lon": "lon"},
        group={"hex": {"levels": LEVELS}, "category": {"column": "kind"}},
        measures=MEASURES,
        prune=prune,
        output={"path": "out/x.json", "digits": [9]},
    )


def _level_frame(red: Reducer, level: dict[str, Any]) -> pl.DataFrame:
    import orjson

    return payload_frame(orjson.loads(red.payload(level)))


@pytest.fixture(scope="module")
def points() -> pl.DataFrame:
    return _edge_points(5)


@pytest.fixture(autouse=True, params=["indexed", "tabled"])
def coarse_cells(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> str:
    """Each test runs twice: with the scan indexing every point at every resolution, and with
    the coarser cells found from the tables of parents (reduce.cells), tabled from the first
    half of the rows only, so that some points' parents are missing from the tables too."""
    if request.param == "tabled":
        monkeypatch.setattr(cells, "FAST_MIN_ROWS", 0)
        monkeypatch.setattr(cells, "TABLE_ROWS", _edge_points(5).height // 2)
    else:
        monkeypatch.setattr(cells, "FAST_MIN_ROWS", 10**12)
    return str(request.param)


def test_edge_points_are_where_h3_parents_go_wrong(points: pl.DataFrame) -> None:
    # The data has teeth: at every coarser level, parents misplace some points.
    for res in LEVELS[1:]:
        assert _parents_differ(points, LEVELS[0], res) > 10, res


@pytest.mark.parametrize("res", LEVELS)
def test_every_measure_at_every_hex_level_equals_duckdb_over_direct_cells(
    tmp_path: Path, points: pl.DataFrame, res: int
) -> None:
    red = Reducer(reduce.load_recipe(_recipe(tmp_path, points)), use_cache=False)
    got = _level_frame(red, {"hex": res, "digits": 9})
    _compare(got, _duckdb(points, res), f"hex {res}")


@pytest.mark.parametrize("res", LEVELS)
def test_top_k_with_remainder_at_every_hex_level_equals_duckdb(
    tmp_path: Path, points: pl.DataFrame, res: int
) -> None:
    path = _recipe(tmp_path, points, prune={"top": {"k": [2], "by": "n", "rest": "other"}})
    red = Reducer(reduce.load_recipe(path), use_cache=False)
    got = _level_frame(red, {"hex": res, "top": 2, "digits": 9})
    _compare(got, _duckdb(points, res, k=2), f"hex {res}, top 2")


@pytest.mark.parametrize("res", LEVELS)
def test_suppression_at_every_hex_level_equals_duckdb_having(
    tmp_path: Path, points: pl.DataFrame, res: int
) -> None:
    path = _recipe(tmp_path, points, prune={"min_count": 3})
    red = Reducer(reduce.load_recipe(path), use_cache=False)
    level = {"hex": res, "digits": 9}
    got = _level_frame(red, level)
    _compare(got, _duckdb(points, res, min_n=3), f"hex {res}, min_count 3")
    # Every suppressed point is accounted for.
    acc = red.accounting(level)
    assert acc["represented_rows"] + acc["suppressed_rows"] == points.height


def test_row_counts_of_every_level_equal_the_rows_built(
    tmp_path: Path, points: pl.DataFrame
) -> None:
    path = _recipe(tmp_path, points, prune={"top": {"k": [3, 1], "by": "n"}})
    recipe = reduce.load_recipe(path)
    red = Reducer(recipe, use_cache=False)
    for level in all_levels(recipe.ladder()):
        assert red.row_count(level) == red.rows(level).frame.height, level


def test_spilled_parts_give_the_same_payloads_as_one_pass(
    tmp_path: Path, points: pl.DataFrame, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Parts split the keyed rows by their exact coarsest cell; cells of finer levels on a
    # coarsest cell's edge have rows in two parts. Distinct measures do not spill, so this
    # recipe counts and sums only.
    measures = {k: v for k, v in MEASURES.items() if k != "d"}
    path = write_case(
        tmp_path,
        points,
        source={"lat": "lat", "lon": "lon"},
        group={"hex": {"levels": LEVELS}, "category": {"column": "kind"}},
        measures=measures,
        prune={"top": {"k": [3, 1], "by": "n"}},
    )
    recipe = reduce.load_recipe(path)
    levels = all_levels(recipe.ladder())
    one = Reducer(recipe, use_cache=False)
    expected = {str(lv): (one.payload(lv), one.row_count(lv)) for lv in levels}
    monkeypatch.setenv("REDUCE_PROBE_ROWS", "500")
    monkeypatch.setattr(aggregate, "PART_ROWS", 700)
    spilled = Reducer(recipe, use_cache=False)
    finest = spilled.finest()
    assert isinstance(finest, aggregate.Spilled) and len(finest.parts) > 1
    split = aggregate.split_cells(recipe, finest, LEVELS[1])
    assert split is not None and len(split) > 0  # some cells do lie in two parts
    # Counting first (part by part), then building, as a search does.
    counted = {str(lv): spilled.row_count(lv) for lv in levels}
    got = {str(lv): (spilled.payload(lv), counted[str(lv)]) for lv in levels}
    assert got == expected


def test_payload_cells_of_a_fit_are_the_direct_cells(tmp_path: Path, points: pl.DataFrame) -> None:
    # Through reduce.fit with a budget that forces a coarse level: every cell in the payload
    # is the direct cell of the points it counts (reference: h3 bindings).
    path = _recipe(tmp_path, points)
    red = Reducer(reduce.load_recipe(path), use_cache=False)
    limit = len(red.payload({"hex": 7, "digits": 9}))  # res 7 fits exactly, res 9 does not
    res = reduce.fit(path, budget=limit, on="raw", use_cache=False)
    assert res.level is not None and res.payload is not None
    assert res.level["hex"] == 7
    import orjson

    frame = payload_frame(orjson.loads(res.payload))
    r = res.level["hex"]
    want = _direct(points, r).group_by("hex").len()
    got = frame.group_by("hex").agg(pl.col("n").sum())
    assert dict(got.iter_rows()) == dict(want.iter_rows())
