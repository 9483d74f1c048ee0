"""The same aggregation computed in SQL by DuckDB (a general-purpose reference engine).

Outside source: DuckDB (``duckdb`` from the package registry) running GROUP BY with COUNT(*),
SUM, MIN, MAX, AVG and COUNT(DISTINCT) over the same parquet file, ``date_trunc`` for UTC time
bins, and WHERE clauses for the recipe filters. SQL aggregate semantics: SUM/MIN/MAX/AVG skip
nulls and give NULL when a group has no non-null value; COUNT(DISTINCT) skips nulls; a
comparison with NULL is unknown, so WHERE drops the row (SQL standard, as DuckDB implements).
"""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import polars as pl
import pytest

import reduce
from reduce import aggregate
from reduce.recipe import parse_time_bin
from tests._builders import fit_payload, payload_frame, random_events, scan, write_case

MEASURES = {
    "n": "count",
    "sx": {"sum": "x"},
    "sy": {"sum": "y"},
    "mnx": {"min": "x"},
    "mny": {"min": "y"},
    "mxx": {"max": "x"},
    "mxy": {"max": "y"},
    "avx": {"mean": "x"},
    "avy": {"mean": "y"},
    "dw": {"distinct": "who"},
}
SQL_MEASURES = """
    count(*) AS n, sum(x) AS sx, sum(y) AS sy, min(x) AS mnx, min(y) AS mny,
    max(x) AS mxx, max(y) AS mxy, avg(x) AS avx, avg(y) AS avy, count(DISTINCT who) AS dw
"""
FLOAT_MEASURES = {"sx", "mnx", "mxx", "avx", "avy"}  # summation order may differ: approx


@pytest.fixture(scope="module")
def events() -> pl.DataFrame:
    rng = np.random.default_rng(4242)
    df = random_events(
        rng,
        4000,
        span_days=6,
        regions=("north", "south", "east", "west", "centre"),
        kinds=("k1", "k2", "k3", "k4", "k5", "k6", "k7"),
        null_fraction=0.15,
    )
    assert df["x"].null_count() > 300 and df["y"].null_count() > 300
    assert df["who"].null_count() > 300
    return df


def _sql(path: Path, select_keys: str, group_keys: str, where: str = "TRUE") -> pl.DataFrame:
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    q = (
        f"SELECT {select_keys}, {SQL_MEASURES} FROM read_parquet('{path}') "
        f"WHERE {where} GROUP BY {group_keys}"
    )
    return con.sql(q).pl()


def _compare(got: pl.DataFrame, want: pl.DataFrame, keys: list[str]) -> None:
    """Same groups, and every measure equal (floats to 1e-9 relative)."""
    assert got.height == want.height, (got.height, want.height)
    g = got.sort(keys).to_dicts()
    w = want.sort(keys).to_dicts()
    for a, b in zip(g, w):
        for k in keys:
            assert a[k] == b[k], (k, a, b)
        for m in MEASURES:
            x, y = a[m], b[m]
            if y is None:
                assert x is None, (m, a, b)
            elif m in FLOAT_MEASURES:
                assert x is not None and math.isclose(x, float(y), rel_tol=1e-9, abs_tol=1e-9), (
                    m,
                    a,
                    b,
                )
            else:
                assert x == int(y), (m, a, b)


def _pipeline(recipe_path: Path) -> tuple[Any, Any]:
    recipe = reduce.load_recipe(recipe_path)
    return recipe, scan(recipe)


def _epoch(df: pl.DataFrame) -> pl.DataFrame:
    return df.with_columns(pl.col("time").dt.epoch("s")) if "time" in df.columns else df


@pytest.fixture
def hourly(tmp_path: Path, events: pl.DataFrame) -> Path:
    return write_case(
        tmp_path,
        events,
        source={"time": "t"},
        group={
            "time": {"levels": ["1h", "1d"], "zone": "UTC"},
            "region": {"column": "region"},
            "category": {"column": "kind"},
        },
        measures=MEASURES,
    )


def test_finest_level_equals_duckdb_group_by(hourly: Path) -> None:
    recipe, p = _pipeline(hourly)
    got = _epoch(aggregate.finalize(recipe, p))
    want = _sql(
        hourly.parent / "events.parquet",
        "CAST(epoch(date_trunc('hour', t)) AS BIGINT) AS time, region, kind",
        "ALL",
    )
    _compare(got, want, ["time", "region", "kind"])


def test_hour_bins_rolled_up_to_days_equal_duckdb_date_trunc_day(hourly: Path) -> None:
    recipe, p = _pipeline(hourly)
    up = aggregate.rollup(recipe, p, hex_res=None, time_bin=parse_time_bin("1d"))
    got = _epoch(aggregate.finalize(recipe, up))
    want = _sql(
        hourly.parent / "events.parquet",
        "CAST(epoch(date_trunc('day', t)) AS BIGINT) AS time, region, kind",
        "ALL",
    )
    _compare(got, want, ["time", "region", "kind"])


@pytest.mark.parametrize("keys", [["region", "kind"], ["region"], ["kind"]])
def test_merged_across_time_equals_duckdb_group_by(hourly: Path, keys: list[str]) -> None:
    # Dropping the time key merges the finest partial across every hour.
    recipe, p = _pipeline(hourly)
    got = aggregate.finalize(recipe, aggregate.regroup(recipe, p, [], keys))
    want = _sql(hourly.parent / "events.parquet", ", ".join(keys), "ALL")
    _compare(got, want, keys)


def test_grand_total_equals_duckdb_without_group_by(hourly: Path) -> None:
    recipe, p = _pipeline(hourly)
    got = aggregate.finalize(recipe, aggregate.regroup(recipe, p, [], []))
    con = duckdb.connect()
    want = con.sql(
        f"SELECT {SQL_MEASURES} FROM read_parquet('{hourly.parent / 'events.parquet'}')"
    ).pl()
    _compare(got.select(list(MEASURES)), want, [])


def test_payload_values_equal_duckdb_at_the_finest_level(hourly: Path) -> None:
    # The encoded payload (counts, integer sums, distinct counts) equals the SQL result too.
    frame = payload_frame(fit_payload(hourly))
    got = {
        (r["time"], r["region"], r["kind"]): (r["n"], r["sy"], r["dw"]) for r in frame.to_dicts()
    }
    want_df = _sql(
        hourly.parent / "events.parquet",
        "CAST(epoch(date_trunc('hour', t)) AS BIGINT) AS time, region, kind",
        "ALL",
    )
    want = {
        (r["time"], r["region"], r["kind"]): (
            r["n"],
            None if r["sy"] is None else int(r["sy"]),
            r["dw"],
        )
        for r in want_df.to_dicts()
    }
    assert got == want


# --------------------------------------------------------------------------------------------
# Filters
# --------------------------------------------------------------------------------------------

T_LO = dt.datetime(2024, 1, 2, 12, tzinfo=dt.UTC)
T_HI = dt.datetime(2024, 1, 5, tzinfo=dt.UTC)

FILTERS: list[tuple[str, list[dict[str, Any]], str]] = [
    ("in", [{"column": "kind", "in": ["k1", "k3", "k7"]}], "kind IN ('k1', 'k3', 'k7')"),
    (
        "not_in",
        [{"column": "region", "not_in": ["north", "east"]}],
        "region NOT IN ('north', 'east')",
    ),
    ("not_in_with_nulls", [{"column": "y", "not_in": [1, 2, 3, 50]}], "y NOT IN (1, 2, 3, 50)"),
    ("in_numbers_with_nulls", [{"column": "who", "in": [1, 5, 9, 13]}], "who IN (1, 5, 9, 13)"),
    ("range_int", [{"column": "y", "min": 10, "max": 60}], "y >= 10 AND y <= 60"),
    ("min_float", [{"column": "x", "min": 8.5}], "x >= 8.5"),
    ("max_float", [{"column": "x", "max": 4.25}], "x <= 4.25"),
    (
        "range_time",
        [{"column": "t", "min": T_LO, "max": T_HI}],
        f"t >= TIMESTAMPTZ '{T_LO.isoformat()}' AND t <= TIMESTAMPTZ '{T_HI.isoformat()}'",
    ),
    ("null_true", [{"column": "x", "null": True}], "x IS NULL"),
    ("null_false", [{"column": "who", "null": False}], "who IS NOT NULL"),
    (
        "combined",
        [
            {"column": "kind", "not_in": ["k2"]},
            {"column": "y", "min": 0},
            {"column": "who", "null": False},
            {"column": "t", "max": T_HI},
        ],
        f"kind NOT IN ('k2') AND y >= 0 AND who IS NOT NULL AND t <= TIMESTAMPTZ "
        f"'{T_HI.isoformat()}'",
    ),
]


@pytest.mark.parametrize("name,filters,where", FILTERS, ids=[f[0] for f in FILTERS])
def test_filters_agree_with_sql_where(
    tmp_path: Path, events: pl.DataFrame, name: str, filters: list[dict[str, Any]], where: str
) -> None:
    recipe_path = write_case(
        tmp_path,
        events,
        source={"filter": filters},
        group={"region": {"column": "region"}, "category": {"column": "kind"}},
        measures=MEASURES,
    )
    recipe, p = _pipeline(recipe_path)
    src = recipe_path.parent / "events.parquet"
    want = _sql(src, "region, kind", "ALL", where)
    _compare(aggregate.finalize(recipe, p), want, ["region", "kind"])
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    total = con.execute(f"SELECT count(*) FROM read_parquet('{src}')").fetchone()[0]
    kept = con.execute(f"SELECT count(*) FROM read_parquet('{src}') WHERE {where}").fetchone()[0]
    assert 0 < kept < total  # the filter does something on this fixture
    acc = fit_payload(recipe_path)["accounting"]
    assert acc["input_rows"] == total
    assert acc["filtered_rows"] == total - kept
    assert acc["invalid_rows"] == 0
    assert acc["represented_rows"] == kept


def test_plain_keys_with_nulls_equal_duckdb_and_count_the_rest_as_invalid(
    tmp_path: Path, events: pl.DataFrame
) -> None:
    # Plain key columns take the scan's short path (no per-row validity code): rows with a
    # null key must still be left out of every group and counted under the reason "key".
    i = pl.int_range(pl.len())
    holes = events.with_columns(
        pl.when(i % 7 == 0).then(None).otherwise(pl.col("region")).alias("region"),
        pl.when(i % 11 == 0).then(None).otherwise(pl.col("kind")).alias("kind"),
    )
    path = write_case(
        tmp_path,
        holes,
        group={"region": {"column": "region"}, "category": {"column": "kind"}},
        measures=MEASURES,
    )
    _, p = _pipeline(path)
    got = aggregate.finalize(reduce.load_recipe(path), p)
    # Reference: DuckDB GROUP BY over the rows whose keys are both present.
    want = _sql(
        tmp_path / "events.parquet",
        "region, kind",
        "region, kind",
        where="region IS NOT NULL AND kind IS NOT NULL",
    )
    _compare(got, want, ["region", "kind"])
    nulls = holes.filter(pl.col("region").is_null() | pl.col("kind").is_null()).height
    assert nulls > 500
    assert p.accounting.invalid_by_reason == {"key": nulls}
    assert p.accounting.invalid_rows == nulls
