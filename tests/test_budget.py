"""The byte-budget optimiser: sizes, size parsing, and the search's guarantees."""

from __future__ import annotations

import gzip
import itertools
import json
from pathlib import Path

import brotli
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import reduce
from reduce.budget import all_levels, search
from reduce.pipeline import Reducer
from reduce.sizes import fits_on, measure_all, parse_size, quick_look, size_on
from tests._builders import HEX_RECIPE, project

# --- sizes ------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        # IEC 80000-13: decimal prefixes are powers of 1000, binary prefixes powers of 1024.
        ("300KB", 300_000),
        ("1.5MB", 1_500_000),
        ("200KiB", 204_800),
        ("1MiB", 1_048_576),
        ("2GB", 2_000_000_000),
        ("250000", 250_000),
        (4096, 4096),
        ("10 kb", 10_000),
    ],
)
def test_sizes_parse_decimal_and_binary_units(text: object, expected: int) -> None:
    assert parse_size(text) == expected


@pytest.mark.parametrize("text", ["", "KB", "3XB", "-1KB", "0", True, 1.5, "1.5.2MB"])
def test_bad_sizes_are_refused(text: object) -> None:
    with pytest.raises(ValueError):
        parse_size(text)


@given(st.binary(max_size=5000) | st.text(max_size=3000).map(str.encode))
@settings(max_examples=60, deadline=None)
def test_sizes_equal_python_gzip_and_brotli_module(data: bytes) -> None:
    # References: Python's gzip module (RFC 1952) at level 9 with mtime 0, the brotli module
    # (RFC 7932) at quality 11.
    s = measure_all(data)
    assert s.raw == len(data)
    assert s.gzip == len(gzip.compress(data, compresslevel=9, mtime=0))
    assert s.brotli == len(brotli.compress(data, quality=11))
    for on in ("raw", "gzip", "brotli"):
        exact = size_on(data, on)  # type: ignore[arg-type]
        ok, size = fits_on(data, on, exact)  # type: ignore[arg-type]
        assert ok and size == exact
        ok, _ = fits_on(data, on, exact - 1)  # type: ignore[arg-type]
        assert not ok


# --- the search on synthetic monotone size functions -------------------------------------------

ladders = st.lists(st.integers(1, 4), min_size=1, max_size=4).map(
    lambda ns: {f"a{i}": tuple(range(n)) for i, n in enumerate(ns)}
)


@given(ladders, st.data())
@settings(max_examples=200, deadline=None)
def test_search_finds_the_lexicographically_finest_fitting_level(ladder, data) -> None:  # type: ignore[no-untyped-def]
    axes = list(ladder)
    order = data.draw(st.permutations(axes))
    # A size that shrinks as any axis gets coarser (level index grows): monotone.
    weights = {a: data.draw(st.integers(1, 50)) for a in axes}
    base = data.draw(st.integers(0, 100))

    def size(level: dict[str, int]) -> int:
        return base + sum(weights[a] * (len(ladder[a]) - 1 - level[a]) for a in axes)

    limit = data.draw(st.integers(0, base + sum(w * 4 for w in weights.values())))
    calls: list[dict[str, int]] = []

    def fits(level: dict[str, int]) -> bool:
        calls.append(level)
        return size(level) <= limit

    res = search(ladder, order, fits)
    every = [dict(zip(axes, combo)) for combo in itertools.product(*ladder.values())]
    fitting = [lv for lv in every if size(lv) <= limit]
    if not fitting:
        assert res.chosen is None
        return
    assert res.chosen is not None and size(res.chosen) <= limit
    # Brute force: finest on the last-to-give-up axis first, and so on.
    priority = list(reversed(order))
    best = min(fitting, key=lambda lv: [lv[a] for a in priority])
    assert res.chosen == best
    # It never evaluates a level twice and evaluates far fewer than all of them when large.
    keys = [tuple(sorted(c.items())) for c in calls]
    assert len(keys) == len(set(keys))
    assert len(calls) <= 1 + sum(max(1, (len(v) - 1).bit_length()) for v in ladder.values()) + len(
        ladder
    )  # the final local check


# --- the search on real payloads ----------------------------------------------------------------


@pytest.fixture(scope="module")
def hex_reducer(tmp_path_factory: pytest.TempPathFactory) -> Reducer:
    tmp = tmp_path_factory.mktemp("budget")
    recipe = reduce.load_recipe(project(tmp, HEX_RECIPE.replace("sev", "sev")))
    return Reducer(recipe, use_cache=False)


@given(budget=st.integers(2_000, 60_000), on=st.sampled_from(["raw", "gzip", "brotli"]))
@settings(
    max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
def test_chosen_level_fits_and_the_next_finer_does_not(
    hex_reducer: Reducer, budget: int, on: str
) -> None:
    res = reduce.fit(hex_reducer.recipe, budget=budget, on=on, reducer=hex_reducer)
    ladder = res.recipe.ladder()
    if res.level is None:
        coarsest = {a: v[-1] for a, v in ladder.items()}
        assert size_on(hex_reducer.payload(coarsest), on) > budget  # type: ignore[arg-type]
        return
    assert res.payload is not None
    assert size_on(res.payload, on) <= budget  # type: ignore[arg-type]
    for axis in res.recipe.budget.order:  # type: ignore[union-attr]
        levels = list(ladder[axis])
        i = levels.index(res.level[axis])
        if i == 0:
            continue
        finer = {**res.level, axis: levels[i - 1]}
        assert size_on(hex_reducer.payload(finer), on) > budget, (axis, finer)  # type: ignore[arg-type]


def test_payload_level_and_manifest_record_the_choice(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(tmp_path)
    recipe = project(tmp_path)
    out = reduce.run(recipe, budget="15KB", use_cache=False)
    payload = json.loads(out.path.read_bytes())  # type: ignore[union-attr]
    manifest = out.manifest
    assert manifest is not None
    assert payload["level"] == manifest["level"] == out.fit.level
    assert manifest["budget"] == {
        "max": 15000,
        "on": "gzip",
        "order": ["top", "time", "hex", "digits"],
        "fits": True,
    }
    assert manifest["bytes"]["gzip"] <= 15000
    data = out.path.read_bytes()  # type: ignore[union-attr]
    # Reference: Python's gzip module (RFC 1952). Brotli at quality 11 is not measured on a
    # gzip budget, and the manifest says so.
    assert manifest["bytes"] == {
        "raw": len(data),
        "gzip": len(gzip.compress(data, compresslevel=9, mtime=0)),
        "brotli": None,
    }
    assert manifest["notes"] == [
        "brotli not measured: the budget is on gzip (brotli at quality 11 is slow); a brotli "
        "budget, [output] precompress = true or reduce ladder --exact measures it"
    ]
    assert len(manifest["frontier"]) == len(out.fit.candidates)
    assert sum(c["chosen"] for c in manifest["frontier"]) == 1


def test_a_brotli_budget_measures_the_chosen_level_on_brotli_and_a_gzip_budget_never_does(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(tmp_path)
    recipe = project(tmp_path)
    out = reduce.run(recipe, budget="9KB", on="brotli", use_cache=False)
    assert out.path is not None and out.manifest is not None
    data = out.path.read_bytes()
    # References: the brotli module (RFC 7932) and Python's gzip module (RFC 1952).
    assert out.manifest["bytes"] == {
        "raw": len(data),
        "gzip": len(gzip.compress(data, compresslevel=9, mtime=0)),
        "brotli": len(brotli.compress(data, quality=11)),
    }
    assert out.manifest["bytes"]["brotli"] <= 9000 and "notes" not in out.manifest

    def no_brotli_11(data: bytes) -> bytes:
        raise AssertionError("brotli quality 11 run on a gzip budget")

    monkeypatch.setattr("reduce.sizes.brotli_bytes", no_brotli_11)
    for budget in ("15KB", None):  # a gzip budget, and the recipe's own
        gz = reduce.run(recipe, budget=budget, out_dir=tmp_path / "gz", use_cache=False)
        assert gz.manifest is not None and gz.manifest["bytes"]["brotli"] is None


def test_refit_with_another_budget_reuses_the_cached_partial(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    recipe = project(tmp_path)
    first = reduce.ladder(recipe, budget="30KB")
    again = reduce.ladder(recipe, budget="10KB", on="brotli")
    assert not first.partial_from_cache
    assert again.partial_from_cache
    # Changing the source invalidates the cache entry.
    (tmp_path / "events.parquet").write_bytes((tmp_path / "events.parquet").read_bytes())
    import os

    os.utime(tmp_path / "events.parquet", ns=(1, 1))
    third = reduce.ladder(recipe, budget="10KB")
    assert not third.partial_from_cache


def test_frontier_is_a_polars_frame_with_one_row_per_candidate(tmp_path: Path) -> None:
    recipe = project(tmp_path)
    res = reduce.fit(recipe, budget="12KB", use_cache=False)
    f = res.frontier
    assert f.columns == [
        "hex",
        "time",
        "top",
        "digits",
        "rows",
        "elements",
        "raw",
        "gzip",
        "brotli",
        "fits",
        "chosen",
    ]
    assert f.height == len(res.candidates)
    assert f.get_column("chosen").sum() == 1


# --- judging levels before measuring them exactly ------------------------------------------------


@pytest.mark.parametrize(
    "prune_table",
    [
        'top = { k = [4, 2, 1], by = "reports" }',  # ranked within every other key: counted
        'top = { k = [4, 2, 1], by = "reports", within = ["hex"] }',  # narrower: built in full
        'top = { k = [4, 2, 1], by = "reports" }\nmin_count = 3',  # suppression: built in full
    ],
)
def test_row_count_equals_the_rows_of_every_level(tmp_path: Path, prune_table: str) -> None:
    text = HEX_RECIPE.replace('top = { k = [4, 2, 1], by = "reports" }', prune_table)
    recipe = reduce.load_recipe(project(tmp_path, text))
    counted = Reducer(recipe, use_cache=False)
    built = Reducer(recipe, use_cache=False)
    for level in all_levels(recipe.ladder()):
        assert counted.row_count(level) == built.rows(level).frame.height, level


@given(data=st.data())
@settings(
    max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
def test_quick_look_bounds_the_exact_size_and_never_contradicts_it(
    hex_reducer: Reducer, data: st.DataObject
) -> None:
    level = data.draw(st.sampled_from(all_levels(hex_reducer.recipe.ladder())))
    on = data.draw(st.sampled_from(["raw", "gzip", "brotli"]))
    payload = hex_reducer.payload(level)
    exact = size_on(payload, on)  # type: ignore[arg-type]
    limit = data.draw(st.integers(max(1, exact // 3), exact * 3))
    look = quick_look(payload, on, limit)  # type: ignore[arg-type]
    assert look.floor <= exact
    if look.fits is not None:
        assert look.fits == (exact <= limit)


@pytest.mark.parametrize("guess", [0.8, 1.3])
def test_wrong_close_calls_anywhere_on_the_ladder_never_change_the_choice(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, guess: float
) -> None:
    """A close call a fast compression cannot settle is judged by its guess for the search
    (measure.CLOSE_GUESS); made too pessimistic (1.3: every such level looks 30% bigger) or
    too optimistic (0.8), the search must still choose what measuring every level exactly
    chooses: doubtful verdicts are measured exactly before a choice stands."""
    import numpy as np

    from reduce import measure
    from tests._builders import random_events, write_case

    rng = np.random.default_rng(3)
    events = random_events(rng, 40_000, span_days=28, lat=(10.0, 11.5), lon=(20.0, 21.5))
    path = write_case(
        tmp_path,
        events,
        source={"time": "t", "lat": "lat", "lon": "lon"},
        group={
            "hex": {"levels": [9, 8, 6, 5]},
            "time": {"levels": ["1d", "1w"], "zone": "UTC"},
            "category": {"column": "kind"},
        },
        measures={"n": "count", "sx": {"sum": "x"}},
        prune={"top": {"k": [3, 1], "by": "n"}},
        budget={"max": "50KB", "on": "gzip", "order": ["top", "time", "hex"]},
    )
    monkeypatch.setitem(measure.CLOSE_GUESS, "gzip", guess)
    for budget in ["30KB", "50KB", "95KB"]:
        fit = reduce.fit(path, budget=budget, use_cache=False)
        exact = reduce.ladder(path, budget=budget, use_cache=False)
        assert fit.level == exact.level, budget
