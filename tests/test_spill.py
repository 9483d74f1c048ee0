"""The spilled scan: a large source too sparse to shrink at the finest level has its keyed rows
written to a parquet file by a streaming pass, and every level is aggregated from that file;
a denser one is grouped in memory in one pass after its probe.

The reference here is the one-pass scan (itself checked against DuckDB and the ``h3``
bindings elsewhere): splitting must not change a single byte of any payload, nor the
accounting.
"""

from __future__ import annotations

import gc
import re
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest

import reduce
from reduce import aggregate, tables
from reduce.aggregate import Partial, Spilled
from reduce.budget import all_levels
from reduce.pipeline import Reducer
from tests._builders import random_events, write_case

MEASURES = {
    "n": "count",
    "sx": {"sum": "x"},
    "sy": {"sum": "y"},
    "mx": {"min": "x"},
    "my": {"max": "y"},
    "ax": {"mean": "x"},
}


def _sparse(tmp: Path, **kw: Any) -> Path:
    rng = np.random.default_rng(99)
    df = random_events(rng, 5000, span_days=20, null_fraction=0.1)
    # A few rows of each kind of invalid input, spread over the ranges.
    i = pl.int_range(pl.len())
    df = df.with_columns(
        pl.when(i % 397 == 5).then(None).otherwise(pl.col("lat")).alias("lat"),
        pl.when(i % 613 == 7).then(None).otherwise(pl.col("t")).alias("t"),
    )
    return write_case(
        tmp,
        df,
        source={"time": "t", "lat": "lat", "lon": "lon", **kw},
        group={
            "hex": {"levels": [10, 8, 6]},
            "time": {"levels": ["1h", "1d", "1w"], "zone": "Europe/Berlin"},
            "category": {"column": "kind"},
        },
        measures=MEASURES,
        prune={"top": {"k": [4, 2], "by": "n"}},
    )


@pytest.fixture
def cached_case(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> tuple[Path, Path]:
    """A sparse case that spills, with its own cache folder: (cache folder, recipe)."""
    cache = tmp_path / "cache"
    monkeypatch.setenv("REDUCE_CACHE_DIR", str(cache))
    monkeypatch.setenv("REDUCE_PROBE_ROWS", "1100")
    return cache, _sparse(tmp_path / "case")


def _payloads(recipe_path: Path) -> tuple[Reducer, dict[str, bytes]]:
    recipe = reduce.load_recipe(recipe_path)
    red = Reducer(recipe, use_cache=False)
    return red, {str(lv): red.payload(lv) for lv in all_levels(recipe.ladder())}


@pytest.mark.parametrize(
    ("filters", "part_rows"),
    [({}, 5_000_000), ({}, 900), ({"filter": [{"column": "kind", "not_in": ["e"]}]}, 900)],
)
def test_spilled_scan_gives_every_level_byte_for_byte(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, filters: dict[str, Any], part_rows: int
) -> None:
    path = _sparse(tmp_path, **filters)
    whole, expected = _payloads(path)
    assert isinstance(whole.finest(), Partial)
    monkeypatch.setenv("REDUCE_PROBE_ROWS", "1100")
    monkeypatch.setattr(aggregate, "PART_ROWS", part_rows)
    spilled, got = _payloads(path)
    finest = spilled.finest()
    assert isinstance(finest, Spilled)
    assert len(finest.parts) == -(-5000 // part_rows)  # 1 part, or 6 of about 900 rows
    acc = finest.accounting
    assert finest.rows == 5000 - acc.filtered_rows - sum(acc.invalid_by_reason.values())
    assert finest.accounting == whole.finest().accounting
    if not filters:  # rows 5, 402, ... lack a latitude; rows 7, 620, ... a time
        assert finest.accounting.invalid_by_reason == {"coordinates": 13, "time": 9}
    assert got == expected
    # Row counts taken part by part (from the spilled rows, or from the distinct keys of a
    # finer level counted before) equal the rows of each level.
    for keep in (0, tables.KEEP_KEY_ROWS):
        monkeypatch.setattr(tables, "KEEP_KEY_ROWS", keep)
        counted = Reducer(reduce.load_recipe(path), use_cache=False)
        for level in all_levels(counted.recipe.ladder()):
            assert counted.row_count(level) == spilled.rows(level).frame.height, level
        assert bool(counted._keysets) == bool(keep)
    # The finest level aggregated from the files equals the one-pass partial.
    keys = list(whole.partial().keys)
    assert spilled.partial().table.sort(keys).equals(whole.partial().table.sort(keys))


def test_dense_source_is_grouped_in_memory_not_spilled(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    rng = np.random.default_rng(5)
    path = write_case(
        tmp_path,
        random_events(rng, 5000),
        group={"region": {"column": "region"}, "category": {"column": "kind"}},
        measures=MEASURES,
    )
    whole, expected = _payloads(path)
    monkeypatch.setenv("REDUCE_PROBE_ROWS", "1100")
    split, got = _payloads(path)
    assert isinstance(split.finest(), Partial)  # 15 groups: far below a quarter of 1,100
    assert got == expected
    assert split.finest().accounting == whole.finest().accounting


def test_spilled_partial_is_cached_and_refits_give_the_same_payload(
    cached_case: tuple[Path, Path],
) -> None:
    cache, path = cached_case
    first = reduce.fit(path, budget="20KB")
    again = reduce.fit(path, budget="20KB")
    assert not first.partial_from_cache and again.partial_from_cache
    assert again.reducer is not None and isinstance(again.reducer.finest(), Spilled)
    assert again.payload == first.payload and again.level == first.level
    entries = [d for d in cache.iterdir() if not d.name.startswith(".")]
    assert len(entries) == 1
    names = sorted(f.name for f in entries[0].iterdir())
    # The spilled rows, their meta and checksums (with their locks), plus the store of
    # measured levels (reduce.levels).
    assert [n for n in names if not n.startswith(("levels-", "payload-"))] == [
        ".lock",
        ".sums-lock",
        "meta.json",
        "rows",
        "sums.json",
    ]
    assert any(n.startswith("levels-") for n in names)
    del first, again
    gc.collect()
    assert not [d for d in cache.iterdir() if d.name.endswith(".spill")]


def test_spill_folder_outside_the_cache_is_removed(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("REDUCE_PROBE_ROWS", "1100")
    monkeypatch.setenv("TMPDIR", str(tmp_path / "tmp"))
    (tmp_path / "tmp").mkdir()
    import tempfile

    monkeypatch.setattr(tempfile, "tempdir", None)  # re-read TMPDIR
    red = Reducer(reduce.load_recipe(_sparse(tmp_path / "case")), use_cache=False)
    spilled = red.finest()
    assert isinstance(spilled, Spilled)
    folder = spilled.root
    assert folder.parent == tmp_path / "tmp" and folder.is_dir()
    del red, spilled
    gc.collect()
    assert not folder.exists()
    # A folder left by a process killed mid-scan is removed by the next spilling run.
    stale = tmp_path / "tmp" / "reduce-spill-999999999-abcd"
    (stale / "rows").mkdir(parents=True)
    Reducer(reduce.load_recipe(tmp_path / "case" / "recipe.toml"), use_cache=False).finest()
    assert not stale.exists()


# --- the demo recipes ---------------------------------------------------------------------------

RECIPES = Path(__file__).resolve().parent.parent / "recipes"


@pytest.fixture(scope="module")
def demo_root(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from reduce._scenario import generate

    return generate(tmp_path_factory.mktemp("demo"), rows=20_000, seed=11).root


def _without_distinct(text: str, root: Path) -> str:
    """A demo recipe pointed at ``root``, its distinct measures (which never spill) turned
    into counts of the same name, so that recipes pruning by them still load."""
    text = text.replace("../fixtures/demo/", f"{root.as_posix()}/").replace("../out/", "out/")
    return re.sub(r'\{ distinct = "[^"]+" \}', '"count"', text)


@pytest.mark.parametrize("always", [False, True], ids=["when-sparse", "always"])
@pytest.mark.parametrize("name", sorted(p.stem for p in RECIPES.glob("*.toml")))
def test_demo_recipes_give_the_same_payloads_spilled(
    name: str, always: bool, demo_root: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Regions from boundaries, flows, GeoJSON geometry, rates and suppression all work the
    # same on spilled rows (and, for dense keys, after the probe) as on one pass.
    path = tmp_path / f"{name}.toml"
    path.write_text(_without_distinct((RECIPES / f"{name}.toml").read_text(), demo_root))
    recipe = reduce.load_recipe(path)
    levels = all_levels(recipe.ladder())[:40]
    whole = Reducer(recipe, use_cache=False)
    expected = [whole.payload(lv) for lv in levels]
    monkeypatch.setenv("REDUCE_PROBE_ROWS", "400")
    monkeypatch.setattr(aggregate, "PART_ROWS", 4000)
    if always:
        monkeypatch.setattr(aggregate, "_SPARSE", -1.0)
    split = Reducer(recipe, use_cache=False)
    assert isinstance(split.finest(), Spilled) or not always
    assert [split.payload(lv) for lv in levels] == expected
    assert split.finest().accounting == whole.finest().accounting


def test_full_disk_while_spilling_is_one_line_exit_2_and_nothing_left(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, cached_case: tuple[Path, Path]
) -> None:
    from click.testing import CliRunner

    from reduce.cli import main

    cache, path = cached_case

    def full(self: pl.LazyFrame, *args: Any, **kw: Any) -> None:
        # What polars raises when the disk fills up mid-write (seen on a 2 MB tmpfs).
        raise pl.exceptions.ComputeError(
            "parquet: File out of specification: underlying IO "
            "error: No space left on device (os error 28)"
        )

    monkeypatch.setattr(pl.LazyFrame, "sink_parquet", full)
    res = CliRunner().invoke(main, ["run", str(path), "--quiet"])
    assert res.exit_code == 2
    assert res.stderr.strip().splitlines() == [
        (
            f"error: {cache}: cannot write the scan's keyed rows (No space left on device); free "
            "space there or point REDUCE_CACHE_DIR (TMPDIR with --no-cache) at a disk with room "
            "for about 25 bytes per event"
        )
    ]
    assert not (tmp_path / "case" / "out").exists()
    gc.collect()
    assert list(cache.iterdir()) == []


@pytest.mark.parametrize("probe", ["1100", "1000000"], ids=["spilled", "in-memory"])
def test_new_source_version_replaces_the_recipes_cache_entry(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, probe: str
) -> None:
    cache = tmp_path / "cache"
    monkeypatch.setenv("REDUCE_CACHE_DIR", str(cache))
    monkeypatch.setenv("REDUCE_PROBE_ROWS", probe)
    path = _sparse(tmp_path / "case")
    other = write_case(
        tmp_path / "other",
        random_events(np.random.default_rng(3), 2000),
        group={"region": {"column": "region"}},
        measures={"n": "count"},
    )
    reduce.fit(other)
    first = reduce.fit(path)
    assert len([d for d in cache.iterdir() if not d.name.startswith(".")]) == 2
    first_payload = first.payload
    del first  # an entry is not removed while a reader holds it (reduce.cache)
    gc.collect()
    events = tmp_path / "case" / "events.parquet"
    pl.read_parquet(events).head(4000).write_parquet(events)  # tonight's source
    again = reduce.fit(path)
    assert not again.partial_from_cache
    entries = [d for d in cache.iterdir() if not d.name.startswith(".")]
    assert len(entries) == 2  # the new entry replaced last night's; the other recipe's stays
    assert reduce.fit(other).partial_from_cache
    assert again.payload != first_payload


def test_an_entry_stored_by_another_run_is_left_alone_and_a_damaged_one_replaced(
    cached_case: tuple[Path, Path],
) -> None:
    from reduce import cache as cache_mod

    cache, path = cached_case
    reader = Reducer(reduce.load_recipe(path))  # stores the entry, then reads from it
    stored = reader.finest()
    assert isinstance(stored, Spilled) and stored.root.parent == cache
    before = {f: f.stat().st_mtime_ns for f in stored.files}
    # A second run that scanned at the same time stores later: the entry is not replaced
    # under the first run's feet (the late run keeps its own files until it ends).
    key = stored.root.name
    late = cache_mod.spill_dir(key)
    assert late is not None
    assert cache_mod.store(key, replace(stored, root=late), recipe="r") is None
    assert {f: f.stat().st_mtime_ns for f in stored.files} == before
    assert reader.payload(all_levels(reader.recipe.ladder())[0])
    # A damaged entry (its meta.json cut short) is replaced by the next run (once no run
    # reads it: reduce.cache never removes an entry under its reader).
    root = stored.root
    del reader, stored
    gc.collect()
    (root / "meta.json").write_text("{")
    again = Reducer(reduce.load_recipe(path))
    with pytest.warns(cache_mod.CacheWarning, match=r"meta.json: checksum mismatch\); removed"):
        assert isinstance(again.finest(), Spilled) and not again.partial_from_cache
    after = Reducer(reduce.load_recipe(path))
    assert isinstance(after.finest(), Spilled) and after.partial_from_cache
