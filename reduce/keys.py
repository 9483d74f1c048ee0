"""Grouping keys: hex cells, time bins, regions and categories as polars expressions.

This module owns how each key is computed from the source columns at the *finest* level of
its ladder, which rows are invalid for a key (and why), and how a finest key maps to a coarser
level during roll-up (exact cells of coarser resolutions, wider time bins). Keys are named
``hex``, ``time``, the region column's name and the category columns' names.

Invalid rows are never dropped silently: each row gets a reason code, and the aggregate stage
counts rows per code.

- hex cells are H3 indexes (``UInt64`` inside, 15-character strings in payloads) computed with
  polars-h3, vectorized; coordinates that are null, NaN or out of range (|lat| > 90,
  |lon| > 180) make the row invalid before indexing, since the indexer returns a cell for them.
- Every hex level is exact: a point counts in the cell that contains it at that resolution
  (what ``h3.latlng_to_cell`` gives), not in the H3 parent of its finest cell, because parents
  do not contain their children (a point near a coarse cell's edge can lie in the neighbour of
  its finest cell's parent). The scan therefore finds each point's cell at every resolution
  of the ladder: the finest cell is the ``hex`` key, the coarser ones ride along as hidden key
  columns ``__hex<r>`` (see :func:`hidden_hex`), and a roll-up to resolution ``r`` takes its
  cell from ``__hex<r>``. :func:`scan_keys` indexes every point at every resolution; on large
  sources the scan instead confirms most points inside their finest cell's parent by
  geometry and indexes the rest again (:mod:`reduce.cells`), with the same cells. A finest group rarely splits on them (only where its cell straddles
  a coarser cell's edge), so the partial barely grows.
- time bins are the start of the bin in the declared IANA zone, truncated on the local clock
  so a day bin starts at local midnight across DST changes and a week bin on Monday
  (ISO 8601). In payloads a bin is its start as integer epoch seconds (UTC).
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import polars as pl
import polars_h3 as plh3

from reduce.contract import Invalid
from reduce.errors import SourceError
from reduce.recipe import Recipe, TimeBin

HEX = "hex"
TIME = "time"
INVALID = "__invalid"
_HIDDEN_HEX = "__hex"


def hidden_hex(res: int) -> str:
    """The hidden key column holding each point's exact cell at resolution ``res``."""
    return f"{_HIDDEN_HEX}{res}"


def is_hidden(name: str) -> bool:
    """Whether a column is a hidden exact-cell key (see the module docstring)."""
    return name.startswith(_HIDDEN_HEX) and name[len(_HIDDEN_HEX) :].isdigit()


def hidden_below(recipe: Recipe, res: int | None) -> list[str]:
    """The hidden cell columns a partial at hex resolution ``res`` keeps (None: the finest):
    those of the ladder's coarser resolutions, so that it can still be rolled up exactly."""
    if not recipe.hex:
        return []
    top = recipe.hex.levels[0] if res is None else res
    return [hidden_hex(r) for r in recipe.hex.levels[1:] if r < top]


# Reason codes of invalid rows, reported in manifests (the contract: reduce.contract).
VALID = Invalid.VALID

_AWARE_RE = re.compile(r"(Z|[+-]\d\d:?\d\d)$")


def _time_expr(recipe: Recipe, lf: pl.LazyFrame, label: str) -> pl.Expr:
    """The event time as a zone-aware datetime on the recipe's clock (group.time.zone)."""
    assert recipe.time is not None and recipe.source.time is not None
    col = recipe.source.time
    zone = recipe.time.zone
    naive = recipe.source.naive_zone
    dtype = lf.collect_schema()[col]
    e = pl.col(col)
    if dtype == pl.String:
        e, dtype = parse_time_text(lf, col, label)
    if isinstance(dtype, pl.Date):
        return e.cast(pl.Datetime("us")).dt.replace_time_zone(
            zone, ambiguous="earliest", non_existent="null"
        )
    if isinstance(dtype, pl.Datetime) and dtype.time_zone is None:
        e = e.dt.replace_time_zone(naive, ambiguous="earliest", non_existent="null")
    return e.dt.convert_time_zone(zone)


# Text that looks like an ISO 8601 date or date-time; anything else ("n/a", "-", "unknown")
# cannot be read as a time and makes its row invalid (reason "time").
_TIMELIKE_RE = re.compile(r"^\d{4}-\d\d-\d\d")
_DATE_ONLY_RE = re.compile(r"^\d{4}-\d\d-\d\d$")


def parse_time_text(lf: pl.LazyFrame, col: str, label: str) -> tuple[pl.Expr, pl.DataType]:
    """ISO 8601 text as datetimes: UTC instants when the text carries offsets, naive wall
    times otherwise. Text that cannot be read as a time gives null (an invalid row, reason
    "time"), never an error; text mixing offsets and none is an error."""
    sample = (
        lf.select(pl.col(col)).drop_nulls().head(10000).collect().get_column(col).str.strip_chars()
    )
    sample = sample.filter(sample.str.contains(_TIMELIKE_RE.pattern))
    aware = sample.str.contains(_AWARE_RE.pattern)
    n_aware = int(aware.sum())
    if 0 < n_aware < len(sample):
        raise SourceError(
            f"{label}: column {col!r} (source.time) mixes timestamps with a zone and "
            f"without one (e.g. {sample.filter(aware)[0]!r} and "
            f"{sample.filter(~aware)[0]!r}); write them all with an offset or all without"
        )
    text = pl.col(col).str.strip_chars()
    text = pl.when(text.str.contains(_TIMELIKE_RE.pattern)).then(text)
    if len(sample) and bool(sample.str.contains(_DATE_ONLY_RE.pattern).all()):
        # dates alone stay dates: their days are read on the grouping clock, as a date
        # column's are
        return text.str.to_date("%Y-%m-%d", strict=False), pl.Date()
    if n_aware:
        return (
            text.str.to_datetime(time_zone="UTC", strict=False, time_unit="us"),
            pl.Datetime("us", "UTC"),
        )
    return text.str.to_datetime(strict=False, time_unit="us"), pl.Datetime("us")


def parse_coordinate_text(col: str) -> pl.Expr:
    """Coordinates read from text: a value that is not a number gives null (an invalid row,
    reason "coordinates"), like an out-of-range one."""
    return pl.col(col).cast(pl.String).str.strip_chars().cast(pl.Float64, strict=False)


def _fixed_offset(zone: str) -> bool:
    """Zones whose offset never changes (UTC and the IANA ``Etc/`` zones)."""
    return zone in ("UTC", "GMT", "UCT", "Zulu", "Universal", "Greenwich") or zone.startswith(
        "Etc/"
    )


def truncate(expr: pl.Expr, b: TimeBin, zone: str) -> pl.Expr:
    """The start of the bin of width ``b`` on the local clock of ``zone``.

    Sub-day bins truncate the local wall time. Day, week, month and year bins are computed
    from the local calendar date, and start at the first instant of that date: where local
    midnight happens twice (a DST change at midnight) the earlier one, where it does not
    happen at all the first local time that exists (00:30 or 01:00).
    """
    if _fixed_offset(zone):
        # No DST and no offset changes: wall-clock truncation is exact (weeks on Monday).
        return expr.dt.truncate(b.text)
    if b.unit in ("m", "h"):
        start = expr.dt.truncate(b.text)
        # Where the bin's wall-clock start falls in a DST gap, truncate reads it with the
        # offset from before the gap, which can land after the event (Pacific/Chatham,
        # 2024-09-29: an event at 03:45 +13:45 gets 04:00 +13:45). The bin then starts at the
        # first of its wall times that exists (offsets change in steps of 15 minutes).
        wall = expr.dt.replace_time_zone(None).dt.truncate(b.text)
        firsts = [
            (wall + pl.duration(minutes=m)).dt.replace_time_zone(
                zone, ambiguous="earliest", non_existent="null"
            )
            for m in range(0, 121, 15)
        ]
        return pl.when(start > expr).then(pl.coalesce(firsts)).otherwise(start)
    day = expr.dt.date()
    if b.unit != "d":
        day = day.dt.truncate(b.text)
    midnight = day.cast(pl.Datetime("us"))
    starts = [
        (midnight + pl.duration(minutes=m)).dt.replace_time_zone(
            zone, ambiguous="earliest", non_existent="null"
        )
        for m in (0, 30, 60)
    ]
    return pl.coalesce(starts)


def _valid_coord(col: str, limit: float) -> pl.Expr:
    c = pl.col(col).cast(pl.Float64)
    return c.is_not_null() & ~c.is_nan() & (c.abs() <= limit)


def _boundaries(path: Path, id_property: str) -> Any:
    from reduce.maps import boundaries as geo

    return geo.load_boundaries(path, id_property)


def scan_keys(recipe: Recipe, lf: pl.LazyFrame, label: str) -> tuple[list[pl.Expr], pl.Expr | None]:
    """Key expressions at the finest level, and the invalid-reason code expression.

    Key expressions are null on invalid rows, so all invalid rows collapse into a few groups.
    Reasons are checked in order; the first failing check names the reason. When the only
    check is that no key is null (plain key columns: no coordinates, time or boundaries),
    the reason is None: the keys are used as they are, and a group with a null key is
    invalid for reason "key" (see :func:`reason_of_groups`), which saves a per-row test.
    """
    src = recipe.source
    checks: list[tuple[int, pl.Expr]] = []
    if recipe.needs_coordinates:
        assert src.lat is not None and src.lon is not None
        checks.append(
            (Invalid.COORDINATES, _valid_coord(src.lat, 90.0) & _valid_coord(src.lon, 180.0))
        )
    time_e = None
    if recipe.time:
        time_e = truncate(_time_expr(recipe, lf, label), recipe.time.levels[0], recipe.time.zone)
        checks.append((Invalid.TIME, time_e.is_not_null()))
    named: list[tuple[str, pl.Expr]] = []  # key name -> String expression (null = invalid)
    unassigned: list[pl.Expr] = []  # null = outside every polygon
    r = recipe.region
    if r is not None and r.source is not None:
        named.append((r.column, pl.col(r.source).cast(pl.String)))
    elif r is not None and r.boundaries is not None:
        from reduce.maps import boundaries as geo

        assert src.lat is not None and src.lon is not None and r.id_property is not None
        e = geo.assign_expr(src.lat, src.lon, _boundaries(r.boundaries, r.id_property))
        if r.outside is not None:
            e = e.fill_null(pl.lit(r.outside))
        else:
            unassigned.append(e)
        named.append((r.column, e))
    for c in recipe.category_sources:
        named.append((c, pl.col(c).cast(pl.String)))
    f = recipe.flow
    if f is not None:
        for end, name in ((f.origin, "origin"), (f.destination, "destination")):
            if end.column is not None:
                named.append((name, pl.col(end.column).cast(pl.String)))
                continue
            assert end.lat is not None and end.lon is not None
            checks.append(
                (Invalid.COORDINATES, _valid_coord(end.lat, 90.0) & _valid_coord(end.lon, 180.0))
            )
            if f.hex_res is not None:
                e = plh3.int_to_str(
                    plh3.latlng_to_cell(
                        pl.col(end.lat).cast(pl.Float64),
                        pl.col(end.lon).cast(pl.Float64),
                        f.hex_res,
                    )
                )
            else:
                from reduce.maps import boundaries as geo

                assert f.boundaries is not None and f.id_property is not None
                e = geo.assign_expr(end.lat, end.lon, _boundaries(f.boundaries, f.id_property))
                unassigned.append(e)
            named.append((name, e))
    if unassigned:
        checks.append(
            (Invalid.UNASSIGNED, pl.all_horizontal([u.is_not_null() for u in unassigned]))
        )
    if named:
        checks.append((Invalid.KEY, pl.all_horizontal([e.is_not_null() for _, e in named])))
    if [code for code, _ in checks] == [Invalid.KEY]:
        return [e.alias(name) for name, e in named], None
    reason = pl.lit(int(VALID), dtype=pl.UInt8)
    for code, ok in reversed(checks):
        reason = pl.when(~ok).then(pl.lit(int(code), dtype=pl.UInt8)).otherwise(reason)
    valid = reason == VALID
    keys: list[pl.Expr] = []
    if time_e is not None:
        keys.append(pl.when(valid).then(time_e).alias(TIME))
    if recipe.hex:
        assert src.lat is not None and src.lon is not None  # required with a hex key
        # Invalid rows get null coordinates, which the indexer passes over at no cost.
        lat = pl.when(valid).then(pl.col(src.lat).cast(pl.Float64))
        lon = pl.col(src.lon).cast(pl.Float64)
        for i, res in enumerate(recipe.hex.levels):
            cell = plh3.latlng_to_cell(lat, lon, res)
            keys.append(cell.alias(HEX if i == 0 else hidden_hex(res)))
    for name, e in named:
        keys.append(pl.when(valid).then(e).alias(name))
    return keys, reason.alias(INVALID)


def reason_of_groups(keys: list[str]) -> pl.Expr:
    """The invalid-reason code of groups keyed by plain key columns (see :func:`scan_keys`):
    "key" where any key is null."""
    return (
        pl.when(pl.any_horizontal([pl.col(k).is_null() for k in keys]))
        .then(pl.lit(int(Invalid.KEY), dtype=pl.UInt8))
        .otherwise(pl.lit(int(VALID), dtype=pl.UInt8))
        .alias(INVALID)
    )


def coarsen(
    recipe: Recipe,
    *,
    hex_res: int | None,
    time_bin: TimeBin | None,
    from_hex: int | None,
    from_time: TimeBin | None,
) -> list[pl.Expr]:
    """Expressions mapping key columns at one level to a coarser one (identity otherwise).

    A coarser hex level reads the exact cells kept in its hidden column (see
    :func:`hidden_hex`), so the frame mapped must hold it."""
    out: list[pl.Expr] = []
    if recipe.time and time_bin is not None and time_bin != from_time:
        assert recipe.time is not None
        out.append(truncate(pl.col(TIME), time_bin, recipe.time.zone).alias(TIME))
    if recipe.hex and hex_res is not None and hex_res != from_hex:
        out.append(pl.col(hidden_hex(hex_res)).alias(HEX))
    return out
