"""Measures with ``where``: counts and sums over a subset of rows, exact under roll-up.

Outside source: DuckDB's aggregate ``FILTER (WHERE ...)`` clause gives the expected values
per group, computed directly at each level (no roll-up).
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import polars as pl
import pytest
from click.testing import CliRunner

from reduce.cli import main
from tests._builders import write_recipe

RECIPE = """
name = "flights"
[source]
path = "flights.parquet"
time = "sched"
[group]
time = {{ levels = ["1h", "1d"] }}
category = {{ column = "carrier" }}
[measures]
flights = "count"
cancelled = {{ count = true, where = [{{ column = "dep_time", null = true }}] }}
late_minutes = {{ sum = "delay", where = [{{ column = "delay", min = 15 }}] }}
worst_morning = {{ max = "delay", where = [{{ column = "hour", max = 11 }}, {{ column = "dep_time", null = false }}] }}
[output]
path = "out/flights.json"
{extra}
"""


@pytest.fixture(autouse=True)
def _in_tmp(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)


def _flights(folder: Path, n: int = 6000) -> pl.DataFrame:
    rng = np.random.default_rng(11)
    start = dt.datetime(2013, 2, 1, tzinfo=dt.UTC)
    sched = [start + dt.timedelta(minutes=int(m)) for m in rng.integers(0, 5 * 1440, n)]
    cancelled = rng.random(n) < 0.08
    delay = rng.integers(-10, 120, n)
    df = pl.DataFrame(
        {
            "sched": pl.Series(sched, dtype=pl.Datetime("us", "UTC")),
            "carrier": rng.choice(["AA", "UA", "DL", "B6"], n),
            "dep_time": pl.Series(
                [None if c else int(d) for c, d in zip(cancelled, delay)], dtype=pl.Int64
            ),
            "delay": pl.Series(
                [None if c else int(d) for c, d in zip(cancelled, delay)], dtype=pl.Int64
            ),
        }
    ).with_columns(pl.col("sched").dt.hour().cast(pl.Int64).alias("hour"))
    df.write_parquet(folder / "flights.parquet")
    return df


def _duck(df: pl.DataFrame, unit: str) -> dict[tuple[int, str], tuple[Any, ...]]:
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.register("f", df.to_arrow())
    rows = con.execute(f"""
        SELECT epoch(date_trunc('{unit}', sched))::BIGINT, carrier, count(*),
               count(*) FILTER (WHERE dep_time IS NULL),
               sum(delay) FILTER (WHERE delay >= 15),
               max(delay) FILTER (WHERE hour <= 11 AND dep_time IS NOT NULL)
        FROM f GROUP BY ALL""").fetchall()
    return {(t, c): (n, k, None if s is None else int(s), w) for t, c, n, k, s, w in rows}


def _payload_rows(path: Path) -> dict[tuple[int, str], tuple[Any, ...]]:
    doc = json.loads(path.read_bytes())
    cols = doc["columns"]
    labels = doc.get("dictionaries", {}).get("carrier")
    carriers = [labels[i] for i in cols["carrier"]] if labels else cols["carrier"]
    return {
        (t, c): (n, k, s, w)
        for t, c, n, k, s, w in zip(
            cols["time"],
            carriers,
            cols["flights"],
            cols["cancelled"],
            cols["late_minutes"],
            cols["worst_morning"],
        )
    }


def _run(tmp_path: Path, *args: str, env: dict[str, str] | None = None) -> None:
    res = CliRunner(env=env).invoke(main, ["run", "recipe.toml", "--quiet", *args])
    assert res.exit_code == 0, res.stderr


@pytest.mark.parametrize("level", ["1h", "1d"])
def test_where_measures_match_duckdb_filter_at_every_level(tmp_path: Path, level: str) -> None:
    df = _flights(tmp_path)
    write_recipe(tmp_path, RECIPE.format(extra=""))
    _run(tmp_path, "--set", f'group.time.levels=["{level}"]', "--no-cache")
    direct = _payload_rows(tmp_path / "out" / "flights.json")
    want = _duck(df, {"1h": "hour", "1d": "day"}[level])
    assert direct == want
    assert sum(v[1] for v in want.values()) > 0  # some flights are cancelled
    # the same level rolled up from the finest (hourly) partial, in memory and spilled (a
    # 500-row probe finds hourly groups too sparse: the keyed rows go to disk)
    if level == "1d":
        for env in ({}, {"REDUCE_PROBE_ROWS": "500"}):
            write_recipe(tmp_path, RECIPE.format(extra='[budget]\nmax = "1MB"\norder = ["time"]'))
            _run(tmp_path, "--budget", "9KB", "--on", "raw", "--no-cache", env=env)
            doc = json.loads((tmp_path / "out" / "flights.json").read_bytes())
            assert doc["level"]["time"] == "1d"
            assert _payload_rows(tmp_path / "out" / "flights.json") == want


def test_where_on_a_distinct_measure_is_refused(tmp_path: Path) -> None:
    _flights(tmp_path)
    write_recipe(
        tmp_path,
        RECIPE.format(extra="").replace(
            'late_minutes = { sum = "delay",', 'late_minutes = { distinct = "delay",'
        ),
    )
    res = CliRunner().invoke(main, ["check", "recipe.toml"])
    assert res.exit_code == 2
    assert res.stderr.strip() == (
        "error: recipe.toml: measures.late_minutes.where: applies to "
        "count, sum, mean, min and max measures, not distinct"
    )


def test_where_literal_of_the_wrong_type_is_found_by_check(tmp_path: Path) -> None:
    _flights(tmp_path)
    write_recipe(
        tmp_path,
        RECIPE.format(extra="").replace(
            '{ column = "delay", min = 15 }', '{ column = "delay", in = ["late"] }'
        ),
    )
    res = CliRunner().invoke(main, ["check", "recipe.toml"])
    assert res.exit_code == 2
    assert res.stderr.strip() == (
        "error: flights.parquet: measures.late_minutes.where[0].in: value 'late' cannot be "
        "compared with column 'delay' of type Int64; use a value of the column's type"
    )
