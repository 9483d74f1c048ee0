"""Incremental runs: the cache keeps one partial per source file, a run scans only the new or
changed files, drops the removed ones and merges; every payload equals, byte for byte, a
fresh ``--no-cache`` run over the same files (reduce.tables ``_finest_by_file``)."""

from __future__ import annotations

import os
import warnings
from pathlib import Path

import numpy as np
import orjson
import polars as pl
import pytest

import reduce
from reduce import cache
from reduce.pipeline import Reducer
from tests._builders import random_events, to_toml


def _recipe(folder: Path, *, distinct: bool = True, budget: bool = False) -> Path:
    measures: dict[str, object] = {"n": "count", "sx": {"sum": "x"}, "top_x": {"max": "x"}}
    if distinct:
        measures["kinds"] = {"distinct": "kind"}
    doc: dict[str, object] = {
        "name": "inc",
        "source": {"path": "ev/*.parquet", "time": "t", "lat": "lat", "lon": "lon"},
        "group": {
            "hex": {"levels": [9, 7, 5]},
            "time": {"levels": ["1h", "1d"]},
            "region": {"column": "region"},
        },
        "measures": measures,
        "output": {"path": "out/inc.json"},
    }
    if budget:
        doc["budget"] = {"max": "30KB", "on": "gzip", "order": ["time", "hex"]}
    path = folder / "recipe.toml"
    path.write_text(to_toml(doc), encoding="utf-8")
    return path


def _write(folder: Path, name: str, seed: int, n: int = 1500) -> Path:
    (folder / "ev").mkdir(parents=True, exist_ok=True)
    df = random_events(np.random.default_rng(seed), n, span_days=6)
    path = folder / "ev" / name
    df.write_parquet(path)
    return path


def _runs(recipe: Path, tmp: Path) -> tuple[bytes, dict[str, int], bytes]:
    """(incremental payload, its files counts, a fresh --no-cache payload)."""
    res = reduce.run(recipe, out_dir=tmp / "inc")
    assert res.manifest["files"] == res.fit.reducer.files  # type: ignore[union-attr]
    inc = res.path.read_bytes()
    fresh = reduce.run(recipe, out_dir=tmp / "fresh", use_cache=False).path.read_bytes()
    return inc, res.manifest["files"], fresh


def _file_entries(recipe: Path) -> dict[str, Path]:
    """Source file name -> the folder of its per-file cache entry (as the run keys it)."""
    red = Reducer(reduce.load_recipe(recipe))
    red.entry()
    assert red.source is not None
    return {f.name: cache.cache_dir() / k for f, k in zip(red.source.files, red._file_keys)}


def test_added_changed_removed_and_renamed_files_match_a_fresh_run(tmp_path: Path) -> None:
    recipe = _recipe(tmp_path, budget=True)
    for i in range(3):
        _write(tmp_path, f"day-{i}.parquet", seed=i)
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 3, "scanned": 3, "reused": 0}

    _write(tmp_path, "day-3.parquet", seed=3)  # a new night
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 4, "scanned": 1, "reused": 3}

    _write(tmp_path, "day-1.parquet", seed=11, n=900)  # a night exported again
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 4, "scanned": 1, "reused": 3}

    (tmp_path / "ev" / "day-0.parquet").unlink()  # an old night dropped
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 3, "scanned": 0, "reused": 3}

    os.rename(tmp_path / "ev" / "day-2.parquet", tmp_path / "ev" / "day-2b.parquet")
    inc, files, fresh = _runs(recipe, tmp_path)
    # A renamed file is a new path (its key holds the path): scanned once more.
    assert inc == fresh and files == {"total": 3, "scanned": 1, "reused": 2}

    inc, files, fresh = _runs(recipe, tmp_path)  # nothing changed: the merged entry serves
    assert inc == fresh and files == {"total": 3, "scanned": 0, "reused": 3}


def test_entries_of_removed_and_changed_files_are_dropped(tmp_path: Path) -> None:
    recipe = _recipe(tmp_path)
    for i in range(3):
        _write(tmp_path, f"day-{i}.parquet", seed=i)
    reduce.run(recipe)
    before = _file_entries(recipe)
    assert all(d.is_dir() for d in before.values())
    (tmp_path / "ev" / "day-0.parquet").unlink()
    _write(tmp_path, "day-1.parquet", seed=21)
    reduce.run(recipe)
    assert not before["day-0.parquet"].exists() and not before["day-1.parquet"].exists()
    assert before["day-2.parquet"].is_dir()
    assert all(d.is_dir() for d in _file_entries(recipe).values())


def test_a_change_keeping_size_and_mtime_is_caught_by_the_footer_hash(tmp_path: Path) -> None:
    recipe = _recipe(tmp_path)
    for i in range(3):
        _write(tmp_path, f"day-{i}.parquet", seed=i)
    path = tmp_path / "ev" / "day-1.parquet"
    opts = {"compression": "uncompressed", "statistics": True}
    df = random_events(np.random.default_rng(5), 1500, span_days=6)
    df.write_parquet(path, **opts)  # type: ignore[arg-type]
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh
    st = os.stat(path)
    # Same shape, one value larger: the column's maximum (in the footer's statistics)
    # changes, the file's size does not (fixed-width values, no compression).
    biggest = int(df.get_column("x").arg_max())  # type: ignore[arg-type]
    changed = df.with_columns(
        pl.when(pl.int_range(pl.len()) == biggest)
        .then(pl.col("x") + 1000.0)
        .otherwise(pl.col("x"))
        .alias("x")
    )
    changed.write_parquet(path, **opts)  # type: ignore[arg-type]
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    now = os.stat(path)
    assert (now.st_size, now.st_mtime_ns) == (st.st_size, st.st_mtime_ns)
    inc2, files, fresh2 = _runs(recipe, tmp_path)
    assert fresh2 != fresh  # the change shows in the payload (its sum and maximum)
    assert inc2 == fresh2 and files == {"total": 3, "scanned": 1, "reused": 2}


def test_a_damaged_file_entry_rescans_that_file_only(tmp_path: Path) -> None:
    recipe = _recipe(tmp_path)
    for i in range(3):
        _write(tmp_path, f"day-{i}.parquet", seed=i)
    reduce.run(recipe)
    entry = _file_entries(recipe)["day-1.parquet"]
    table = entry / "table.parquet"
    data = bytearray(table.read_bytes())
    data[len(data) // 2] ^= 0xFF
    table.write_bytes(bytes(data))
    _write(tmp_path, "day-3.parquet", seed=3)  # so the merged entry is not the answer
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        inc, files, fresh = _runs(recipe, tmp_path)
    assert [str(w.message) for w in caught if issubclass(w.category, cache.CacheWarning)]
    assert inc == fresh and files == {"total": 4, "scanned": 2, "reused": 2}


def test_a_file_with_no_valid_rows_is_merged_not_refused(tmp_path: Path) -> None:
    recipe = _recipe(tmp_path)
    for i in range(2):
        _write(tmp_path, f"day-{i}.parquet", seed=i)
    df = random_events(np.random.default_rng(9), 200).with_columns(
        pl.lit(None, dtype=pl.Float64).alias("lat")
    )
    df.write_parquet(tmp_path / "ev" / "day-2.parquet")
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files["total"] == 3
    doc = orjson.loads(inc)
    assert doc["accounting"]["invalid_rows"] >= 200  # the empty file's rows are counted


def test_spilled_files_merge_and_match_a_fresh_run(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("REDUCE_PROBE_ROWS", "600")  # sparse files over 600 rows spill
    recipe = _recipe(tmp_path, distinct=False, budget=True)
    for i in range(3):
        _write(tmp_path, f"day-{i}.parquet", seed=i, n=2000)
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 3, "scanned": 3, "reused": 0}
    assert any((d / "rows").is_dir() for d in _file_entries(recipe).values())
    _write(tmp_path, "day-3.parquet", seed=3, n=2000)
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 4, "scanned": 1, "reused": 3}
    # A small file (under the probe, so grouped in memory alone) is spilled to merge.
    _write(tmp_path, "day-4.parquet", seed=4, n=300)
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 5, "scanned": 1, "reused": 4}
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 5, "scanned": 0, "reused": 5}


def test_many_small_sparse_files_of_a_large_source_spill_file_by_file(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Every file is under the probe, the source is not: each file is probed on its own rows,
    # so the merged partial is not held in memory when the events do not group.
    monkeypatch.setenv("REDUCE_PROBE_ROWS", "1000")
    recipe = _recipe(tmp_path, distinct=False)
    for i in range(4):
        _write(tmp_path, f"day-{i}.parquet", seed=i, n=600)
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 4, "scanned": 4, "reused": 0}
    assert all((d / "rows").is_dir() for d in _file_entries(recipe).values())
    _write(tmp_path, "day-4.parquet", seed=4, n=600)
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 5, "scanned": 1, "reused": 4}


def test_csv_files_added_and_changed_in_place_match_a_fresh_run(tmp_path: Path) -> None:
    doc = {
        "name": "inc",
        "source": {"path": "ev/*.csv", "time": "t", "lat": "lat", "lon": "lon"},
        "group": {
            "hex": {"levels": [8, 6]},
            "time": {"levels": ["1d"]},
            "category": {"column": "kind"},
        },
        "measures": {"n": "count", "sx": {"sum": "x"}, "kinds": {"distinct": "kind"}},
        "output": {"path": "out/inc.json"},
    }
    recipe = tmp_path / "recipe.toml"
    recipe.write_text(to_toml(doc), encoding="utf-8")
    (tmp_path / "ev").mkdir()

    def write(i: int, seed: int) -> Path:
        df = random_events(np.random.default_rng(seed), 400, span_days=3)
        path = tmp_path / "ev" / f"day-{i}.csv"
        df.with_columns(pl.col("x").round(3)).write_csv(path)
        return path

    for i in range(3):
        write(i, i)
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 3, "scanned": 3, "reused": 0}
    write(3, 3)
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 4, "scanned": 1, "reused": 3}
    # One digit changed in place: same size, same modification time, other content (the
    # digest of a text file covers its last 64 KiB, here the whole file).
    path = tmp_path / "ev" / "day-2.csv"
    st = os.stat(path)
    text = path.read_text()
    last = text.rstrip("\n").rsplit("\n", 1)[1]
    digit = next(c for c in reversed(last) if c.isdigit() and c != "9")
    at = text.rindex(digit)
    path.write_text(text[:at] + str(int(digit) + 1) + text[at + 1 :])
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert os.stat(path).st_size == st.st_size
    inc2, files, fresh2 = _runs(recipe, tmp_path)
    assert inc2 == fresh2 and files == {"total": 4, "scanned": 1, "reused": 3}


def test_hive_partitioned_folders_keep_their_partition_column(tmp_path: Path) -> None:
    doc = {
        "name": "inc",
        "source": {"path": "ev", "time": "t", "lat": "lat", "lon": "lon"},
        "group": {
            "hex": {"levels": [8, 6]},
            "time": {"levels": ["1d"]},
            "category": {"column": "zone"},
        },
        "measures": {"n": "count", "sx": {"sum": "x"}},
        "output": {"path": "out/inc.json"},
    }
    recipe = tmp_path / "recipe.toml"
    recipe.write_text(to_toml(doc), encoding="utf-8")

    def write(zone: str, seed: int) -> None:
        folder = tmp_path / "ev" / f"zone={zone}"
        folder.mkdir(parents=True)
        random_events(np.random.default_rng(seed), 500, span_days=3).write_parquet(
            folder / "part.parquet"
        )

    write("north", 1)
    write("south", 2)
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 2, "scanned": 2, "reused": 0}
    write("west", 3)
    inc, files, fresh = _runs(recipe, tmp_path)
    assert inc == fresh and files == {"total": 3, "scanned": 1, "reused": 2}
    assert b'"west"' in inc  # the partition value reached the payload


def test_the_files_block_is_in_the_manifest_schema(tmp_path: Path) -> None:
    import jsonschema

    from reduce.schema import manifest_schema

    recipe = _recipe(tmp_path)
    for i in range(2):
        _write(tmp_path, f"day-{i}.parquet", seed=i)
    manifest = reduce.run(recipe).manifest
    jsonschema.validate(manifest, manifest_schema())  # the jsonschema package's validator
    bad = {**manifest, "files": {"total": 2, "scanned": -1, "reused": 3}}
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(bad, manifest_schema())
