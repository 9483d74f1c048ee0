"""CSV and NDJSON text: null markers (source.null_values) and values that cannot be read.

Outside source: DuckDB's CSV reader with ``nullstr`` (a list of strings read as NULL) gives
the expected distinct counts and sums.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import polars as pl
import pytest

from tests._builders import invoke, to_toml


@pytest.fixture(autouse=True)
def _in_tmp(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)


def _rows(n: int = 3000, seed: int = 3) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    tail = pl.Series(rng.choice(["T1", "T2", "T3", "NA", "-"], n))
    delay = pl.Series([str(int(v)) for v in rng.integers(-5, 90, n)])
    delay = pl.select(
        pl.when(pl.int_range(n) % 7 == 0).then(pl.lit("NA")).otherwise(pl.lit(delay))
    ).to_series()
    return pl.DataFrame(
        {"carrier": rng.choice(["AA", "UA", "DL"], n), "tailnum": tail, "dep_delay": delay}
    )


def _recipe(
    folder: Path, source: dict[str, Any], group: dict[str, Any], measures: dict[str, Any]
) -> Path:
    doc = {
        "name": "case",
        "source": source,
        "group": group,
        "measures": measures,
        "output": {"path": "out/case.json"},
    }
    path = folder / "recipe.toml"
    path.write_text(to_toml(doc))
    return path


def _columns(folder: Path) -> dict[str, dict[str, Any]]:
    payload = json.loads((folder / "out" / "case.json").read_bytes())
    cols = payload["columns"]
    names = payload.get("dictionaries", {}).get("carrier")
    keys = [names[i] for i in cols["carrier"]] if names else cols["carrier"]
    return {k: {m: cols[m][i] for m in cols if m != "carrier"} for i, k in enumerate(keys)}


def _duck(path: Path, nullstr: list[str]) -> dict[str, tuple[int, int | None]]:
    con = duckdb.connect()
    sql = (
        "SELECT carrier, count(DISTINCT tailnum), sum(dep_delay) FROM "
        f"read_csv('{path}', nullstr = {nullstr!r}, "
        "columns = {'carrier': 'VARCHAR', 'tailnum': 'VARCHAR', 'dep_delay': 'BIGINT'}, "
        "header = true) GROUP BY carrier"
    )
    return {c: (int(n), None if s is None else int(s)) for c, n, s in con.execute(sql).fetchall()}


MEASURES = {"planes": {"distinct": "tailnum"}, "delay": {"sum": "dep_delay"}}


def test_null_values_match_duckdb_nullstr(tmp_path: Path) -> None:
    _rows().write_csv(tmp_path / "flights.csv")
    recipe = _recipe(
        tmp_path,
        {"path": "flights.csv", "null_values": ["NA", "-"]},
        {"category": {"column": "carrier"}},
        MEASURES,
    )
    code, _, err = invoke("run", str(recipe), "--quiet", "--no-cache")
    assert code == 0, err
    got = _columns(tmp_path)
    want = _duck(tmp_path / "flights.csv", ["NA", "-"])
    assert {k: (v["planes"], v["delay"]) for k, v in got.items()} == want
    assert all(v["planes"] == 3 for v in got.values())  # T1, T2, T3


def test_without_null_values_na_is_a_value_of_a_text_column(tmp_path: Path) -> None:
    _rows().with_columns(pl.col("dep_delay").str.replace("NA", "")).write_csv(
        tmp_path / "flights.csv"
    )
    recipe = _recipe(
        tmp_path, {"path": "flights.csv"}, {"category": {"column": "carrier"}}, MEASURES
    )
    code, _, err = invoke("run", str(recipe), "--quiet", "--no-cache")
    assert code == 0, err
    got = _columns(tmp_path)
    # the documented default: only an empty field is missing (DuckDB: nullstr = '')
    want = _duck(tmp_path / "flights.csv", [""])
    assert {k: (v["planes"], v["delay"]) for k, v in got.items()} == want
    assert all(v["planes"] == 5 for v in got.values())  # T1, T2, T3, NA, -


def test_ndjson_strings_listed_in_null_values_are_missing(tmp_path: Path) -> None:
    df = _rows()
    df.select("carrier", "tailnum").write_ndjson(tmp_path / "flights.ndjson")
    df.select("carrier", "tailnum").write_csv(tmp_path / "same.csv")
    recipe = _recipe(
        tmp_path,
        {"path": "flights.ndjson", "null_values": ["NA", "-"]},
        {"category": {"column": "carrier"}},
        {"planes": {"distinct": "tailnum"}},
    )
    code, _, err = invoke("run", str(recipe), "--quiet", "--no-cache")
    assert code == 0, err
    got = {k: v["planes"] for k, v in _columns(tmp_path).items()}
    con = duckdb.connect()
    want = dict(
        con.execute(
            f"SELECT carrier, count(DISTINCT tailnum) FROM read_csv("
            f"'{tmp_path / 'same.csv'}', nullstr = ['NA', '-']) "
            "GROUP BY carrier"
        ).fetchall()
    )
    assert got == want


def test_null_values_on_parquet_is_exit_2(tmp_path: Path) -> None:
    _rows().write_parquet(tmp_path / "flights.parquet")
    recipe = _recipe(
        tmp_path,
        {"path": "flights.parquet", "null_values": ["NA"]},
        {"category": {"column": "carrier"}},
        {"n": "count"},
    )
    code, _, err = invoke("check", str(recipe))
    assert code == 2
    assert err.strip() == (
        "error: flights.parquet: source.null_values applies to CSV and "
        "NDJSON text; parquet stores missing values as nulls, so remove the "
        "key"
    )


def test_null_values_must_be_strings(tmp_path: Path) -> None:
    _rows().write_csv(tmp_path / "flights.csv")
    recipe = _recipe(
        tmp_path,
        {"path": "flights.csv", "null_values": "NA"},
        {"category": {"column": "carrier"}},
        {"n": "count"},
    )
    code, _, err = invoke("check", str(recipe))
    assert code == 2
    assert err.strip() == (
        "error: recipe.toml: source.null_values: must be a list of strings "
        'such as ["NA", "-"], got \'NA\''
    )


def _airports(n: int, bad_row: int, lat_value: str, time_value: str) -> pl.DataFrame:
    rng = np.random.default_rng(5)
    lat = [f"{v:.4f}" for v in rng.uniform(30, 40, n)]
    lon = [f"{v:.4f}" for v in rng.uniform(-100, -90, n)]
    ts = [f"2013-02-0{1 + i % 7}T{i % 24:02d}:15:00Z" for i in range(n)]
    lat[bad_row] = lat_value
    ts[bad_row + 1] = time_value
    return pl.DataFrame({"lat": lat, "lon": lon, "ts": ts, "k": ["a"] * n})


@pytest.mark.parametrize("n, bad_row", [(500, 100), (15000, 12000)])
def test_unreadable_coordinate_and_time_are_invalid_rows_by_reason(
    tmp_path: Path, n: int, bad_row: int
) -> None:
    _airports(n, bad_row, "n/a", "unknown").write_csv(tmp_path / "ev.csv")
    recipe = _recipe(
        tmp_path,
        {"path": "ev.csv", "lat": "lat", "lon": "lon", "time": "ts"},
        {"hex": {"levels": [4]}, "time": {"levels": ["1d"]}},
        {"n": "count"},
    )
    code, _, err = invoke("run", str(recipe), "--quiet", "--no-cache")
    assert code == 0, err
    manifest = json.loads((tmp_path / "out" / "case.json.manifest.json").read_bytes())
    assert manifest["accounting"]["invalid_by_reason"] == {"coordinates": 1, "time": 1}
    assert manifest["accounting"]["invalid_rows"] == 2
    assert manifest["accounting"]["represented_rows"] == n - 2


def test_unreadable_times_do_not_count_as_naive_times(tmp_path: Path) -> None:
    """'n/a' among times with offsets is an unreadable time, not a time without a zone."""
    _airports(300, 10, "31.5", "n/a").write_csv(tmp_path / "ev.csv")
    recipe = _recipe(
        tmp_path, {"path": "ev.csv", "time": "ts"}, {"time": {"levels": ["1d"]}}, {"n": "count"}
    )
    code, _, err = invoke("run", str(recipe), "--quiet", "--no-cache")
    assert code == 0, err
    manifest = json.loads((tmp_path / "out" / "case.json.manifest.json").read_bytes())
    assert manifest["accounting"]["invalid_by_reason"] == {"time": 1}


def test_null_marker_in_coordinates_is_an_invalid_row(tmp_path: Path) -> None:
    _airports(300, 10, "NA", "2013-02-01T00:00:00Z").write_csv(tmp_path / "ev.csv")
    recipe = _recipe(
        tmp_path,
        {"path": "ev.csv", "lat": "lat", "lon": "lon", "null_values": ["NA"]},
        {"hex": {"levels": [4]}},
        {"n": "count"},
    )
    code, _, err = invoke("run", str(recipe), "--quiet", "--no-cache")
    assert code == 0, err
    manifest = json.loads((tmp_path / "out" / "case.json.manifest.json").read_bytes())
    assert manifest["accounting"]["invalid_by_reason"] == {"coordinates": 1}


def test_csv_dates_alone_are_days_on_the_grouping_clock(tmp_path: Path) -> None:
    """A date-only CSV time column keeps day semantics: 2013-02-01 is the local day in
    group.time.zone (midnight in America/Chicago is 06:00 UTC in February, per zoneinfo)."""
    import datetime as dt
    from zoneinfo import ZoneInfo

    (tmp_path / "ev.csv").write_text("day,k\n2013-02-01,a\n2013-02-02,b\nn/a,c\n2013-02-02,a\n")
    recipe = _recipe(
        tmp_path,
        {"path": "ev.csv", "time": "day"},
        {"time": {"levels": ["1d"], "zone": "America/Chicago"}},
        {"n": "count"},
    )
    code, _, err = invoke("run", str(recipe), "--quiet", "--no-cache")
    assert code == 0, err
    doc = json.loads((tmp_path / "out" / "case.json").read_bytes())
    midnight = [
        int(dt.datetime(2013, 2, d, tzinfo=ZoneInfo("America/Chicago")).timestamp()) for d in (1, 2)
    ]
    assert doc["columns"] == {"time": midnight, "n": [1, 2]}
    assert doc["accounting"]["invalid_rows"] == 1
