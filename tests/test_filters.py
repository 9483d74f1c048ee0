"""Structured filters on time columns: literals as instants, compared in UTC.

Outside sources:
- DuckDB (its ICU time zones): ``timezone(zone, TIMESTAMP ...)`` reads a wall time in a zone
  as an instant; used for the expected row counts of every window on zone-aware columns.
- IANA tz database via Python's ``zoneinfo``: in America/Chicago, 2013-03-10 has 23 hours
  (02:00 -> 03:00) and 2013-11-03 has 25 hours (02:00 -> 01:00); PEP 495: ``fold=0`` is the
  earlier of two instants with the same wall time.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import duckdb
import polars as pl
import pytest

from tests._builders import invoke, write_case

CHI = "America/Chicago"


@pytest.fixture(autouse=True)
def _in_tmp(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)


def _events() -> pl.DataFrame:
    """Every 10 minutes over both DST weekends of 2013, as UTC, Chicago and naive columns."""
    times: list[dt.datetime] = []
    for start in (dt.datetime(2013, 3, 9, tzinfo=dt.UTC), dt.datetime(2013, 11, 2, tzinfo=dt.UTC)):
        times += [start + dt.timedelta(minutes=10 * i) for i in range(4 * 24 * 6)]
    utc = pl.Series("t_utc", times, dtype=pl.Datetime("us", "UTC"))
    return pl.DataFrame(
        [utc, utc.dt.convert_time_zone(CHI).alias("t_chi"), pl.Series("k", ["x"] * len(times))]
    )


def _kept(
    tmp_path: Path,
    events: pl.DataFrame | None,
    column: str,
    flt: dict[str, Any],
    zone: str | None = CHI,
) -> int:
    source: dict[str, Any] = {"filter": [{"column": column, **flt}]}
    if zone:
        source["time_zone"] = zone
    recipe = write_case(
        tmp_path,
        events,
        group={"category": {"column": "k"}},
        measures={"n": "count"},
        source=source,
    )
    code, _, err = invoke("run", str(recipe), "--quiet", "--no-cache")
    assert code == 0, err
    payload = json.loads((tmp_path / "out" / "case.json").read_bytes())
    return int(payload["accounting"]["represented_rows"])


def _duck(events: pl.DataFrame, where: str) -> int:
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.register("ev", events.select("t_utc").to_arrow())
    return int(con.execute(f"SELECT count(*) FROM ev WHERE {where}").fetchone()[0])


def _wall(text: str) -> str:
    return f"timezone('{CHI}', TIMESTAMP '{text}')"


D = dt.date
T = dt.datetime
CASES = [
    # a date min and max: the whole local day of spring forward (23 hours)
    (
        {"min": D(2013, 3, 10), "max": D(2013, 3, 10)},
        f"t_utc >= {_wall('2013-03-10 00:00')} AND t_utc < {_wall('2013-03-11 00:00')}",
    ),
    # the day of fall back (25 hours)
    (
        {"min": D(2013, 11, 3), "max": D(2013, 11, 3)},
        f"t_utc >= {_wall('2013-11-03 00:00')} AND t_utc < {_wall('2013-11-04 00:00')}",
    ),
    # local date-times around the skipped hour, read on source.time_zone
    (
        {"min": T(2013, 3, 10, 1, 50), "max": T(2013, 3, 10, 3, 10)},
        f"t_utc >= {_wall('2013-03-10 01:50')} AND t_utc <= {_wall('2013-03-10 03:10')}",
    ),
    # offset date-times are instants: the two 01:30s of fall back, an hour apart
    (
        {
            "min": T(2013, 11, 3, 1, 30, tzinfo=dt.timezone(dt.timedelta(hours=-5))),
            "max": T(2013, 11, 3, 1, 30, tzinfo=dt.timezone(dt.timedelta(hours=-6))),
        },
        "t_utc >= TIMESTAMPTZ '2013-11-03 01:30:00-05' AND t_utc <= "
        "TIMESTAMPTZ '2013-11-03 01:30:00-06'",
    ),
    # in = [...] with an offset date-time
    (
        {"in": [T(2013, 3, 10, 8, 0, tzinfo=dt.UTC), T(2013, 3, 10, 8, 5, tzinfo=dt.UTC)]},
        "t_utc = TIMESTAMPTZ '2013-03-10 08:00:00+00'",
    ),
]


@pytest.mark.parametrize("column", ["t_utc", "t_chi"])
@pytest.mark.parametrize(("flt", "where"), CASES)
def test_time_filters_match_duckdb_across_both_dst_days(
    tmp_path: Path, column: str, flt: dict[str, Any], where: str
) -> None:
    ev = _events()
    expected = _duck(ev, where)
    assert expected > 0
    assert _kept(tmp_path, ev, column, flt) == expected


def test_day_lengths_on_dst_days_follow_zoneinfo(tmp_path: Path) -> None:
    ev = _events()
    for day, hours in ((D(2013, 3, 10), 23), (D(2013, 11, 3), 25)):
        start = T(day.year, day.month, day.day, tzinfo=ZoneInfo(CHI))
        end = T(day.year, day.month, day.day + 1, tzinfo=ZoneInfo(CHI))
        assert round((end.timestamp() - start.timestamp()) / 3600) == hours  # zoneinfo
        assert _kept(tmp_path, ev, "t_utc", {"min": day, "max": day}) == hours * 6


def test_naive_literal_on_a_naive_column_is_read_in_source_time_zone(tmp_path: Path) -> None:
    ev = _events()
    naive = ev.with_columns(pl.col("t_chi").dt.replace_time_zone(None).alias("t_local"))
    # 01:30 on fall-back day happens twice; a naive literal is the earlier (PEP 495 fold=0)
    lo = T(2013, 11, 3, 1, 30, tzinfo=ZoneInfo(CHI), fold=0).astimezone(dt.UTC)
    hi = T(2013, 11, 3, 3, 0, tzinfo=ZoneInfo(CHI)).astimezone(dt.UTC)
    # the naive column's repeated wall times are read as the earlier instant too, so the
    # second 01:30..01:50 fold in (as 06:30..06:50 UTC), and 01:00..01:20 CST are dropped
    locals_ = [
        t.replace(tzinfo=ZoneInfo(CHI)).astimezone(dt.UTC)
        for t in naive.get_column("t_local").to_list()
    ]
    expected = sum(lo <= t <= hi for t in locals_)
    got = _kept(
        tmp_path, naive, "t_local", {"min": T(2013, 11, 3, 1, 30), "max": T(2013, 11, 3, 3, 0)}
    )
    assert got == expected


def test_naive_literal_without_time_zone_is_read_as_utc(tmp_path: Path) -> None:
    ev = _events()
    assert (
        _kept(
            tmp_path, ev, "t_chi", {"min": T(2013, 3, 10, 0, 0), "max": D(2013, 3, 10)}, zone=None
        )
        == 24 * 6
    )


def test_check_rejects_a_time_literal_on_a_text_column(tmp_path: Path) -> None:
    recipe = write_case(
        tmp_path,
        _events(),
        group={"category": {"column": "k"}},
        measures={"n": "count"},
        source={"filter": [{"column": "k", "min": D(2013, 3, 10)}]},
    )
    code, out, err = invoke("check", str(recipe))
    assert code == 2
    assert err.strip() == (
        "error: events.parquet: source.filter[0].min: value "
        "2013-03-10 cannot be compared with column 'k' of "
        "type String; use a value of the column's type"
    )


def test_check_accepts_a_zoned_filter_on_a_utc_column(tmp_path: Path) -> None:
    recipe = write_case(
        tmp_path,
        _events(),
        group={"category": {"column": "k"}},
        measures={"n": "count"},
        source={"time_zone": CHI, "filter": [{"column": "t_utc", "min": T(2013, 3, 10, 0, 0)}]},
    )
    code, out, err = invoke("check", str(recipe))
    assert code == 0, err
    assert out.startswith("recipe.toml: ok") or out.startswith(f"{recipe}: ok")


def test_min_after_max_compares_a_date_and_a_date_time_as_instants(tmp_path: Path) -> None:
    recipe = write_case(
        tmp_path,
        _events(),
        group={"category": {"column": "k"}},
        measures={"n": "count"},
        source={
            "filter": [{"column": "t_utc", "min": T(2013, 3, 11, 0, 0), "max": D(2013, 3, 10)}]
        },
    )
    code, out, err = invoke("check", str(recipe))
    assert code == 2
    assert err.strip() == (
        "error: recipe.toml: source.filter[0]: min 2013-03-11 00:00:00 is "
        "above max 2013-03-10; swap them"
    )
    # the same day as min and max is one whole day, not an empty window
    assert (
        _kept(tmp_path, _events(), "t_utc", {"min": T(2013, 3, 10, 23, 0), "max": D(2013, 3, 10)})
        == 6
    )
