"""Cache entries prove themselves: a damaged entry is set aside, never used, never fatal.

Every file of an entry has its sha256 in the entry's ``sums.json`` (reduce.cache). These
tests damage each kind of file of an entry (the partial's table, pairs and values, the
spilled parts, meta.json, sums.json itself) by a bit flip, a truncation, or by putting
something unreadable in its place, and check that the next run warns in one line, rescans,
and publishes exactly what a fresh ``--no-cache`` run publishes. An entry that another run
wants to remove while a reader reads it stays until the reader is done.
"""

from __future__ import annotations

import gc
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from click.testing import CliRunner

import reduce
from reduce import cache
from reduce.aggregate import Spilled
from reduce.budget import all_levels
from reduce.cli import main
from reduce.pipeline import Reducer
from tests._builders import random_events, write_case

REPO = Path(__file__).resolve().parents[1]


def _case(tmp: Path, *, spill: bool) -> Path:
    rng = np.random.default_rng(21)
    measures: dict[str, object] = {"n": "count", "sx": {"sum": "x"}}
    if not spill:
        measures["who"] = {"distinct": "kind"}  # a distinct measure: pairs and values files
    return write_case(
        tmp,
        random_events(rng, 5000, span_days=20),
        source={"time": "t", "lat": "lat", "lon": "lon"},
        group={
            "hex": {"levels": [10, 8, 6]},
            "time": {"levels": ["1h", "1d"]},
            "category": {"column": "kind"},
        },
        measures=measures,
        prune={"top": {"k": [4, 2], "by": "n"}},
    )


@pytest.fixture
def isolated(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    root = tmp_path / "cache"
    monkeypatch.setenv("REDUCE_CACHE_DIR", str(root))
    monkeypatch.setenv("REDUCE_PROBE_ROWS", "1100")
    return root


def _entry(root: Path) -> Path:
    entries = [d for d in root.iterdir() if not d.name.startswith(".")]
    assert len(entries) == 1
    return entries[0]


def _reference(recipe: Path, out: Path) -> bytes:
    res = reduce.run(recipe, out_dir=out, use_cache=False)
    assert res.path is not None
    return res.path.read_bytes()


def _flip(path: Path) -> None:
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x10
    path.write_bytes(bytes(data))


def _truncate(path: Path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def _fifo(path: Path) -> None:
    path.unlink()
    os.mkfifo(path)


DAMAGE = {"flip": _flip, "truncate": _truncate, "fifo": _fifo}


def _drop_level_store(entry: Path) -> None:
    """Remove the store of measured levels from an entry (reduce.levels): with it, a re-run
    at the same budget publishes the kept payload without reading the partial at all, so a
    damaged partial file would go unnoticed (and unused) until a level must be built."""
    for f in entry.iterdir():
        if f.name.startswith(("levels-", "payload-")):
            f.unlink()


def _damaged_run_matches_fresh(
    tmp_path: Path, root: Path, recipe: Path, name: str, damage: str
) -> None:
    fresh = _reference(recipe, tmp_path / "fresh")
    first = reduce.run(recipe, out_dir=tmp_path / "a")
    assert first.path is not None and first.path.read_bytes() == fresh
    del first
    gc.collect()  # the first run no longer reads the entry
    entry = _entry(root)
    target = next(
        p
        for p in sorted(entry.rglob("*"))
        if p.is_file() and p.relative_to(entry).as_posix().startswith(name)
    )
    DAMAGE[damage](target)
    _drop_level_store(entry)
    with pytest.warns(cache.CacheWarning, match=rf"cache entry {entry} is damaged \("):
        res = reduce.run(recipe, out_dir=tmp_path / "b")
    assert not res.fit.reducer or not res.fit.reducer.partial_from_cache
    assert res.path is not None and res.path.read_bytes() == fresh
    del res
    gc.collect()
    # The entry was stored again, sound: the next run uses it without a warning.
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error", cache.CacheWarning)
        again = reduce.run(recipe, out_dir=tmp_path / "c")
    assert again.fit.reducer is not None and again.fit.reducer.partial_from_cache
    assert again.path is not None and again.path.read_bytes() == fresh


@pytest.mark.parametrize("damage", ["flip", "truncate", "fifo"])
@pytest.mark.parametrize(
    "name", ["table.parquet", "pairs-0.parquet", "values-0.parquet", "meta.json", "sums.json"]
)
def test_damaged_in_memory_entry_is_rescanned_and_payload_equals_a_fresh_run(
    tmp_path: Path, isolated: Path, name: str, damage: str
) -> None:
    recipe = _case(tmp_path / "case", spill=False)
    _damaged_run_matches_fresh(tmp_path, isolated, recipe, name, damage)


@pytest.mark.parametrize("damage", ["flip", "truncate", "fifo"])
@pytest.mark.parametrize("name", ["rows/", "meta.json", "sums.json"])
def test_damaged_spilled_entry_is_rescanned_and_payload_equals_a_fresh_run(
    tmp_path: Path, isolated: Path, name: str, damage: str
) -> None:
    recipe = _case(tmp_path / "case", spill=True)
    first = Reducer(reduce.load_recipe(recipe))
    assert isinstance(first.finest(), Spilled)  # the case does spill
    del first
    gc.collect()
    for d in list(isolated.iterdir()):
        cache._remove(d)
    _damaged_run_matches_fresh(tmp_path, isolated, recipe, name, damage)


def test_damaged_entry_is_one_warning_line_from_the_command_line(
    tmp_path: Path, isolated: Path
) -> None:
    recipe = _case(tmp_path / "case", spill=True)
    fresh = _reference(recipe, tmp_path / "fresh")
    runner = CliRunner()
    assert (
        runner.invoke(main, ["run", str(recipe), "--out", str(tmp_path / "a"), "--quiet"]).exit_code
        == 0
    )
    entry = _entry(isolated)
    part = next(p for p in sorted((entry / "rows").rglob("*.parquet")))
    _truncate(part)
    _drop_level_store(entry)
    res = runner.invoke(main, ["run", str(recipe), "--out", str(tmp_path / "b"), "--quiet"])
    assert res.exit_code == 0, res.output
    rel = part.relative_to(entry).as_posix()
    assert res.stderr.splitlines() == [
        f"warning: cache entry {entry} is damaged ({rel}: checksum mismatch); removed, "
        "scanning the source again"
    ]
    assert (tmp_path / "b" / "case.json").read_bytes() == fresh


def test_entry_is_not_removed_under_its_reader(tmp_path: Path, isolated: Path) -> None:
    recipe = _case(tmp_path / "case", spill=True)
    Reducer(reduce.load_recipe(recipe)).finest()  # stores the entry
    gc.collect()
    reader = Reducer(reduce.load_recipe(recipe))
    assert isinstance(reader.finest(), Spilled) and reader.partial_from_cache
    entry = _entry(isolated)
    # Another run, over tonight's version of the source, stores its entry and removes the
    # recipe's entries over older versions: not the one being read.
    events = tmp_path / "case" / "events.parquet"
    pl.read_parquet(events).head(4500).write_parquet(events)
    env = dict(os.environ, PYTHONPATH=str(REPO))
    env.pop("CI", None)
    other = subprocess.run(
        [
            sys.executable,
            "-m",
            "reduce",
            "run",
            str(tmp_path / "case" / "recipe.toml"),
            "--out",
            str(tmp_path / "other"),
            "--quiet",
        ],
        env=env,
        capture_output=True,
    )
    assert other.returncode == 0, other.stderr.decode()
    assert entry.is_dir()
    # The reader still reads every level from its entry's files.
    for level in all_levels(reader.recipe.ladder()):
        assert reader.payload(level)
    scan_hash = reader.recipe.scan_hash
    del reader
    gc.collect()
    newer = [d.name for d in isolated.iterdir() if not d.name.startswith(".") and d != entry]
    assert len(newer) == 1
    cache._drop_others(isolated, newer[0], scan_hash)  # what the next store does
    assert not entry.exists()  # removed once no run reads it


def test_files_added_to_an_entry_later_are_checked_too(tmp_path: Path) -> None:
    entry = tmp_path / "entry"
    entry.mkdir()
    cache.write_file(entry, "meta.json", b"{}")
    cache.write_file(entry, "measured/sizes.json", b'{"gzip": 1}')
    assert cache.read_file(entry, "measured/sizes.json") == b'{"gzip": 1}'
    with pytest.raises(FileNotFoundError):
        cache.read_file(entry, "never-stored.json")  # optional files may be absent
    (entry / "measured" / "sizes.json").write_bytes(b'{"gzip": 2}')
    with pytest.raises(cache.DamagedEntry, match="checksum mismatch"):
        cache.read_file(entry, "measured/sizes.json")
    (entry / "stray.bin").write_bytes(b"not written through write_file")
    with pytest.raises(cache.DamagedEntry, match="no checksum recorded"):
        cache.read_file(entry, "stray.bin")
    with pytest.raises(ValueError, match="relative path inside the entry"):
        cache.write_file(entry, "../outside.json", b"x")


def test_unfinished_and_set_aside_entries_of_dead_runs_are_swept(isolated: Path) -> None:
    dead = 999_999_999  # above any pid Linux hands out (pid_max is at most 2^22, from memory)
    for name in (f".abc.{dead}.tmp", f".abc.{dead}.gone", f".abc.{os.getpid()}.gone"):
        (isolated / name / "rows").mkdir(parents=True)
    folder = cache.spill_dir("k")
    assert folder is not None
    left = sorted(p.name for p in isolated.iterdir() if p != folder)
    assert left == [f".abc.{os.getpid()}.gone"]  # a live run's is left alone
