"""Property tests (hypothesis): conservation under pruning, accounting, exact distinct counts.

Each property is checked against an independent computation in plain Python over the raw
rows (filters with SQL null semantics, H3 cells from the ``h3`` bindings, day bins from the
UTC date), not against the package's own helpers. Example counts are sized so the file runs
in well under a minute.
"""

from __future__ import annotations

import datetime as dt
import math
import tempfile
from collections import Counter, defaultdict
from pathlib import Path
from typing import Any

import h3
import polars as pl
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

import reduce
from reduce import aggregate, prune
from reduce.recipe import parse_time_bin
from tests._builders import fit_payload, scan, write_case

SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])

REGIONS = ["r1", "r2", "r3"]
KINDS = ["a", "b", "c", "d", "e", "f", "g"]

row = st.tuples(
    st.sampled_from(REGIONS),
    st.sampled_from(KINDS),
    st.one_of(st.none(), st.integers(-50, 500)),  # y
    st.one_of(st.none(), st.integers(0, 12)),
)  # who
rows_st = st.lists(row, min_size=1, max_size=80)


def _frame(rows: list[tuple[Any, ...]]) -> pl.DataFrame:
    region, kind, y, who = zip(*rows)
    return pl.DataFrame(
        {
            "region": list(region),
            "kind": list(kind),
            "y": pl.Series(list(y), dtype=pl.Int64),
            "who": pl.Series(list(who), dtype=pl.Int64),
        }
    )


MEASURES = {"n": "count", "s": {"sum": "y"}, "d": {"distinct": "who"}, "hi": {"max": "y"}}


def _totals(final: pl.DataFrame, by: list[str]) -> dict[tuple[Any, ...], tuple[int, int]]:
    """Per group: (sum of counts, sum of sums with nulls as 0)."""
    out: dict[tuple[Any, ...], list[int]] = defaultdict(lambda: [0, 0])
    for r in final.to_dicts():
        t = out[tuple(r[c] for c in by)]
        t[0] += r["n"]
        t[1] += r["s"] or 0
    return {k: (a, b) for k, (a, b) in out.items()}


# --------------------------------------------------------------------------------------------
# top-k + remainder
# --------------------------------------------------------------------------------------------


@SETTINGS
@given(rows=rows_st, k=st.integers(1, 5), within=st.sampled_from([["region"], []]))
def test_top_k_with_remainder_conserves_each_groups_count_and_sum(
    rows: list[tuple[Any, ...]], k: int, within: list[str]
) -> None:
    with tempfile.TemporaryDirectory() as d:
        path = write_case(
            Path(d),
            _frame(rows),
            group={"region": {"column": "region"}, "category": {"column": "kind"}},
            measures=MEASURES,
            prune={"top": {"k": [k], "by": "n", "within": within, "rest": "rest"}},
        )
        recipe = reduce.load_recipe(path)
        p = scan(recipe)
        before = aggregate.finalize(recipe, p)
        after = aggregate.finalize(recipe, prune.top_k(recipe, p, k))
    by = ["region"] if within else []
    assert _totals(after, by) == _totals(before, by)
    # Independent: per group (within), per category, the raw count; the kept categories are
    # the k largest by count, ties broken by label; the rest row's distinct count is the
    # number of distinct non-null values over all folded rows.
    groups: dict[tuple[Any, ...], Counter[str]] = defaultdict(Counter)
    for region, kind, _, _ in rows:
        groups[(region,) if within else ()][kind] += 1
    for g, cnt in groups.items():
        ranked = sorted(cnt, key=lambda c: (-cnt[c], c))
        kept, folded = set(ranked[:k]), set(ranked[k:])
        in_group = [r for r in after.to_dicts() if tuple(r[c] for c in by) == g]
        assert {r["kind"] for r in in_group} - {"rest"} <= kept
        rest_rows = [r for r in in_group if r["kind"] == "rest"]
        if not folded:
            assert not rest_rows
            continue
        want_n = sum(cnt[c] for c in folded)
        assert sum(r["n"] for r in rest_rows) == want_n
        if not within:
            continue  # without `within`, each region keeps its own rest row
        (rest,) = rest_rows
        folded_who = {
            w for reg, kind, _, w in rows if (reg,) == g and kind in folded and w is not None
        }
        assert rest["d"] == len(folded_who)


# --------------------------------------------------------------------------------------------
# min-count suppression
# --------------------------------------------------------------------------------------------


@SETTINGS
@given(rows=rows_st, threshold=st.integers(1, 8), by=st.sampled_from([None, "d"]))
def test_suppression_never_adds_rows_or_increases_counts(
    rows: list[tuple[Any, ...]], threshold: int, by: str | None
) -> None:
    mc: Any = threshold if by is None else {"min": threshold, "by": by}
    with tempfile.TemporaryDirectory() as d:
        path = write_case(
            Path(d),
            _frame(rows),
            group={"region": {"column": "region"}, "category": {"column": "kind"}},
            measures=MEASURES,
            prune={"min_count": mc},
        )
        recipe = reduce.load_recipe(path)
        p = scan(recipe)
        before = aggregate.finalize(recipe, p)
        kept_p, sup_rows, sup_cells = prune.suppress(recipe, p)
        after = aggregate.finalize(recipe, kept_p)
    assert after.height <= before.height
    old = {(r["region"], r["kind"]): r for r in before.to_dicts()}
    for r in after.to_dicts():
        assert r == old[(r["region"], r["kind"])]  # unchanged, in particular its count
    # Independent: a cell is suppressed iff its raw count (or distinct who) is below threshold.
    cells: dict[tuple[str, str], list[tuple[Any, ...]]] = defaultdict(list)
    for rw in rows:
        cells[(rw[0], rw[1])].append(rw)

    def size(rs: list[tuple[Any, ...]]) -> int:
        return len(rs) if by is None else len({r[3] for r in rs if r[3] is not None})

    small = {c for c, rs in cells.items() if size(rs) < threshold}
    assert {(r["region"], r["kind"]) for r in after.to_dicts()} == set(cells) - small
    assert sup_cells == len(small)
    assert sup_rows == sum(len(cells[c]) for c in small)
    assert int(before["n"].sum()) - int(after["n"].sum() or 0) == sup_rows


@SETTINGS
@given(rows=rows_st, threshold=st.integers(1, 8), k=st.integers(1, 4))
def test_folding_suppression_never_adds_rows_and_keeps_non_rest_cells(
    rows: list[tuple[Any, ...]], threshold: int, k: int
) -> None:
    with tempfile.TemporaryDirectory() as d:
        path = write_case(
            Path(d),
            _frame(rows),
            group={"region": {"column": "region"}, "category": {"column": "kind"}},
            measures=MEASURES,
            prune={
                "top": {"k": [k], "by": "n", "within": ["region"], "rest": "rest"},
                "min_count": {"min": threshold, "fold": True},
            },
        )
        recipe = reduce.load_recipe(path)
        p = prune.top_k(recipe, scan(recipe), k)
        before = aggregate.finalize(recipe, p)
        kept_p, sup_rows, _ = prune.suppress(recipe, p)
        after = aggregate.finalize(recipe, kept_p)
    assert after.height <= before.height
    old = {(r["region"], r["kind"]): r for r in before.to_dicts()}
    for r in after.to_dicts():
        assert r["n"] >= threshold
        if r["kind"] != "rest":
            assert r == old[(r["region"], r["kind"])]
    # Per region, what is not represented any more was suppressed: nothing appears or vanishes.
    b, a = _totals(before, ["region"]), _totals(after, ["region"])
    lost = sum(b[g][0] - a.get(g, (0, 0))[0] for g in b)
    assert all(a.get(g, (0, 0))[0] <= b[g][0] for g in b)
    assert lost == sup_rows


# --------------------------------------------------------------------------------------------
# Accounting identity, with random filters and random invalid rows
# --------------------------------------------------------------------------------------------

T0 = dt.datetime(2024, 3, 1, tzinfo=dt.UTC)

# Valid, valid-at-the-edge (|lat| = 90, |lon| = 180 are valid), null, NaN and out of range.
coord_lat = st.one_of(
    st.floats(-89.0, 89.0),
    st.sampled_from([90.0, -90.0]),
    st.none(),
    st.just(math.nan),
    st.sampled_from([90.5, -95.0, 1e9]),
)
coord_lon = st.one_of(
    st.floats(-179.0, 179.0),
    st.sampled_from([180.0, -180.0]),
    st.none(),
    st.just(math.nan),
    st.sampled_from([180.01, -200.0, math.inf]),
)
event = st.tuples(
    coord_lat,
    coord_lon,
    st.one_of(st.none(), st.integers(0, 4 * 86400 - 1)),  # seconds after T0, or null time
    st.one_of(st.none(), st.sampled_from(KINDS[:4])),  # kind (null: invalid key)
    st.one_of(st.none(), st.integers(-10, 40)),  # y
)
filter_st = st.lists(
    st.one_of(
        st.builds(
            lambda v: {"column": "kind", "in": sorted(v)},
            st.sets(st.sampled_from(KINDS[:4]), min_size=1),
        ),
        st.builds(
            lambda v: {"column": "kind", "not_in": sorted(v)},
            st.sets(st.sampled_from(KINDS[:4]), min_size=1),
        ),
        st.builds(
            lambda lo, w: {"column": "y", "min": lo, "max": lo + w},
            st.integers(-10, 40),
            st.integers(0, 30),
        ),
        st.builds(lambda lo: {"column": "y", "min": lo}, st.integers(-10, 40)),
        st.builds(lambda b: {"column": "y", "null": b}, st.booleans()),
    ),
    max_size=3,
)


def _passes(f: dict[str, Any], kind: str | None, y: int | None) -> bool:
    """SQL semantics: a null value fails in, not_in and range tests."""
    v = kind if f["column"] == "kind" else y
    if "null" in f:
        return (v is None) == f["null"]
    if v is None:
        return False
    if "in" in f:
        return v in f["in"]
    if "not_in" in f:
        return v not in f["not_in"]
    return (f.get("min") is None or v >= f["min"]) and (f.get("max") is None or v <= f["max"])


def _valid(x: float | None, limit: float) -> bool:
    return x is not None and not math.isnan(x) and abs(x) <= limit


EDGE_CASES = [
    (90.0, 180.0, 0, "a", 1),
    (-90.0, -180.0, 3600, "b", None),
    (90.5, 0.0, 0, "a", 1),
    (0.0, -200.0, 0, "a", 1),
    (None, 1.0, 0, "a", 1),
    (math.nan, 1.0, 0, "a", 1),
    (1.0, math.inf, 0, "a", 1),
    (1.0, 1.0, None, "a", 1),
    (1.0, 1.0, 0, None, 1),
    (1.0, 1.0, 0, "a", None),
    (1.0, 1.0, 60, "a", 7),
]


@SETTINGS
@given(
    events=st.lists(event, min_size=3, max_size=60),
    filters=filter_st,
    threshold=st.one_of(st.none(), st.integers(1, 4)),
)
@example(events=EDGE_CASES, filters=[], threshold=None)
@example(events=EDGE_CASES, filters=[{"column": "y", "min": 0}], threshold=2)
def test_accounting_identity_with_random_filters_and_invalid_rows(
    events: list[tuple[Any, ...]], filters: list[dict[str, Any]], threshold: int | None
) -> None:
    lat, lon, secs, kind, y = zip(*events)
    df = pl.DataFrame(
        {
            "lat": pl.Series(lat, dtype=pl.Float64),
            "lon": pl.Series(lon, dtype=pl.Float64),
            "t": pl.Series(
                [None if s is None else T0 + dt.timedelta(seconds=s) for s in secs],
                dtype=pl.Datetime("us", "UTC"),
            ),
            "kind": pl.Series(kind, dtype=pl.String),
            "y": pl.Series(y, dtype=pl.Int64),
        }
    )
    # Independent computation over the raw rows.
    filtered = invalid = 0
    groups: Counter[tuple[Any, ...]] = Counter()
    for la, lo, s, k, yy in events:
        if not all(_passes(f, k, yy) for f in filters):
            filtered += 1
        elif not (_valid(la, 90.0) and _valid(lo, 180.0)) or s is None or k is None:
            invalid += 1
        else:
            groups[(h3.latlng_to_cell(la, lo, 4), s // 86400, k)] += 1
    with tempfile.TemporaryDirectory() as d:
        path = write_case(
            Path(d),
            df,
            source={"time": "t", "lat": "lat", "lon": "lon", "filter": filters},
            group={
                "hex": {"resolution": 4},
                "time": {"bin": "1d", "zone": "UTC"},
                "category": {"column": "kind"},
            },
            measures={"n": "count", "s": {"sum": "y"}},
            prune=None if threshold is None else {"min_count": threshold},
        )
        try:
            payload = fit_payload(path)
        except reduce.SourceError as e:
            # A run may refuse a source of which no valid row is left, naming the cause;
            # it must not refuse one that still has valid rows.
            assert not groups, f"refused a source with {sum(groups.values())} valid rows: {e}"
            assert "filter" in str(e) or "invalid" in str(e), str(e)
            return
    acc = payload["accounting"]
    suppressed = sum(n for n in groups.values() if threshold is not None and n < threshold)
    represented = sum(groups.values()) - suppressed
    assert acc == {
        "input_rows": len(events),
        "filtered_rows": filtered,
        "invalid_rows": invalid,
        "suppressed_rows": suppressed,
        "represented_rows": represented,
    }
    assert acc["input_rows"] == (
        acc["filtered_rows"]
        + acc["invalid_rows"]
        + acc["suppressed_rows"]
        + acc["represented_rows"]
    )
    # The count measure sums to the represented rows.
    assert sum(payload["columns"]["n"]) == acc["represented_rows"]
    assert payload["rows"] == sum(1 for n in groups.values() if threshold is None or n >= threshold)


# --------------------------------------------------------------------------------------------
# Distinct counts after roll-up
# --------------------------------------------------------------------------------------------

visit = st.tuples(
    st.integers(0, 3 * 86400 - 1),
    st.sampled_from(REGIONS),
    st.one_of(st.none(), st.integers(0, 15)),
    st.floats(10.0, 10.3),
    st.floats(20.0, 20.3),
)


@SETTINGS
@given(visits=st.lists(visit, min_size=1, max_size=80))
def test_distinct_after_rollup_equals_direct_distinct_not_sum_of_children(
    visits: list[tuple[Any, ...]],
) -> None:
    secs, region, who, lat, lon = zip(*visits)
    df = pl.DataFrame(
        {
            "t": pl.Series(
                [T0 + dt.timedelta(seconds=s) for s in secs], dtype=pl.Datetime("us", "UTC")
            ),
            "region": list(region),
            "who": pl.Series(who, dtype=pl.Int64),
            "lat": list(lat),
            "lon": list(lon),
        }
    )
    with tempfile.TemporaryDirectory() as d:
        path = write_case(
            Path(d),
            df,
            source={"time": "t", "lat": "lat", "lon": "lon"},
            group={
                "hex": {"levels": [9, 6]},
                "time": {"levels": ["1h", "1d"], "zone": "UTC"},
                "region": {"column": "region"},
            },
            measures={"n": "count", "d": {"distinct": "who"}},
        )
        recipe = reduce.load_recipe(path)
        p = scan(recipe)
    up = aggregate.rollup(recipe, p, hex_res=6, time_bin=parse_time_bin("1d"))
    got = {
        (int(r["time"].timestamp()), h3.int_to_str(r["hex"]), r["region"]): r["d"]
        for r in aggregate.finalize(recipe, up).to_dicts()
    }
    # Direct: distinct non-null who per (UTC day, res-6 cell indexed directly, region).
    direct: dict[tuple[Any, ...], set[int]] = defaultdict(set)
    for s, reg, w, la, lo in visits:
        key = (
            int((T0 + dt.timedelta(seconds=s - s % 86400)).timestamp()),
            h3.latlng_to_cell(la, lo, 6),
            reg,
        )
        direct[key]  # every group exists, even with only null values
        if w is not None:
            direct[key].add(w)
    assert got == {k: len(v) for k, v in direct.items()}
    # Across regions too (dropping a key merges the value sets, not the counts).
    merged = aggregate.finalize(recipe, aggregate.regroup(recipe, up, [], ["time"]))
    by_day: dict[int, set[int]] = defaultdict(set)
    for (day, _, _), v in direct.items():
        by_day[day] |= v
    assert {int(r["time"].timestamp()): r["d"] for r in merged.to_dicts()} == {
        k: len(v) for k, v in by_day.items()
    }
