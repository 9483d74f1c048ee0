"""An incremental run reuses what the previous run over fewer files measured: with files only
added since, the earlier store's row counts bound today's from below and a level it measured
well over the budget is judged over without counting or sampling it (measure.Earlier). The
reference for every payload is a fresh ``--no-cache`` run over the same files.

The sample thresholds are lowered (as in tests/test_sampled.py) so that the small test
tables take the row-count and sample paths that the earlier evidence replaces.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import os
import warnings
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pytest

import reduce
from reduce import cache, tables
from reduce.budget import level_key
from reduce.measure import EARLIER_NOTE
from reduce.pipeline import Reducer, RunResult
from tests._builders import (
    SAMPLED_LADDER,
    invoke,
    lower_sample_thresholds,
    random_events,
    to_toml,
)


@pytest.fixture(autouse=True)
def _sample_small_levels(monkeypatch: pytest.MonkeyPatch) -> None:
    lower_sample_thresholds(monkeypatch)


def _recipe(folder: Path, budget: str = "60KB") -> Path:
    doc = {
        "name": "ev",
        "source": {"path": "ev/*.parquet", "time": "t", "lat": "lat", "lon": "lon"},
        **SAMPLED_LADDER,
        "budget": {**SAMPLED_LADDER["budget"], "max": budget},
        "output": {"path": "out/ev.json"},
    }
    path = folder / "recipe.toml"
    path.write_text(to_toml(doc), encoding="utf-8")
    return path


def _write(folder: Path, i: int, *, seed: int | None = None, n: int = 8000) -> Path:
    """Night ``i``: ``n`` events over ten days of their own, in one area."""
    (folder / "ev").mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(100 + i if seed is None else seed)
    start = dt.datetime(2024, 1, 1, tzinfo=dt.UTC) + dt.timedelta(days=10 * i)
    df = random_events(rng, n, start=start, span_days=10, lat=(10.0, 10.3), lon=(20.0, 20.3))
    path = folder / "ev" / f"day-{i}.parquet"
    df.write_parquet(path)
    return path


class _Spy:
    """Which levels had their rows counted or their cells sampled (while ``on``)."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.on = False
        self.counted: set[Any] = set()
        self.sampled: set[Any] = set()
        count, sample = tables.LevelTables.row_count, tables.LevelTables.sample_rows

        def row_count(red: tables.LevelTables, level: Any) -> int:
            if self.on:
                self.counted.add(level_key(level))
            return count(red, level)

        def sample_rows(red: tables.LevelTables, level: Any, every: int) -> Any:
            if self.on:
                self.sampled.add(level_key(level))
            return sample(red, level, every)

        monkeypatch.setattr(tables.LevelTables, "row_count", row_count)
        monkeypatch.setattr(tables.LevelTables, "sample_rows", sample_rows)

    @contextlib.contextmanager
    def during(self) -> Iterator[None]:
        self.counted, self.sampled, self.on = set(), set(), True
        try:
            yield
        finally:
            self.on = False


def _run(
    recipe: Path, out: Path, budget: str, *, spy: _Spy | None = None, **kw: Any
) -> tuple[RunResult, list[str], set[Any], set[Any]]:
    """A run, the progress lines it printed and the levels it counted and sampled."""
    lines: list[str] = []
    if spy is None:
        return (
            reduce.run(recipe, out_dir=out, budget=budget, progress=lines.append, **kw),
            lines,
            set(),
            set(),
        )
    with spy.during():
        res = reduce.run(recipe, out_dir=out, budget=budget, progress=lines.append, **kw)
    return res, lines, set(spy.counted), set(spy.sampled)


def _by_earlier(res: RunResult) -> set[Any]:
    return {level_key(c.level) for c in res.fit.candidates if c.note == EARLIER_NOTE}


def _merged_entry(recipe: Path) -> Path:
    """The cache entry of the merged partial of the source's files as they are now."""
    red = Reducer(reduce.load_recipe(recipe))
    return cache.cache_dir() / red.entry()


# (budget, some level judged over by its earlier size, fewer levels counted or sampled than a
# full run, the new file moves the chosen level coarser): on these files, at 30KB and 60KB
# earlier sizes settle some levels (the earlier run judged the large ones by samples, whose
# sizes it kept), and at 150KB the level chosen the night before is over now (nothing
# earlier said "over" for the levels near the limit: they fitted then).
CASES = [
    ("30KB", True, True, False),
    ("60KB", True, True, False),
    ("150KB", False, False, True),
]


@pytest.mark.parametrize(("budget", "by_size", "spares", "moves"), CASES)
def test_an_added_file_reuses_earlier_measurements_and_matches_a_full_run(
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    budget: str,
    by_size: bool,
    spares: bool,
    moves: bool,
) -> None:
    spy = _Spy(monkeypatch)
    recipe = _recipe(tmp_path)
    for i in range(3):
        _write(tmp_path, i)
    night1, _, _, _ = _run(recipe, tmp_path / "n1", budget)
    _write(tmp_path, 3)
    inc, lines, counted, sampled = _run(recipe, tmp_path / "n2", budget, spy=spy)
    full, full_lines, full_counted, full_sampled = _run(
        recipe, tmp_path / "full", budget, spy=spy, use_cache=False
    )

    assert inc.path is not None and full.path is not None
    assert inc.path.read_bytes() == full.path.read_bytes()
    assert inc.manifest is not None and inc.manifest["files"] == {
        "total": 4,
        "scanned": 1,
        "reused": 3,
    }
    assert "using the measurements of an earlier run over 3 of these 4 files" in lines
    assert not any("earlier run" in line for line in full_lines)
    # Levels settled by the earlier sizes were neither counted nor sampled...
    settled = _by_earlier(inc)
    assert bool(settled) == by_size
    assert not settled & (counted | sampled)
    # ...and the earlier row counts spared counting (or sampling: a level whose rows are
    # known to be many is sampled without a count) levels the full run counted or sampled.
    work, full_work = counted | sampled, full_counted | full_sampled
    assert work <= full_work
    assert (len(work) < len(full_work)) == spares
    assert inc.fit.level is not None and night1.fit.level is not None
    assert (inc.fit.level != night1.fit.level) == moves
    if moves:  # one axis one step coarser: the new file's events made the finer level over
        ladder = inc.fit.recipe.ladder()
        steps = {
            a: list(ladder[a]).index(inc.fit.level[a]) - list(ladder[a]).index(night1.fit.level[a])
            for a in ladder
        }
        assert sorted(steps.values())[-1] == 1 and min(steps.values()) >= 0


def test_earlier_verdicts_are_marked_estimated_in_the_manifest(tmp_path: Path) -> None:
    recipe = _recipe(tmp_path)
    for i in range(3):
        _write(tmp_path, i)
    reduce.run(recipe, out_dir=tmp_path / "n1")
    _write(tmp_path, 3)
    res = reduce.run(recipe, out_dir=tmp_path / "n2")
    settled = _by_earlier(res)
    assert settled
    assert res.manifest is not None
    frontier = {level_key(f["level"]): f for f in res.manifest["frontier"]}
    for k in settled:
        assert frontier[k]["estimated"] is True and frontier[k]["fits"] is False
        assert frontier[k]["chosen"] is False
    cands = {level_key(c.level): c for c in res.fit.candidates}
    for k in settled:  # the guess is the earlier size, over the budget by the sample margin
        guess = cands[k].guess
        assert guess is not None and guess > 1.15 * 60_000
    chosen = frontier[level_key(res.fit.level)]  # type: ignore[arg-type]
    assert "estimated" not in chosen and chosen["fits"] is True


def _change(folder: Path) -> None:
    _write(folder, 1, seed=7)  # night 1 exported again


def _remove(folder: Path) -> None:
    (folder / "ev" / "day-0.parquet").unlink()


def _rename(folder: Path) -> None:
    os.rename(folder / "ev" / "day-2.parquet", folder / "ev" / "day-2b.parquet")


@pytest.mark.parametrize(
    "mutate", [_change, _remove, _rename], ids=["changed", "removed", "renamed"]
)
def test_no_earlier_evidence_when_a_file_changed_was_removed_or_renamed(
    tmp_path: Path, mutate: Any
) -> None:
    recipe = _recipe(tmp_path)
    for i in range(3):
        _write(tmp_path, i)
    reduce.run(recipe, out_dir=tmp_path / "n1")
    mutate(tmp_path)
    _write(tmp_path, 3)  # and a file added: the old set is still no subset of the new one
    inc, lines, _, _ = _run(recipe, tmp_path / "n2", "60KB")
    assert inc.fit.reducer is not None and inc.fit.reducer.earlier is None
    assert not any("earlier run" in line for line in lines)
    assert not _by_earlier(inc)
    full = reduce.run(recipe, out_dir=tmp_path / "full", use_cache=False)
    assert inc.path is not None and full.path is not None
    assert inc.path.read_bytes() == full.path.read_bytes()


@pytest.mark.parametrize("name", ["levels", "meta.json", "sums.json"])
def test_a_damaged_earlier_store_is_ignored(tmp_path: Path, name: str) -> None:
    recipe = _recipe(tmp_path)
    for i in range(3):
        _write(tmp_path, i)
    reduce.run(recipe, out_dir=tmp_path / "n1")
    entry = _merged_entry(recipe)
    (target,) = entry.glob("levels-*.json") if name == "levels" else [entry / name]
    data = bytearray(target.read_bytes())
    data[len(data) // 2] ^= 0x5A  # one byte flipped
    target.write_bytes(bytes(data))
    _write(tmp_path, 3)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        inc, lines, _, _ = _run(recipe, tmp_path / "n2", "60KB")
    assert [str(w.message) for w in caught] == []  # no evidence, and not a word about it
    assert not any("earlier run" in line for line in lines) and not _by_earlier(inc)
    if name != "meta.json":  # (an entry whose recipe cannot be read is not known as one)
        assert not entry.exists()  # replaced by this run's entry, as before
    full = reduce.run(recipe, out_dir=tmp_path / "full", use_cache=False)
    assert inc.path is not None and full.path is not None
    assert inc.path.read_bytes() == full.path.read_bytes()


def test_merged_and_spilled_entries_record_their_files(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    recipe = _recipe(tmp_path)
    _write(tmp_path, 0, n=3000)
    reduce.run(recipe, out_dir=tmp_path / "one")  # one file: its entry is the merged one
    _write(tmp_path, 1, n=3000)
    reduce.run(recipe, out_dir=tmp_path / "two")
    red = Reducer(reduce.load_recipe(recipe))
    entry = cache.cache_dir() / red.entry()
    meta = orjson.loads(cache.read_file(entry, "meta.json"))
    assert meta["files"] == sorted(red._file_keys) and len(meta["files"]) == 2
    assert "keys" in meta  # a merged partial, loaded as one

    monkeypatch.setenv("REDUCE_PROBE_ROWS", "600")  # the files spill: the set is marked
    spilled = tmp_path / "spilled"
    spilled.mkdir()
    spilled_recipe = _recipe(spilled)
    for i in range(3):
        _write(spilled, i, n=2000)
    reduce.run(spilled_recipe, out_dir=spilled / "n1")
    red = Reducer(reduce.load_recipe(spilled_recipe))
    entry = cache.cache_dir() / red.entry()
    meta = orjson.loads(cache.read_file(entry, "meta.json"))
    assert meta["files"] == sorted(red._file_keys) and "keys" not in meta


def test_an_earlier_spilled_file_set_is_evidence_too(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("REDUCE_PROBE_ROWS", "600")  # sparse files over 600 rows spill
    recipe = _recipe(tmp_path)
    for i in range(3):
        _write(tmp_path, i, n=2000)
    reduce.run(recipe, out_dir=tmp_path / "n1", budget="20KB")
    _write(tmp_path, 3, n=2000)
    inc, lines, _, _ = _run(recipe, tmp_path / "n2", "20KB")
    assert "using the measurements of an earlier run over 3 of these 4 files" in lines
    assert inc.manifest is not None and inc.manifest["files"] == {
        "total": 4,
        "scanned": 1,
        "reused": 3,
    }
    full = reduce.run(recipe, out_dir=tmp_path / "full", budget="20KB", use_cache=False)
    assert inc.path is not None and full.path is not None
    assert inc.path.read_bytes() == full.path.read_bytes()


def test_run_json_reports_the_files_of_an_incremental_run(tmp_path: Path) -> None:
    recipe = _recipe(tmp_path)
    for i in range(3):
        _write(tmp_path, i, n=3000)
    code, _, _ = invoke("run", str(recipe), "--out", str(tmp_path / "n1"), "--quiet")
    assert code == 0
    _write(tmp_path, 3, n=3000)
    code, out, err = invoke("run", str(recipe), "--out", str(tmp_path / "n2"), "--json")
    assert code == 0, err
    (summary,) = orjson.loads(out)
    assert summary["files"] == {"total": 4, "scanned": 1, "reused": 3}
    # The same files again: this file set's own entry serves, no earlier run is looked for.
    again, lines, _, _ = _run(recipe, tmp_path / "n3", "60KB")
    assert again.fit.reducer is not None and again.fit.reducer.earlier is None
    assert not any("earlier run" in line for line in lines)


def test_evidence_is_carried_from_night_to_night(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Night 2 judges levels by night 1's sizes; night 3 (one more file) finds those
    # levels' figures in night 2's store, carried, and judges them the same way instead of
    # counting or sampling them again. Every night's payload equals a fresh full run.
    spy = _Spy(monkeypatch)
    recipe = _recipe(tmp_path)
    for i in range(3):
        _write(tmp_path, i)
    _run(recipe, tmp_path / "n1", "60KB")
    settled: list[set[Any]] = []
    for night in (3, 4):
        _write(tmp_path, night)
        inc, lines, counted, sampled = _run(recipe, tmp_path / f"n{night}", "60KB", spy=spy)
        full, _, _, _ = _run(recipe, tmp_path / f"full{night}", "60KB", use_cache=False)
        assert inc.path is not None and full.path is not None
        assert inc.path.read_bytes() == full.path.read_bytes(), night
        assert (
            f"using the measurements of an earlier run over {night} of these {night + 1} files"
            in lines
        )
        by_earlier = _by_earlier(inc)
        assert not by_earlier & (counted | sampled)
        settled.append(by_earlier)
    assert settled[0], "night 2 judged some level by night 1's sizes"
    assert settled[0] <= settled[1], "night 3 lost the evidence night 2 went by"
