"""Time bins checked against the IANA time-zone database (through ``zoneinfo``) and ISO 8601.

Outside sources:
- IANA tz database via Python's ``zoneinfo``: UTC offsets and DST changes. In
  America/New_York, 2024-03-10 (clocks 02:00 -> 03:00) lasts 23 hours and 2024-11-03 (clocks
  02:00 -> 01:00) lasts 25 hours. In America/Havana, 2024-11-03 clocks go back at 01:00 to
  00:00, so local midnight happens twice; in America/Santiago, 2024-09-08 clocks jump from
  00:00 to 01:00, so local midnight does not happen at all (all read from ``zoneinfo``).
- ISO 8601: weeks start on Monday.
- PEP 495 (``fold``): for a repeated local time ``fold=0`` is the earlier instant.
- DESIGN contract: a time-bin column holds each bin's start as integer seconds since the Unix
  epoch (UTC).

The reference bin start is computed per event in plain Python with ``zoneinfo``: the local
wall clock truncated to the hour, day, ISO week (Monday) or month, read back as an instant.
"""

from __future__ import annotations

import datetime as dt
import json
from collections import Counter
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import polars as pl
import pytest

import reduce
from reduce.pipeline import Reducer
from tests._builders import write_case

NY = "America/New_York"
H = 3600


def _events(start_utc: dt.datetime, end_utc: dt.datetime, step: dt.timedelta) -> pl.DataFrame:
    times = []
    t = start_utc
    while t < end_utc:
        times.append(t)
        t += step
    return pl.DataFrame({"t": pl.Series(times, dtype=pl.Datetime("us", "UTC"))})


def _local(y: int, m: int, d: int, hh: int = 0, zone: str = NY, fold: int = 0) -> dt.datetime:
    return dt.datetime(y, m, d, hh, tzinfo=ZoneInfo(zone), fold=fold)


def _payload(recipe_path: Path, time_level: str) -> dict[str, Any]:
    """The pipeline's payload at one time level (rolled up from the finest partial)."""
    recipe = reduce.load_recipe(recipe_path)
    red = Reducer(recipe, use_cache=False)
    level = {**recipe.finest_level(), "time": time_level}
    return json.loads(red.payload(level))


def _bins(payload: dict[str, Any]) -> dict[int, int]:
    cols = payload["columns"]
    return dict(zip(cols["time"], cols["n"]))


def _recipe(folder: Path, events: pl.DataFrame, levels: list[str], zone: str) -> Path:
    return write_case(
        folder,
        events,
        source={"time": "t"},
        group={"time": {"levels": levels, "zone": zone}},
        measures={"n": "count"},
    )


def ref_bin_start(ts: dt.datetime, unit: str, zone: str) -> int:
    """Start of the bin of ``ts`` on the local clock of ``zone`` (zoneinfo, PEP 495 folds)."""
    z = ZoneInfo(zone)
    local = ts.astimezone(z)
    if unit == "1h":
        start = local.replace(minute=0, second=0, microsecond=0)  # keeps the fold of ts
    elif unit == "1d":
        start = dt.datetime(local.year, local.month, local.day, tzinfo=z)
    elif unit == "1w":
        monday = local.date() - dt.timedelta(days=local.weekday())  # ISO 8601: Monday
        start = dt.datetime(monday.year, monday.month, monday.day, tzinfo=z)
    elif unit == "1mo":
        start = dt.datetime(local.year, local.month, 1, tzinfo=z)
    else:
        raise ValueError(unit)
    return int(start.timestamp())


# --------------------------------------------------------------------------------------------
# America/New_York around the 2024 DST changes
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("path", ["scan", "rollup"])
def test_new_york_day_bins_are_23_hours_on_2024_03_10(tmp_path: Path, path: str) -> None:
    # zoneinfo: local midnights of 2024-03-09, -10, -11 are 24 h then 23 h apart.
    start = _local(2024, 3, 9).astimezone(dt.UTC)
    end = _local(2024, 3, 12).astimezone(dt.UTC)
    events = _events(start, end, dt.timedelta(hours=1))
    levels = ["1d"] if path == "scan" else ["1h", "1d"]
    bins = _bins(_payload(_recipe(tmp_path, events, levels, NY), "1d"))
    starts = sorted(bins)
    assert starts == [int(_local(2024, 3, d).timestamp()) for d in (9, 10, 11)]
    assert [b - a for a, b in zip(starts, starts[1:])] == [24 * H, 23 * H]
    assert [bins[s] for s in starts] == [24, 23, 24]  # one event per real hour
    for s in starts:
        loc = dt.datetime.fromtimestamp(s, ZoneInfo(NY))
        assert (loc.hour, loc.minute, loc.second) == (0, 0, 0)


@pytest.mark.parametrize("path", ["scan", "rollup"])
def test_new_york_day_bins_are_25_hours_on_2024_11_03(tmp_path: Path, path: str) -> None:
    start = _local(2024, 11, 2).astimezone(dt.UTC)
    end = _local(2024, 11, 5).astimezone(dt.UTC)
    events = _events(start, end, dt.timedelta(hours=1))
    levels = ["1d"] if path == "scan" else ["1h", "1d"]
    bins = _bins(_payload(_recipe(tmp_path, events, levels, NY), "1d"))
    starts = sorted(bins)
    assert starts == [int(_local(2024, 11, d).timestamp()) for d in (2, 3, 4)]
    assert [b - a for a, b in zip(starts, starts[1:])] == [24 * H, 25 * H]
    assert [bins[s] for s in starts] == [24, 25, 24]
    for s in starts:
        loc = dt.datetime.fromtimestamp(s, ZoneInfo(NY))
        assert (loc.hour, loc.minute) == (0, 0)


def test_new_york_hour_bins_on_2024_11_03_show_0100_edt_and_0100_est(tmp_path: Path) -> None:
    # PEP 495: 01:00 with fold=0 is EDT (UTC-4), with fold=1 EST (UTC-5), one hour apart.
    start = _local(2024, 11, 3).astimezone(dt.UTC)
    end = _local(2024, 11, 4).astimezone(dt.UTC)
    events = _events(start, end, dt.timedelta(minutes=20))
    bins = _bins(_payload(_recipe(tmp_path, events, ["1h"], NY), "1h"))
    edt = int(_local(2024, 11, 3, 1, fold=0).timestamp())
    est = int(_local(2024, 11, 3, 1, fold=1).timestamp())
    assert est - edt == H
    assert _local(2024, 11, 3, 1, fold=0).utcoffset() == dt.timedelta(hours=-4)
    assert _local(2024, 11, 3, 1, fold=1).utcoffset() == dt.timedelta(hours=-5)
    assert bins.get(edt) == 3 and bins.get(est) == 3
    assert len(bins) == 25 and set(bins.values()) == {3}


def test_new_york_week_bins_start_monday_local_midnight(tmp_path: Path) -> None:
    # ISO 8601: weeks start on Monday. The week of 2024-03-04 holds the spring change, so it
    # lasts 167 hours; the week of 2024-10-28 holds the autumn change (169 hours).
    start = _local(2024, 2, 26).astimezone(dt.UTC)
    end = _local(2024, 11, 18).astimezone(dt.UTC)
    events = _events(start, end, dt.timedelta(hours=1))
    bins = _bins(_payload(_recipe(tmp_path, events, ["1h", "1d", "1w"], NY), "1w"))
    for s in bins:
        loc = dt.datetime.fromtimestamp(s, ZoneInfo(NY))
        assert loc.weekday() == 0 and (loc.hour, loc.minute, loc.second) == (0, 0, 0), loc
    assert bins[int(_local(2024, 3, 4).timestamp())] == 167
    assert bins[int(_local(2024, 10, 28).timestamp())] == 169
    assert sum(bins.values()) == events.height


def test_new_york_month_bins_start_on_the_first_at_local_midnight(tmp_path: Path) -> None:
    start = _local(2024, 1, 1).astimezone(dt.UTC)
    end = _local(2025, 1, 1).astimezone(dt.UTC)
    events = _events(start, end, dt.timedelta(hours=1))
    bins = _bins(_payload(_recipe(tmp_path, events, ["1h", "1d", "1mo"], NY), "1mo"))
    assert sorted(bins) == [int(_local(2024, m, 1).timestamp()) for m in range(1, 13)]
    # Hours per month on the local clock: March loses one, November gains one (zoneinfo).
    # (timestamps, since subtracting two datetimes of one tzinfo ignores the offsets)
    hours = {
        m: (_local(2024 + m // 12, m % 12 + 1, 1).timestamp() - _local(2024, m, 1).timestamp()) // H
        for m in range(1, 13)
    }
    assert hours[3] == 31 * 24 - 1 and hours[11] == 30 * 24 + 1
    assert [bins[int(_local(2024, m, 1).timestamp())] for m in range(1, 13)] == [
        hours[m] for m in range(1, 13)
    ]


def test_payload_time_values_are_integer_utc_epoch_seconds(tmp_path: Path) -> None:
    # DESIGN contract; reference: datetime(..., tzinfo=ZoneInfo(zone)).timestamp().
    events = pl.DataFrame(
        {
            "t": pl.Series(
                [dt.datetime(2024, 7, 4, 15, 42, tzinfo=dt.UTC)], dtype=pl.Datetime("us", "UTC")
            )
        }
    )
    for zone, local_day in (
        (NY, (2024, 7, 4)),
        ("Asia/Tokyo", (2024, 7, 5)),
        ("Pacific/Kiritimati", (2024, 7, 5)),
        ("UTC", (2024, 7, 4)),
    ):
        folder = tmp_path / zone.replace("/", "_")
        payload = _payload(_recipe(folder, events, ["1d"], zone), "1d")
        (value,) = payload["columns"]["time"]
        assert type(value) is int
        assert value == dt.datetime(*local_day, tzinfo=ZoneInfo(zone)).timestamp()


# --------------------------------------------------------------------------------------------
# Midnight that repeats or does not exist
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("path", ["scan", "rollup"])
def test_day_bin_is_one_bin_when_local_midnight_repeats(tmp_path: Path, path: str) -> None:
    # zoneinfo: America/Havana, 2024-11-03 01:00 CDT -> 00:00 CST: 00:00 happens twice.
    # The local day 2024-11-03 is one day (25 hours) starting at the first 00:00 (fold=0,
    # UTC-4); it must be one bin, not split at the second midnight.
    zone = "America/Havana"
    first = _local(2024, 11, 3, zone=zone, fold=0)
    second = _local(2024, 11, 3, zone=zone, fold=1)
    assert second.timestamp() - first.timestamp() == H
    start = _local(2024, 11, 2, zone=zone).astimezone(dt.UTC)
    end = _local(2024, 11, 5, zone=zone).astimezone(dt.UTC)
    events = _events(start, end, dt.timedelta(minutes=30))
    levels = ["1d"] if path == "scan" else ["1h", "1d"]
    bins = _bins(_payload(_recipe(tmp_path, events, levels, zone), "1d"))
    shown = {str(dt.datetime.fromtimestamp(s, ZoneInfo(zone))): n for s, n in sorted(bins.items())}
    assert sorted(bins) == [int(_local(2024, 11, d, zone=zone).timestamp()) for d in (2, 3, 4)], (
        f"day bins (local start: events): {shown}"
    )
    assert bins[int(first.timestamp())] == 50  # 25 hours of half-hourly events


def test_day_bin_starts_at_first_instant_when_local_midnight_is_skipped(tmp_path: Path) -> None:
    # zoneinfo: America/Santiago, 2024-09-08 00:00 -> 01:00; the day starts at 01:00 -03.
    zone = "America/Santiago"
    start = _local(2024, 9, 7, zone=zone).astimezone(dt.UTC)
    end = _local(2024, 9, 10, zone=zone).astimezone(dt.UTC)
    events = _events(start, end, dt.timedelta(hours=1))
    bins = _bins(_payload(_recipe(tmp_path, events, ["1h", "1d"], zone), "1d"))
    day_start = dt.datetime(2024, 9, 8, 4, tzinfo=dt.UTC)  # 01:00 at UTC-3
    assert dt.datetime(2024, 9, 8, tzinfo=ZoneInfo(zone)).timestamp() == day_start.timestamp()
    assert int(day_start.timestamp()) in bins
    assert bins[int(day_start.timestamp())] == 23
    assert sum(bins.values()) == events.height


# --------------------------------------------------------------------------------------------
# Every event of a year, several zones, every calendar unit: bins equal the zoneinfo reference
# --------------------------------------------------------------------------------------------

ZONES = [
    "UTC",
    NY,
    "Europe/London",
    "America/Santiago",
    "Australia/Lord_Howe",
    "Asia/Kathmandu",
    "Asia/Kolkata",
]


@pytest.fixture(scope="module")
def year_events() -> pl.DataFrame:
    # Every 30 minutes through 2024 (UTC), with an offset of 7 minutes so events are not on
    # bin edges, plus events exactly on the hour.
    a = _events(
        dt.datetime(2023, 12, 30, 0, 7, tzinfo=dt.UTC),
        dt.datetime(2025, 1, 2, tzinfo=dt.UTC),
        dt.timedelta(minutes=30),
    )
    b = _events(
        dt.datetime(2023, 12, 30, tzinfo=dt.UTC),
        dt.datetime(2025, 1, 2, tzinfo=dt.UTC),
        dt.timedelta(hours=3),
    )
    return pl.concat([a, b])


@pytest.mark.parametrize("zone", ZONES)
@pytest.mark.parametrize(
    "unit,levels",
    [
        ("1h", ["1h"]),
        ("1d", ["1h", "1d"]),
        ("1w", ["1h", "1d", "1w"]),
        ("1mo", ["1h", "1d", "1mo"]),
    ],
)
def test_bin_counts_equal_zoneinfo_reference(
    tmp_path: Path, year_events: pl.DataFrame, zone: str, unit: str, levels: list[str]
) -> None:
    expected = Counter(ref_bin_start(t, unit, zone) for t in year_events["t"].to_list())
    got = _bins(_payload(_recipe(tmp_path, year_events, levels, zone), unit))
    diff = {
        k: (got.get(k), expected.get(k))
        for k in set(got) | set(expected)
        if got.get(k) != expected.get(k)
    }
    assert not diff, f"{len(diff)} bins differ, e.g. " + ", ".join(
        f"{dt.datetime.fromtimestamp(k, ZoneInfo(zone))}: got {g}, expected {e}"
        for k, (g, e) in sorted(diff.items())[:4]
    )


# --------------------------------------------------------------------------------------------
# Hour bins on DST-change days: every event lies inside the bin it is counted in
# --------------------------------------------------------------------------------------------

# (zone, local date of a 2024 DST change), read from zoneinfo. Lord Howe shifts by 30
# minutes; Chatham (UTC+12:45 / +13:45) changes at 02:45 standard time, so on 2024-09-29 the
# local hour 03 exists only from 03:45 to 04:00.
DST_DAYS = [
    (NY, (2024, 3, 10)),
    (NY, (2024, 11, 3)),
    ("Europe/London", (2024, 3, 31)),
    ("Europe/London", (2024, 10, 27)),
    ("Australia/Lord_Howe", (2024, 4, 7)),
    ("Australia/Lord_Howe", (2024, 10, 6)),
    ("Pacific/Chatham", (2024, 4, 7)),
    ("Pacific/Chatham", (2024, 9, 29)),
    ("America/Havana", (2024, 3, 10)),
    ("America/Havana", (2024, 11, 3)),
]


@pytest.mark.parametrize("zone,day", DST_DAYS, ids=[f"{z}-{d[1]}-{d[2]}" for z, d in DST_DAYS])
def test_every_event_lies_inside_its_hour_bin_on_dst_days(
    tmp_path: Path, zone: str, day: tuple[int, int, int]
) -> None:
    # A bin holds events of one local wall-clock hour: its start is at or before each of its
    # events and on the same local date and hour. (Where part of an hour repeats, e.g. Lord
    # Howe's 30-minute change, a bin can hold more than 60 minutes of events.)
    z = ZoneInfo(zone)
    start = dt.datetime(*day, tzinfo=z).astimezone(dt.UTC) - dt.timedelta(hours=2)
    times = [start + dt.timedelta(minutes=5 * i) for i in range(12 * 28)]
    events = pl.DataFrame(
        {
            "t": pl.Series(times, dtype=pl.Datetime("us", "UTC")),
            "pid": [f"e{i:04d}" for i in range(len(times))],
        }
    )
    path = write_case(
        tmp_path,
        events,
        source={"time": "t"},
        group={"time": {"bin": "1h", "zone": zone}, "category": {"column": "pid"}},
        measures={"n": "count"},
    )
    cols = _payload(path, "1h")["columns"]
    pids = cols["pid"]
    assert len(pids) == len(times)
    bad = []
    for s, pid in zip(cols["time"], pids):
        ev = times[int(pid[1:])]
        loc_s, loc_e = dt.datetime.fromtimestamp(s, z), ev.astimezone(z)
        if not (s <= ev.timestamp() and (loc_s.date(), loc_s.hour) == (loc_e.date(), loc_e.hour)):
            bad.append(f"event {loc_e} in bin {loc_s}")
    assert not bad, f"{len(bad)} events outside their bin, e.g. {bad[:3]}"
