"""Roll-up equals rescan: every coarser level derived from the finest partial equals a direct
scan of the source at that level, for every measure kind (count, sum, min, max, mean,
distinct), on seeded random data.

Hex levels are exact: a coarser level counts each point in the cell that contains it at that
resolution (``h3.latlng_to_cell``), not in the H3 parent of its finest cell. H3 children are
not exactly contained in their parent (H3 docs on hierarchical non-containment, from memory),
so the two differ near cell edges; the data here is not filtered, and a separate test checks
against the ``h3`` bindings that the roll-up follows direct indexing where parents do not.
"""

from __future__ import annotations

import datetime as dt
import math
from collections import Counter
from itertools import product
from pathlib import Path

import h3
import numpy as np
import polars as pl
import pytest

import reduce
from reduce import aggregate
from reduce.recipe import Recipe, parse_time_bin
from tests._builders import random_events, scan, write_case

ZONE = "America/New_York"
MEASURES = {
    "n": "count",
    "sx": {"sum": "x"},
    "sy": {"sum": "y"},
    "lo_x": {"min": "x"},
    "lo_y": {"min": "y"},
    "hi_x": {"max": "x"},
    "hi_y": {"max": "y"},
    "mean_x": {"mean": "x"},
    "mean_y": {"mean": "y"},
    "d": {"distinct": "who"},
}
APPROX = {"sx", "mean_x", "mean_y"}  # float sums: summation order differs between paths
HEX_LEVELS = [9, 8, 6]
TIME_LADDERS = [["15m", "1h", "1d", "1w"], ["1h", "1d", "1mo"]]


def _not_nested(df: pl.DataFrame, fine: int, coarser: list[int]) -> int:
    """Points whose finest cell's H3 parent differs from the cell indexed directly at some
    coarser resolution (h3 bindings)."""
    return sum(
        any(
            h3.cell_to_parent(h3.latlng_to_cell(la, lo, fine), r) != h3.latlng_to_cell(la, lo, r)
            for r in coarser
        )
        for la, lo in df.select("lat", "lon").iter_rows()
    )


def _data(seed: int) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    # Six weeks across the 2024 spring DST change of the recipe's zone; small area so cells
    # hold several events; a few nulls in every measure column.
    df = random_events(
        rng,
        3000,
        start=dt.datetime(2024, 2, 20, tzinfo=dt.UTC),
        span_days=42,
        lat=(40.60, 40.75),
        lon=(-74.05, -73.90),
        null_fraction=0.1,
        who=25,
    )
    return df


def _recipe(
    folder: Path,
    hex_levels: list[int],
    time_levels: list[str],
    *,
    events: pl.DataFrame | None,
    name: str,
) -> Recipe:
    path = write_case(
        folder,
        events,
        source={"time": "t", "lat": "lat", "lon": "lon"},
        group={
            "hex": {"levels": hex_levels},
            "time": {"levels": time_levels, "zone": ZONE},
            "region": {"column": "region"},
            "category": {"column": "kind"},
        },
        measures=MEASURES,
        name=name,
        recipe_file=f"{name}.toml",
    )
    return reduce.load_recipe(path)


def _assert_same(got: pl.DataFrame, want: pl.DataFrame, keys: list[str], where: str) -> None:
    assert got.columns == want.columns, where
    assert got.height == want.height, f"{where}: {got.height} rows vs {want.height}"
    g, w = got.sort(keys), want.sort(keys)
    assert g.select(keys).equals(w.select(keys)), f"{where}: keys differ"
    for m in ["__n", *MEASURES]:
        a, b = g.get_column(m).to_list(), w.get_column(m).to_list()
        if m in APPROX:
            bad = [
                (i, x, y)
                for i, (x, y) in enumerate(zip(a, b))
                if (x is None) != (y is None)
                or (x is not None and not math.isclose(x, y, rel_tol=1e-9, abs_tol=1e-9))
            ]
        else:
            bad = [(i, x, y) for i, (x, y) in enumerate(zip(a, b)) if x != y]
        assert not bad, f"{where}: measure {m} differs at {len(bad)} rows, e.g. {bad[:3]}"


@pytest.mark.parametrize("time_levels", TIME_LADDERS, ids=["to-weeks", "to-months"])
@pytest.mark.parametrize("seed", [11, 12, 13])
def test_rollup_equals_rescan_at_every_coarser_level(
    tmp_path: Path, seed: int, time_levels: list[str]
) -> None:
    events = _data(seed)
    # Points whose H3 parents are not their coarser cells are kept: the check has teeth.
    assert _not_nested(events, HEX_LEVELS[0], HEX_LEVELS[1:]) > 0
    finest = _recipe(tmp_path, HEX_LEVELS, time_levels, events=events, name="finest")
    p = scan(finest)
    keys = list(p.keys)
    checked = 0
    for (hi, h), (ti, t) in product(enumerate(HEX_LEVELS), enumerate(time_levels)):
        if hi == 0 and ti == 0:
            continue
        up = aggregate.rollup(finest, p, hex_res=h, time_bin=parse_time_bin(t))
        # The rescan recipe's finest level is this level (its ladder starts there).
        direct_recipe = _recipe(
            tmp_path, HEX_LEVELS[hi:], time_levels[ti:], events=None, name=f"direct-{h}-{t}"
        )
        direct = scan(direct_recipe)
        assert direct.hex_res == h and direct.time_bin == parse_time_bin(t)
        _assert_same(
            aggregate.finalize(finest, up),
            aggregate.finalize(direct_recipe, direct),
            keys,
            f"hex {h}, time {t}",
        )
        checked += 1
    assert checked == len(HEX_LEVELS) * len(time_levels) - 1


def test_rollups_compose(tmp_path: Path) -> None:
    # 9 -> 8 -> 6 and 15m -> 1h -> 1d step by step equals 9 -> 6 and 15m -> 1d in one step.
    events = _data(21)
    r = _recipe(tmp_path, HEX_LEVELS, TIME_LADDERS[0], events=events, name="steps")
    p = scan(r)
    step = aggregate.rollup(r, p, hex_res=8, time_bin=parse_time_bin("1h"))
    step = aggregate.rollup(r, step, hex_res=6, time_bin=parse_time_bin("1d"))
    once = aggregate.rollup(r, p, hex_res=6, time_bin=parse_time_bin("1d"))
    _assert_same(
        aggregate.finalize(r, step),
        aggregate.finalize(r, once),
        list(p.keys),
        "stepwise vs one step",
    )


@pytest.mark.parametrize("shift", [0, 13, 1000])
def test_merged_partials_of_two_files_equal_the_partial_of_both(tmp_path: Path, shift: int) -> None:
    # The mergeable-partial contract: partial(A) merged with partial(B) = partial(A ∪ B).
    # ``shift`` moves the distinct values of B so the two files hold the same values
    # (0), overlapping ones (13) or disjoint ones (1000).
    events = _data(31)
    half = events.height // 2
    first = events.head(half)
    second = events.tail(-half).with_columns(pl.col("who") + shift)
    a = _recipe(tmp_path / "a", HEX_LEVELS, TIME_LADDERS[0], events=first, name="part")
    b = _recipe(tmp_path / "b", HEX_LEVELS, TIME_LADDERS[0], events=second, name="part")
    both = _recipe(
        tmp_path / "ab", HEX_LEVELS, TIME_LADDERS[0], events=pl.concat([first, second]), name="part"
    )
    merged = aggregate.merge(a, scan(a), scan(b))
    whole = scan(both)
    _assert_same(
        aggregate.finalize(a, merged),
        aggregate.finalize(both, whole),
        list(whole.keys),
        "merged vs whole",
    )
    assert merged.accounting.input_rows == whole.accounting.input_rows == events.height
    # Rolled up after merging, too (the coarsest level mixes the most groups of A and B).
    up_m = aggregate.rollup(a, merged, hex_res=6, time_bin=parse_time_bin("1w"))
    up_w = aggregate.rollup(both, whole, hex_res=6, time_bin=parse_time_bin("1w"))
    _assert_same(
        aggregate.finalize(a, up_m),
        aggregate.finalize(both, up_w),
        list(whole.keys),
        "merged then rolled up vs whole rolled up",
    )


def test_hex_rollup_counts_each_point_in_its_direct_cell_not_its_parent(tmp_path: Path) -> None:
    # Reference: h3 bindings. On all points, the roll-up to resolution 6 counts each point in
    # latlng_to_cell(p, 6), as a direct scan at resolution 6 does, and not in
    # cell_to_parent(latlng_to_cell(p, 9), 6) where the two differ.
    rng = np.random.default_rng(41)
    events = random_events(rng, 4000, lat=(40.60, 40.75), lon=(-74.05, -73.90))
    path = write_case(
        tmp_path,
        events,
        source={"lat": "lat", "lon": "lon"},
        group={"hex": {"levels": [9, 6]}},
        measures={"n": "count"},
        name="fine",
    )
    fine = reduce.load_recipe(path)
    direct_path = write_case(
        tmp_path,
        None,
        source={"lat": "lat", "lon": "lon"},
        group={"hex": {"resolution": 6}},
        measures={"n": "count"},
        name="coarse",
        recipe_file="coarse.toml",
    )
    coarse = reduce.load_recipe(direct_path)

    def counts(r: Recipe, p: aggregate.Partial) -> dict[str, int]:
        return {
            h3.int_to_str(c): n for c, n in aggregate.finalize(r, p).select("hex", "n").iter_rows()
        }

    rolled = counts(fine, aggregate.rollup(fine, scan(fine), hex_res=6, time_bin=None))
    rescanned = counts(coarse, scan(coarse))
    pts = events.select("lat", "lon").rows()
    direct = dict(Counter(h3.latlng_to_cell(la, lo, 6) for la, lo in pts))
    parents = dict(Counter(h3.cell_to_parent(h3.latlng_to_cell(la, lo, 9), 6) for la, lo in pts))
    assert parents != direct  # parents are wrong for some points of this data
    assert rolled == rescanned == direct
    assert sum(rolled.values()) == len(pts)
