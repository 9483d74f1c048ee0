"""Recipe validation: every bad key gives one message naming the file, the key and the fix."""

from __future__ import annotations

from pathlib import Path

import pytest

from reduce.errors import RecipeError
from reduce.recipe import load_recipe, parse_time_bin
from tests._builders import HEX_RECIPE, REGION_RECIPE, write_recipe


@pytest.fixture(autouse=True)
def _cwd(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)


def error_of(tmp_path: Path, text: str) -> str:
    path = write_recipe(tmp_path, text)
    with pytest.raises(RecipeError) as exc:
        load_recipe(path)
    msg = str(exc.value)
    assert "\n" not in msg
    return msg


def test_valid_recipe_loads_into_frozen_dataclasses(tmp_path: Path) -> None:
    r = load_recipe(write_recipe(tmp_path, HEX_RECIPE))
    assert r.name == "hexmap"
    assert r.hex is not None and r.hex.levels == (8, 7, 6, 5)
    assert r.time is not None and [b.text for b in r.time.levels] == ["1h", "1d", "1w"]
    assert r.top is not None and r.top.ks == (4, 2, 1)
    assert r.budget is not None and (r.budget.max, r.budget.on) == (40000, "gzip")
    assert r.budget.order == ("top", "time", "hex", "digits")
    assert r.ladder() == {
        "hex": (8, 7, 6, 5),
        "time": ("1h", "1d", "1w"),
        "top": (4, 2, 1),
        "digits": (4,),
    }
    with pytest.raises(AttributeError):
        r.name = "x"  # type: ignore[misc]


def test_paths_resolve_relative_to_the_recipe_file(tmp_path: Path) -> None:
    r = load_recipe(write_recipe(tmp_path / "sub", REGION_RECIPE))
    assert Path(r.source.path) == tmp_path / "sub" / "events.parquet"
    assert r.normalize is not None and r.normalize.denominators is not None
    assert r.normalize.denominators.path == tmp_path / "sub" / "pop.csv"
    assert r.output.path == tmp_path / "sub" / "out" / "regions.json"


def test_same_document_gives_same_hash_and_overrides_change_it(tmp_path: Path) -> None:
    p = write_recipe(tmp_path, HEX_RECIPE)
    a, b = load_recipe(p), load_recipe(p)
    c = load_recipe(p, overrides={"budget.max": "20KB"})
    assert a.content_hash == b.content_hash != c.content_hash
    assert a.scan_hash == c.scan_hash  # a budget change reuses the cached partial
    assert c.budget is not None and c.budget.max == 20000


BAD = [
    (
        "unknown top-level key",
        ('name = "hexmap"', 'name = "hexmap"\nnmae = 1'),
        "recipe.toml: nmae: unknown key (did you mean 'name'?); allowed here: name, description, "
        "source, group, measures, normalize, prune, budget, output",
    ),
    (
        "wrong type",
        ('name = "hexmap"', "name = 5"),
        "recipe.toml: name: must be a non-empty string, got an integer 5",
    ),
    (
        "empty ladder",
        ("levels = [8, 7, 6, 5]", "levels = []"),
        "recipe.toml: group.hex.levels: is empty; list at least one level, finest first",
    ),
    (
        "ladder not finest first",
        ("levels = [8, 7, 6, 5]", "levels = [5, 6]"),
        "recipe.toml: group.hex.levels: must go from finest to coarsest (strictly decreasing "
        "resolutions), but 5 is followed by 6",
    ),
    (
        "hex resolution out of range",
        ("levels = [8, 7, 6, 5]", "levels = [16, 7]"),
        "recipe.toml: group.hex.levels[0]: 16 is not an H3 resolution; use an integer 0..15",
    ),
    (
        "unknown time unit",
        ('"1h", "1d", "1w"', '"1h", "1fortnight"'),
        "recipe.toml: group.time.levels[1]: '1fortnight' is not a time bin; use minutes, hours, "
        "days, weeks, months or years such as 15m, 1h, 6h, 1d, 1w, 1mo, 1y",
    ),
    (
        "time bins that do not nest",
        ('"1h", "1d", "1w"', '"1d", "1w", "1mo"'),
        "recipe.toml: group.time.levels: 1mo bins are not made of whole 1w bins, so they cannot "
        "be rolled up exactly; drop one",
    ),
    (
        "time bins coarsest first",
        ('"1h", "1d", "1w"', '"1d", "1h"'),
        "recipe.toml: group.time.levels: must go from finest to coarsest, but 1d is followed by 1h",
    ),
    (
        "k below one",
        ("k = [4, 2, 1]", "k = [4, 0]"),
        "recipe.toml: prune.top.k: 0 is out of range; use >= 1",
    ),
    (
        "zero budget",
        ('max = "40KB"', "max = 0"),
        "recipe.toml: budget.max: 0 is not a positive size; a budget must be above zero bytes",
    ),
    (
        "negative budget",
        ('max = "40KB"', "max = -5"),
        "recipe.toml: budget.max: -5 is not a positive size; a budget must be above zero bytes",
    ),
    (
        "bad budget text",
        ('max = "40KB"', 'max = "40 kilos"'),
        "recipe.toml: budget.max: '40 kilos' is not a size; use e.g. 300KB, 1.5MB, 200KiB or "
        "250000",
    ),
    (
        "unknown measure for the budget",
        ('on = "gzip"', 'on = "zip"'),
        "recipe.toml: budget.on: 'zip' is not a measure (did you mean 'gzip'?); use raw, gzip "
        "or brotli",
    ),
    (
        "order names an axis that is not there",
        ('order = ["top", "time", "hex"]', 'order = ["top", "region"]'),
        "recipe.toml: budget.order: 'region' is not a ladder axis of this recipe; use some of "
        "hex, time, top, digits",
    ),
    (
        "duplicate measure names",
        ('reports = "count"', 'reports = "count"\nreports = 1'),
        "recipe.toml: TOML syntax error: Cannot overwrite a value (at line 16, column 12)",
    ),
    (
        "unknown measure kind",
        ('observers = { distinct = "who" }', 'observers = { distinc = "who" }'),
        "recipe.toml: measures.observers.distinc: unknown measure kind (did you mean "
        "'distinct'?); use one of sum, min, max, mean, distinct (or \"count\")",
    ),
    (
        "measure named like a key",
        ('reports = "count"', 'kind = "count"'),
        "recipe.toml: measures.kind: has the same name as a key column; rename the measure",
    ),
    (
        "top-k by an unknown measure",
        ('by = "reports"', 'by = "report"'),
        "recipe.toml: prune.top.by: 'report' is not a declared measure (did you mean 'reports'?)",
    ),
    (
        "missing lat for a hex key",
        ('lat = "lat"\n', ""),
        "recipe.toml: source.lat: is required when grouping by hex cell; name the coordinate "
        "column",
    ),
    (
        "no source",
        ("[source]", "[sourc]"),
        "recipe.toml: sourc: unknown key (did you mean 'source'?); allowed here: name, "
        "description, source, group, measures, normalize, prune, budget, output",
    ),
    (
        "filter with no condition",
        ('lon = "lon"', 'lon = "lon"\nfilter = [{ column = "kind" }]'),
        "recipe.toml: source.filter[0]: has no condition; add one of in, not_in, min, max, null",
    ),
    (
        "filter min above max",
        ('lon = "lon"', 'lon = "lon"\nfilter = [{ column = "sev", min = 5, max = 2 }]'),
        "recipe.toml: source.filter[0]: min 5 is above max 2; swap them",
    ),
    (
        "bad layout",
        ('path = "out/hexmap.json"', 'path = "out/hexmap.json"\nlayout = "colums"'),
        "recipe.toml: output.layout: 'colums' is not a layout (did you mean 'columns'?); use one "
        "of columns, rows, csv, geojson",
    ),
    (
        "digits ladder not decreasing",
        ('path = "out/hexmap.json"', 'path = "out/hexmap.json"\ndigits = [1, 2]'),
        "recipe.toml: output.digits: must go from most decimals to fewest, but 1 is followed by 2",
    ),
]


@pytest.mark.parametrize(
    ("change", "expected"), [(b[1], b[2]) for b in BAD], ids=[b[0] for b in BAD]
)
def test_bad_recipe_gives_exact_message(
    tmp_path: Path, change: tuple[str, str], expected: str
) -> None:
    old, new = change
    assert old in HEX_RECIPE
    assert error_of(tmp_path, HEX_RECIPE.replace(old, new, 1)) == expected


def test_rates_without_denominators_are_refused(tmp_path: Path) -> None:
    text = REGION_RECIPE.replace(
        'denominators = { path = "pop.csv", key = "prov", value = "pop" }\n', ""
    )
    assert error_of(tmp_path, text) == (
        "recipe.toml: normalize.measures: rates need denominators; add normalize.denominators "
        "= { path = ..., key = ..., value = ... }"
    )


def test_rates_of_a_distinct_measure_are_refused(tmp_path: Path) -> None:
    text = REGION_RECIPE.replace('measures = ["reports"]', 'measures = ["observers"]')
    assert error_of(tmp_path, text) == (
        "recipe.toml: normalize.measures[0]: measure 'observers' is not a count or a sum; only "
        "additive measures can be normalised"
    )


def test_a_missing_recipe_file_is_one_error(tmp_path: Path) -> None:
    with pytest.raises(
        RecipeError,
        match=r"^nope.toml: recipe file not found; check the "
        r"path$",
    ):
        load_recipe(tmp_path / "nope.toml")


@pytest.mark.parametrize(
    ("text", "minutes"),
    [("15m", 15), ("1h", 60), ("6h", 360), ("1d", 1440), ("1w", 10080), ("1mo", None)],
)
def test_time_bins_parse_to_their_width(text: str, minutes: int | None) -> None:
    assert parse_time_bin(text).minutes == minutes
    assert parse_time_bin(text).text == text


def test_time_bin_that_does_not_divide_its_unit_is_refused() -> None:
    with pytest.raises(ValueError, match="does not divide its parent unit evenly"):
        parse_time_bin("7m")


@pytest.mark.parametrize(
    ("coarse", "fine", "expected"),
    [
        ("1h", "15m", True),
        ("1d", "1h", True),
        ("1w", "1d", True),
        ("1mo", "1d", True),
        ("3mo", "1mo", True),
        ("1y", "3mo", True),
        ("1mo", "1w", False),
        ("1d", "1mo", False),
        ("1h", "1d", False),
        ("6h", "4h", False),
    ],
)
def test_a_time_bin_nests_in_another_only_when_whole_bins_fit(
    coarse: str, fine: str, expected: bool
) -> None:
    assert parse_time_bin(coarse).nests(parse_time_bin(fine)) is expected


def _year_of_offsets(zone: str) -> list[float]:
    """UTC offsets at noon UTC of each day of 2025 (IANA tz database via zoneinfo)."""
    import datetime as dt
    from zoneinfo import ZoneInfo

    start = dt.datetime(2025, 1, 1, 12, tzinfo=dt.UTC)
    return [
        (start + dt.timedelta(days=i)).astimezone(ZoneInfo(zone)).utcoffset().total_seconds()
        for i in range(365)
    ]  # type: ignore[union-attr]


@pytest.mark.parametrize(
    "given, meant, hint",
    [
        ("PST", ["America/Los_Angeles", "Asia/Manila"], "'America/Tijuana' or 'Asia/Manila'"),
        ("UTC-8", ["Etc/GMT+8"], "'Etc/GMT+8'"),
        ("UTC+5:30", ["Asia/Kolkata"], "'Asia/Kolkata'"),
        ("Europe/Pari", ["Europe/Paris"], "'Europe/Paris'"),
    ],
)
def test_zone_hints_name_only_zones_on_the_same_clock(
    tmp_path: Path, given: str, meant: list[str], hint: str
) -> None:
    from click.testing import CliRunner

    from reduce.cli import main

    recipe = write_recipe(tmp_path, HEX_RECIPE.replace('zone = "UTC"', f'zone = "{given}"'))
    res = CliRunner().invoke(main, ["check", str(recipe)])
    assert res.exit_code == 2
    assert res.stderr.strip().endswith(
        f"group.time.zone: unknown time zone {given!r} (did you mean {hint}?); use an IANA "
        "name such as UTC or Europe/Paris"
    )
    named = [h.strip("'") for h in hint.split(" or ")]
    # each hint keeps the clock of the zone meant: same offsets every day (zoneinfo)
    assert [_year_of_offsets(n) for n in named] == [_year_of_offsets(m) for m in meant]


def test_zone_hint_never_suggests_a_different_clock(tmp_path: Path) -> None:
    from reduce.recipe import zone_hint

    assert "MST" not in zone_hint("PST") and zone_hint("UTC-8") != " (did you mean 'UTC'?)"
    assert zone_hint("Nowhere") == ""
