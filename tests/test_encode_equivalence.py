"""The encoder and the ranking, rewritten for speed, give the same bytes and ranks as the
implementations they replaced (kept in ``tests/reference`` as the references).

Random frames shaped like a level's finalized rows (hex cell, time bin, region, category,
measures and a derived column) with nulls, -0.0, NaN and infinities, huge and tiny floats,
integers near 2^53, hostile and non-ASCII strings, and empty frames, in every layout, at
several digits, inline or not: every payload must be byte-identical.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import string
from typing import Any

import h3
import orjson
import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from reference import encode_v1, prune_v1

from reduce import aggregate, encode, prune
from reduce.recipe import Recipe, load_recipe

RECIPE = """
name = "equivalence"
[source]
path = "events.parquet"
time = "ts"
lat = "lat"
lon = "lon"
[group]
hex = { levels = [7, 6] }
time = { levels = ["1h", "1d"] }
region = { column = "region" }
category = { column = "kind" }
[measures]
events = "count"
total = { sum = "value" }
average = { mean = "value" }
low = { min = "who" }
[prune]
top = { k = [3, 1], rest = "other" }
[output]
path = "out.json"
"""

MAX_SAFE = 2**53
# Valid cells at two resolutions, a few of them near the antimeridian and the poles.
CELLS = sorted(
    {
        h3.str_to_int(h3.latlng_to_cell(lat, lon, res))
        for lat in (-89.9, -45.0, 0.0, 12.5, 60.0, 89.9)
        for lon in (-179.99, -60.0, 0.0, 33.3, 179.99)
        for res in (6, 7)
    }
)
# ASCII letters, every character orjson escapes, HTML-sensitive ones, line and paragraph
# separators, non-BMP characters, and the surrogate neighbours U+D7FF / U+E000.
HOSTILE = string.ascii_letters + '"\\/<>&\x00\x01\x1f\x7f\n\t\u2028\u2029é漢\U0001f600\ud7ff\ue000'
texts = st.text(alphabet=HOSTILE, max_size=6)
labels = st.sampled_from(["a", "b", "B", "é", "漢字", 'q"t', "x\\y", "tab\t", "", "\U0001f600"])
floats = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True, allow_subnormal=True),
    st.sampled_from([-0.0, 0.0, 1e16, 1e-7, 5e-324, 1.7976931348623157e308, 2.0**53, 0.5]),
    st.floats(min_value=-1e6, max_value=1e6),
)
safe_ints = st.one_of(
    st.integers(-MAX_SAFE, MAX_SAFE), st.sampled_from([MAX_SAFE, -MAX_SAFE, MAX_SAFE - 1, 0])
)


def _nullable(s: st.SearchStrategy[Any], nulls: bool) -> st.SearchStrategy[Any]:
    return st.one_of(st.none(), s) if nulls else s


@st.composite
def frames(draw: st.DrawFn) -> pl.DataFrame:
    n = draw(st.integers(0, 30))
    nulls = draw(st.booleans())

    def column(s: st.SearchStrategy[Any], *, nullable: bool = True) -> list[Any]:
        return draw(st.lists(_nullable(s, nulls and nullable), min_size=n, max_size=n))

    odd_cells = draw(st.booleans())  # a null or invalid cell: the fallback writes null
    cell = st.sampled_from(CELLS) | (st.integers(0, 2**64 - 1) if odd_cells else st.nothing())
    start = dt.datetime(2025, 1, 1, tzinfo=dt.UTC)
    return pl.DataFrame(
        {
            "time": pl.Series(
                [
                    start + dt.timedelta(hours=h)
                    for h in column(st.integers(-(10**5), 10**5), nullable=False)
                ],
                dtype=pl.Datetime("us", "UTC"),
            ),
            "hex": pl.Series(column(cell, nullable=odd_cells), dtype=pl.UInt64),
            "region": pl.Series(column(draw(st.sampled_from([labels, texts]))), dtype=pl.String),
            "kind": pl.Series(column(draw(st.sampled_from([labels, texts]))), dtype=pl.String),
            "__n": pl.Series(column(st.integers(1, 10**6), nullable=False), dtype=pl.Int64),
            "events": pl.Series(column(safe_ints), dtype=pl.Int64),
            "total": pl.Series(column(floats), dtype=pl.Float64),
            "average": pl.Series(
                column(floats), dtype=draw(st.sampled_from([pl.Float64, pl.Float32]))
            ),
            "low": pl.Series(column(safe_ints), dtype=draw(st.sampled_from([pl.Int64, pl.Int128]))),
            "events_share": pl.Series(column(floats), dtype=pl.Float64),
        }
    )


@pytest.fixture(scope="module")
def recipe(tmp_path_factory: pytest.TempPathFactory) -> Recipe:
    folder = tmp_path_factory.mktemp("equivalence")
    (folder / "recipe.toml").write_text(RECIPE)
    return load_recipe(folder / "recipe.toml")


def _both(recipe: Recipe, df: pl.DataFrame, digits: int) -> tuple[Any, Any]:
    kw: dict[str, Any] = dict(
        level={"hex": 7, "time": "1h", "top": 3, "digits": digits},
        accounting={"input_rows": 5, "represented_rows": 5},
        digits=digits,
        meta={"rest": "other", "time_zone": "UTC"},
        geometry=lambda plain: [{"type": "Point", "coordinates": [0.0, 0.0]}] * plain.height,
    )

    def run(module: Any) -> Any:
        try:
            return module.encode(recipe, df, **kw)
        except Exception as e:  # failing alike counts as the same result
            # (only the type is compared: polars names whichever column failed first)
            return type(e).__name__

    return run(encode), run(encode_v1)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    df=frames(),
    layout=st.sampled_from(["columns", "rows", "csv", "geojson"]),
    digits=st.integers(0, 6),
    inline=st.booleans(),
)
def test_every_layout_gives_the_bytes_of_the_reference_encoder(
    recipe: Recipe, df: pl.DataFrame, layout: str, digits: int, inline: bool
) -> None:
    r = dataclasses.replace(
        recipe, output=dataclasses.replace(recipe.output, layout=layout, inline=inline)
    )
    new, old = _both(r, df, digits)
    assert new == old


def _measures(n: int, total: float = 0.5) -> dict[str, list[Any]]:
    return {"events": [1] * n, "total": [total] * n, "average": [2.0] * n, "low": [3] * n}


def test_the_reference_comparison_sees_a_difference(recipe: Recipe) -> None:
    """The check above can fail: a frame whose float differs in the last digit encodes
    differently (guards against comparing a function with itself)."""
    a = pl.DataFrame(_measures(1, 0.1))
    b = pl.DataFrame(_measures(1, 0.1000001))
    assert isinstance(_both(recipe, a, 7)[0], bytes)
    assert _both(recipe, a, 7)[0] != _both(recipe, b, 7)[1]


def test_a_dictionary_is_used_exactly_when_the_reference_uses_one(recipe: Recipe) -> None:
    """Repeated labels make a dictionary; all-distinct labels do not (then the column is
    plain strings), as before."""
    df = pl.DataFrame(
        {
            "region": ["x", "y", "z", "w", "v", "u"],
            "kind": ["bb", "a", "bb", None, "bb", "a"],
            **_measures(6),
        }
    )
    new, old = _both(recipe, df, 2)
    assert new == old
    doc = orjson.loads(new)
    assert doc["dictionaries"] == {"kind": ["a", "bb"]}
    assert doc["columns"]["kind"] == [1, 0, 1, None, 1, 0]
    assert doc["columns"]["region"] == ["x", "y", "z", "w", "v", "u"]


# ------------------------------------------------------------------------------ ranking


@st.composite
def partials(draw: st.DrawFn) -> pl.DataFrame:
    """A partial's table at one level: unique (time, hex, kind) rows with counts."""
    keys = draw(
        st.lists(
            st.tuples(st.integers(0, 3), st.sampled_from(CELLS[:4]), labels),
            unique=True,
            max_size=60,
        )
    )
    n = len(keys)
    counts = draw(st.lists(st.integers(1, 4), min_size=n, max_size=n))  # many ties
    # a float sum's fixed-point total and its count of values (0: the sum is null)
    sums = draw(st.lists(st.sampled_from([-(2**41), 0, 2**40, 3 * 2**40]), min_size=n, max_size=n))
    values = draw(st.lists(st.integers(0, 2), min_size=n, max_size=n))
    start = dt.datetime(2025, 1, 1, tzinfo=dt.UTC)
    return pl.DataFrame(
        {
            "time": pl.Series(
                [start + dt.timedelta(hours=k[0]) for k in keys], dtype=pl.Datetime("us", "UTC")
            ),
            "hex": pl.Series([k[1] for k in keys], dtype=pl.UInt64),
            "kind": pl.Series([k[2] for k in keys], dtype=pl.String),
            "__n": pl.Series(counts, dtype=pl.Int64),
            "__fsum_total": pl.Series(sums, dtype=pl.Int128),
            "__cnt_total": pl.Series(values, dtype=pl.Int64),
        }
    )


def _partial(recipe: Recipe, table: pl.DataFrame) -> aggregate.Partial:
    return aggregate.Partial(
        keys=("time", "hex", "kind"),
        table=table,
        pairs={},
        hex_res=7,
        time_bin=None,
        accounting=aggregate.Accounting(input_rows=0, filtered_rows=0, invalid_rows=0),
    )


@pytest.fixture(scope="module")
def ranked_recipe(tmp_path_factory: pytest.TempPathFactory) -> Recipe:
    folder = tmp_path_factory.mktemp("ranking")
    text = (
        RECIPE.replace('region = { column = "region" }\n', "")
        .replace('low = { min = "who" }', "")
        .replace('average = { mean = "value" }\n', "")
    )
    (folder / "recipe.toml").write_text(text)
    return load_recipe(folder / "recipe.toml")


@settings(max_examples=200, deadline=None)
@given(
    table=partials(),
    k=st.integers(1, 4),
    within=st.sampled_from([("hex", "time"), ("time",), ()]),
    by=st.sampled_from(["events", "total"]),
)
def test_ranks_top_k_and_row_order_equal_the_reference(
    ranked_recipe: Recipe, table: pl.DataFrame, k: int, within: tuple[str, ...], by: str
) -> None:
    """Ranked by a count (one packed integer key) or by a float sum with nulls and ties
    (the columns sorted as they are), within every key, one key or none."""
    assert ranked_recipe.top is not None
    top = dataclasses.replace(ranked_recipe.top, within=within, by=by)
    r = dataclasses.replace(ranked_recipe, top=top)
    p = _partial(r, table)
    ranks = prune.rank_rows(r, p)
    assert ranks.to_list() == prune_v1.rank_rows(r, p).to_list()
    new = aggregate.finalize(r, prune.top_k(r, p, k, ranks))
    old = aggregate.finalize(r, prune_v1.top_k(r, p, k))
    assert encode.sort_rows(r, new).equals(encode_v1.sort_rows(r, old))
