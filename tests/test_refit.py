"""Re-fits from the store of measured levels kept with the cached partial: a re-fit at another
budget publishes the bytes a cold run publishes, levels measured before are not built or
measured again, and a damaged or outdated store is never used.

Reference: a cold run with no cache (``use_cache=False``) at the same budget.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import reduce
from reduce import levels, manifest, measure, pipeline, tables
from reduce.budget import all_levels
from tests._builders import random_events, write_case


def _case(tmp: Path) -> Path:
    rng = np.random.default_rng(3)
    events = random_events(rng, 6000, span_days=40, lat=(10.0, 10.4), lon=(20.0, 20.4))
    return write_case(
        tmp,
        events,
        source={"time": "t", "lat": "lat", "lon": "lon"},
        group={
            "hex": {"levels": [9, 8, 7]},
            "time": {"levels": ["6h", "1d", "1w"], "zone": "UTC"},
            "category": {"column": "kind"},
        },
        measures={"n": "count", "sx": {"sum": "x"}},
        prune={"top": {"k": [4, 2], "by": "n"}},
        budget={"max": "40KB", "on": "gzip", "order": ["top", "time", "hex"]},
    )


def _no_building(monkeypatch: pytest.MonkeyPatch) -> None:
    def fail(*_a: object, **_k: object) -> None:
        raise AssertionError("a level was built, though the store settles it")

    monkeypatch.setattr(tables.LevelTables, "rows", fail)
    monkeypatch.setattr(measure, "size_on", fail)
    monkeypatch.setattr(measure, "fits_on", fail)
    monkeypatch.setattr(measure, "fast_length", fail)
    monkeypatch.setattr(measure, "quick_look", fail)
    monkeypatch.setattr(manifest, "measure_all", fail)


@pytest.mark.parametrize("budget", ["24KB", "40KB", "120KB", "1MB"])
def test_refit_at_another_budget_publishes_the_bytes_of_a_cold_run(
    tmp_path: Path, budget: str
) -> None:
    path = _case(tmp_path)
    reduce.run(path, out_dir=tmp_path / "first")  # fills the cache and the store
    warm = reduce.run(path, out_dir=tmp_path / "warm", budget=budget)
    cold = reduce.run(path, out_dir=tmp_path / "cold", budget=budget, use_cache=False)
    assert warm.path is not None and cold.path is not None
    assert warm.path.read_bytes() == cold.path.read_bytes()
    assert warm.fit.level == cold.fit.level


def test_after_every_level_was_measured_a_refit_builds_and_measures_nothing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = _case(tmp_path)
    recipe = reduce.load_recipe(path)
    reduce.ladder(path, every_level=True)  # every level measured exactly, and kept
    first = reduce.run(path, out_dir=tmp_path / "a", budget="25KB")
    assert first.path is not None
    want = {
        b: reduce.run(path, out_dir=tmp_path / f"cold-{b}", budget=b, use_cache=False)
        for b in ("23KB", "60KB")
    }
    _no_building(monkeypatch)
    for b, cold in want.items():
        warm = reduce.run(path, out_dir=tmp_path / f"warm-{b}", budget=b)
        assert warm.path is not None and cold.path is not None
        assert warm.path.read_bytes() == cold.path.read_bytes(), b
    # The ladder prints what it measured before, measuring nothing.
    again = reduce.ladder(path, every_level=True)
    assert len(again.candidates) == len(all_levels(recipe.ladder()))
    assert all(c.gzip is not None for c in again.candidates)


def test_a_damaged_store_is_ignored(tmp_path: Path) -> None:
    path = _case(tmp_path)
    reduce.run(path, out_dir=tmp_path / "a", budget="30KB")
    red = pipeline.Reducer(reduce.load_recipe(path))
    store_file = red.store.path
    assert store_file is not None and store_file.is_file()
    kept = [f for f in store_file.parent.glob("payload-*.z")]
    assert kept
    for f in kept:  # a kept payload that no longer matches its sha256 is not used
        f.write_bytes(f.read_bytes()[:-7] + b"garbage")
    warm = reduce.run(path, out_dir=tmp_path / "b", budget="30KB")
    cold = reduce.run(path, out_dir=tmp_path / "c", budget="30KB", use_cache=False)
    assert warm.path is not None and cold.path is not None
    assert warm.path.read_bytes() == cold.path.read_bytes()
    store_file.write_bytes(b"{not json")  # a store that does not parse counts as empty
    assert levels.Store(store_file.parent, red.store.name).records == {}
    warm = reduce.run(path, out_dir=tmp_path / "d", budget="30KB")
    assert warm.path is not None and warm.path.read_bytes() == cold.path.read_bytes()


def test_a_changed_denominators_file_is_not_served_from_the_store(tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    events = random_events(rng, 3000)
    path = write_case(
        tmp_path,
        events,
        group={"region": {"column": "region"}, "category": {"column": "kind"}},
        measures={"n": "count"},
        normalize={
            "denominators": {"path": "pop.csv", "key": "region", "value": "residents"},
            "per": 1000,
            "measures": ["n"],
        },
        denominators={"region": ["r1", "r2", "r3"], "residents": [1000, 2000, 4000]},
    )
    first = reduce.run(path, out_dir=tmp_path / "a")
    assert first.path is not None
    (tmp_path / "pop.csv").write_text("region,residents\nr1,10\nr2,20\nr3,40\n")
    warm = reduce.run(path, out_dir=tmp_path / "b")
    cold = reduce.run(path, out_dir=tmp_path / "c", use_cache=False)
    assert warm.path is not None and cold.path is not None
    assert warm.path.read_bytes() == cold.path.read_bytes()
    assert warm.path.read_bytes() != first.path.read_bytes()


def test_a_second_run_at_the_same_budget_compresses_nothing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The chosen level's exact lengths are kept, so publishing it again measures nothing: on
    # a gzip budget its gzip length (brotli is not measured), on a brotli budget both.
    path = _case(tmp_path)
    first = reduce.run(path, out_dir=tmp_path / "a", budget="40KB")
    assert first.fit.chosen is not None and first.fit.chosen.brotli is None
    on_brotli = reduce.run(path, out_dir=tmp_path / "c", budget="30KB", on="brotli")
    assert on_brotli.fit.chosen is not None and on_brotli.fit.chosen.brotli is not None
    _no_building(monkeypatch)
    again = reduce.run(path, out_dir=tmp_path / "b", budget="40KB")
    assert first.path is not None and again.path is not None
    assert again.path.read_bytes() == first.path.read_bytes()
    brotli_again = reduce.run(path, out_dir=tmp_path / "d", budget="30KB", on="brotli")
    assert on_brotli.path is not None and brotli_again.path is not None
    assert brotli_again.path.read_bytes() == on_brotli.path.read_bytes()


def test_the_same_recipe_by_a_relative_absolute_or_linked_path_shares_its_store(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = _case(tmp_path / "project").resolve()
    reduce.run(path, out_dir=tmp_path / "a")
    link = tmp_path / "linked"
    link.symlink_to(path.parent, target_is_directory=True)
    monkeypatch.chdir(path.parent.parent)
    relative = Path(path.parent.name) / path.name
    _no_building(monkeypatch)  # the runs below find every figure in the first run's store
    for p in (relative, link / path.name, Path(".") / relative):
        again = reduce.run(p, out_dir=tmp_path / "b")
        assert again.path is not None
        assert again.path.read_bytes() == (tmp_path / "a" / again.path.name).read_bytes()
