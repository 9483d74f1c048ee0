"""Levels judged by a sample of their cells: the search steers on them, the published level is
always measured exactly, a wrong estimate never publishes a level over the budget, and what
a sample showed is kept in the store so a re-fit does not sample again.

The sample thresholds are lowered here so that the small test tables are sampled (the
defaults sample only levels of 100,000 rows and more). The reference for every size is the
exact measurement of the same level (``reduce.ladder``, which measures every level exactly).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

import reduce
from reduce import levels, measure, pipeline, report, tables
from reduce.budget import all_levels, level_key
from reduce.levels import Level
from reduce.sizes import gzip_bytes, parse_size
from tests._builders import SAMPLED_LADDER, lower_sample_thresholds, random_events, write_case


@pytest.fixture(autouse=True)
def _sample_small_levels(monkeypatch: pytest.MonkeyPatch) -> None:
    lower_sample_thresholds(monkeypatch)


def _case(tmp: Path, **kw: object) -> Path:
    rng = np.random.default_rng(11)
    events = random_events(rng, 30_000, span_days=60, lat=(10.0, 10.3), lon=(20.0, 20.3))
    spec: dict[str, object] = {
        "source": {"time": "t", "lat": "lat", "lon": "lon"},
        **SAMPLED_LADDER,
    }
    spec.update(kw)
    return write_case(tmp, events, **spec)  # type: ignore[arg-type]


def _exact_sizes(path: Path) -> dict[tuple[object, ...], int]:
    """Every level's exact gzip size (level 9, as Python's gzip), each built in full."""
    recipe = reduce.load_recipe(path)
    red = pipeline.Reducer(recipe, use_cache=False)
    return {
        level_key(lv): len(gzip_bytes(red.payload(Level.of(lv))))
        for lv in all_levels(recipe.ladder())
    }


def test_sample_mask_is_a_fixed_function_of_the_cell() -> None:
    cells = pl.Series("hex", [0x89283082803FFFF + 7 * i for i in range(5000)], dtype=pl.UInt64)
    t = pl.DataFrame({"hex": cells})
    a = tables.sample_mask(t, "hex", 8)
    b = tables.sample_mask(t.reverse(), "hex", 8).reverse()
    assert a.to_list() == b.to_list()  # row order does not matter, only the cell id
    assert 0.08 < a.mean() < 0.17  # about 1 in 8 of these cells  # type: ignore[operator]
    # Nested: a cell sampled at 1 in 16 is sampled at 1 in 8 (same key mod a prime).
    s16 = tables.sample_mask(t, "hex", 16)
    assert not (s16 & ~a).any()


@pytest.mark.parametrize("budget", ["30KB", "100KB", "150KB"])
def test_chosen_level_fits_exactly_and_sampled_verdicts_are_marked(
    tmp_path: Path, budget: str
) -> None:
    path = _case(tmp_path)
    res = reduce.run(path, out_dir=tmp_path / "out", budget=budget, use_cache=False)
    assert res.path is not None and res.manifest is not None
    limit = parse_size(budget)
    assert len(gzip_bytes(res.path.read_bytes())) <= limit
    sampled = [c for c in res.fit.candidates if "sample" in c.note]
    assert sampled, "the search judged no level by a sample"
    marked = {level_key(f["level"]) for f in res.manifest["frontier"] if f.get("estimated") is True}
    assert {level_key(c.level) for c in sampled} <= marked


def test_sample_estimates_are_close_to_the_exact_sizes(tmp_path: Path) -> None:
    path = _case(tmp_path)
    exact = _exact_sizes(path)
    res = reduce.fit(path, budget="60KB", use_cache=False)
    ratios = [
        c.guess / exact[level_key(c.level)]
        for c in res.candidates
        if "sample" in c.note and c.guess is not None
    ]
    assert ratios
    # The verdict needs the estimate on the right side of the limit by SAMPLE_MARGIN; on
    # this table every estimate is within 25% of the exact gzip size.
    assert all(0.75 <= q <= 1.25 for q in ratios), ratios


def test_a_sample_that_says_fits_wrongly_never_publishes_an_over_budget_level(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = _case(tmp_path)
    cold = reduce.run(path, out_dir=tmp_path / "cold", budget="100KB", use_cache=False)
    exact = _exact_sizes(path)
    real = measure.Measurer.sampled

    def optimist(
        self: measure.Measurer, level: object, on: str, limit: int, **kw: object
    ) -> object:
        c = real(self, level, on, limit, **kw)  # type: ignore[arg-type]
        if c is not None:
            c.fits, c.guess = True, 1  # every sampled level claims to fit
        return c

    monkeypatch.setattr(measure.Measurer, "sampled", optimist)
    res = reduce.run(path, out_dir=tmp_path / "liar", budget="100KB", use_cache=False)
    assert res.fit.level is not None
    assert exact[level_key(res.fit.level)] <= 100_000
    assert res.fit.chosen is not None and res.fit.chosen.gzip is not None
    assert res.fit.chosen.gzip <= 100_000
    # The recovery re-searched on exact verdicts and found the same level as an honest run.
    assert res.fit.level == cold.fit.level


def test_a_refit_replays_what_samples_showed_without_sampling_again(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = _case(tmp_path)
    first = reduce.run(path, out_dir=tmp_path / "first", budget="60KB")
    sampled = {level_key(c.level) for c in first.fit.candidates if "sample" in c.note}
    assert sampled

    def fail(*_a: object, **_k: object) -> None:
        raise AssertionError("a level sampled before was sampled again")

    monkeypatch.setattr(tables.LevelTables, "sample_rows", fail)
    again = reduce.run(path, out_dir=tmp_path / "again", budget="60KB")
    assert again.path is not None and first.path is not None
    assert again.path.read_bytes() == first.path.read_bytes()


def test_store_keeps_samples_and_learns_the_exact_to_estimate_ratio(tmp_path: Path) -> None:
    s = levels.Store(tmp_path, "x")
    assert s.ratio("gzip", 0.75) == 0.75  # nothing measured yet: the default
    for i, (est, exact) in enumerate([(1000, 700), (2000, 1600), (4000, 3000)]):
        lv = {"hex": 9 - i, "digits": 4}
        s.put_sample(lv, {"every": 8, "sample_rows": 10, "gzip": est})
        s.put(levels.Record(level=lv, rows=1, elements=1, raw=10, sha256=str(i), gzip=exact))
    assert s.ratio("gzip", 0.75) == pytest.approx(0.75)  # median of 0.70, 0.80, 0.75
    s.save()
    back = levels.Store(tmp_path, "x")
    assert back.sample({"hex": 9, "digits": 4}) == {"every": 8, "sample_rows": 10, "gzip": 1000}
    assert back.ratio("gzip", 0.5) == pytest.approx(0.75)


@pytest.mark.parametrize("budget", ["30KB", "100KB", "150KB"])
def test_close_finer_neighbours_of_the_choice_are_measured_exactly(
    tmp_path: Path, budget: str
) -> None:
    path = _case(tmp_path)
    res = reduce.fit(path, budget=budget, use_cache=False)
    assert res.level is not None
    limit = parse_size(budget)
    ladder = reduce.load_recipe(path).ladder()
    by_key = {level_key(c.level): c for c in res.candidates}
    exact = _exact_sizes(path)
    for axis, lv in ladder.items():
        i = list(lv).index(res.level[axis])
        if i == 0:
            continue
        finer = res.level.with_(axis, lv[i - 1])
        c = by_key.get(level_key(finer))
        assert c is not None, f"the finer neighbour on {axis} was not evaluated"
        if c.gzip is None and not c.note.startswith(">"):
            # judged by cheap evidence only: allowed when its guess is clearly over
            assert c.guess is not None and c.guess > 1.1 * limit, (axis, c.note)
        if exact[level_key(finer)] <= limit:
            # A finer neighbour that fits can only be missed by evidence clearly over (the
            # search's estimates steer; the 10% rule bounds how far they can mislead).
            assert c.gzip is None and c.guess is not None and c.guess > 1.1 * limit, axis


def test_a_large_level_is_sampled_without_counting_its_rows_and_says_so(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = _case(tmp_path)
    recipe = reduce.load_recipe(path)
    exact_rows = {
        level_key(lv): pipeline.Reducer(recipe, use_cache=False).rows(Level.of(lv)).frame.height
        for lv in all_levels(recipe.ladder())
    }
    counted: list[tuple[object, ...]] = []
    real_count = tables.LevelTables._count_rows

    def spy(self: tables.LevelTables, level: dict[str, object]) -> int:
        counted.append(level_key(level))
        return real_count(self, level)

    monkeypatch.setattr(tables.LevelTables, "_count_rows", spy)
    lines: list[str] = []
    res = reduce.run(
        path, out_dir=tmp_path / "out", budget="60KB", use_cache=False, progress=lines.append
    )
    uncounted = [c for c in res.fit.candidates if c.rows_estimated]
    assert uncounted, "no level was judged by a sample alone"
    for c in uncounted:
        k = level_key(c.level)
        assert k not in counted  # no pass over the partial counted its rows
        assert c.estimated and "sample" in c.note and c.fits is not None
        # The rows estimated from the sample: within 25% of the exact count on this table
        # (the sample is a fixed share of the cells; their rows vary).
        assert 0.75 <= c.rows / exact_rows[k] <= 1.25, (c.level, c.rows, exact_rows[k])
    # A pilot sample as thin as the cells allow comes first, then (when the estimated rows
    # allow no thinner one) the sample the verdict is taken from.
    assert any(line.startswith("sampling 1 in ") for line in lines)
    assert res.manifest is not None
    marked = {level_key(f["level"]) for f in res.manifest["frontier"] if f.get("rows_estimated")}
    assert marked == {level_key(c.level) for c in uncounted}
    # The ladder marks those rows as estimates, and --exact counts them.
    table = report.ladder_table(res.fit)
    for c in uncounted:
        assert f"~{c.rows:,}" in table
    exact = reduce.ladder(path, budget="60KB", use_cache=False)
    assert not any(c.rows_estimated for c in exact.candidates)
    # The published level is the same as when every level is measured exactly.
    assert res.fit.level == exact.level


@pytest.mark.parametrize(
    "variant",
    [
        {},  # top-k within every non-category key
        {"prune": {"top": {"k": [4, 2], "by": "n", "within": ["time"]}}},
        {"prune": {"top": {"k": [4, 2], "by": "n"}, "min_count": {"min": 3, "fold": True}}},
        {  # no top-k: every category of a group is a row
            "prune": {},
            "budget": {"max": "60KB", "on": "gzip", "order": ["time", "hex"]},
        },
        {
            "group": {
                "hex": {"levels": [8, 7, 6]},
                "time": {"levels": ["1h", "1d", "1w"], "zone": "UTC"},
                "region": {"column": "region"},
                "category": {"column": "kind"},
            }
        },
    ],
    ids=["top", "top-within-time", "min-count", "no-top", "region"],
)
def test_rows_at_most_bounds_the_rows_of_every_level(tmp_path: Path, variant: dict) -> None:
    """The bound from distinct keys alone (cells x bins x other keys x at most k + 1
    categories) is never below a level's rows, built in full."""
    path = _case(tmp_path, **variant)
    recipe = reduce.load_recipe(path)
    red = pipeline.Reducer(recipe, use_cache=False)
    tight = 0
    for lv in all_levels(recipe.ladder()):
        level = Level.of(lv)
        rows = red.rows(level).frame.height
        most = red.rows_at_most(level)
        assert most is not None and most >= rows, (lv, most, rows)
        tight += most < 4 * rows
    assert tight  # not vacuous: the bound is within 4x of the rows at some levels


def test_a_level_too_small_to_sample_is_not_sampled(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A level whose rows are bounded under the sample threshold by its distinct keys is
    built in full without a pilot sample first (the pilot would only say it is small)."""
    path = _case(tmp_path)
    piloted: list[Level] = []
    real = tables.LevelTables.sample_rows

    def spy(self: tables.LevelTables, level: Level, every: int) -> pl.DataFrame:
        piloted.append(Level.of(level))
        return real(self, level, every)

    monkeypatch.setattr(tables.LevelTables, "sample_rows", spy)
    bounds: dict[Level, int] = {}
    real_bound = tables.LevelTables.rows_at_most

    def note(self: tables.LevelTables, level: Level) -> int | None:
        most = real_bound(self, level)
        assert most is not None
        bounds[Level.of(level)] = most
        return most

    monkeypatch.setattr(tables.LevelTables, "rows_at_most", note)
    res = reduce.fit(path, budget="60KB", use_cache=False)
    small = {lv for lv, most in bounds.items() if most < tables.SAMPLE_MIN_LEVEL_ROWS}
    assert small, "no level evaluated had a bound under the sample threshold"
    assert not small & set(piloted)
    assert piloted, "no level was sampled at all"
    evaluated = {c.level for c in res.candidates}
    assert small <= evaluated
    assert res.level == reduce.ladder(path, budget="60KB", use_cache=False).level
