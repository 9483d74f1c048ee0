"""Category codes in label order change no byte of any payload.

In memory the finest partial's text categories are an ``Enum`` of their labels sorted by
code point, with the top-k rest label among them (``aggregate.with_label_codes``). Every
payload must be the bytes the text columns gave: rows sorted as by their labels, ties in
rankings broken by labels, the rest row after its group's categories, suppression folding
into the rest. The reference is each run with the codes turned off.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

import reduce
from reduce import aggregate, pipeline
from reduce.budget import all_levels
from reduce.levels import Level
from tests._builders import random_events, write_case

# Labels whose code-point order differs from a locale's or a case-folded order, with the
# rest label ("m") sorting among them, not last.
KINDS = ("Zeta", "alpha", "m2", "é", "日本", "Ω", "a b", "ábc", "Alpha", "0")


def _case(tmp: Path, prune: dict[str, object]) -> Path:
    rng = np.random.default_rng(5)
    events = random_events(
        rng, 6000, span_days=20, kinds=KINDS, lat=(10.0, 10.2), lon=(20.0, 20.2), who=25
    )
    return write_case(
        tmp,
        events,
        source={"time": "t", "lat": "lat", "lon": "lon"},
        group={
            "hex": {"levels": [8, 6]},
            "time": {"levels": ["1d", "1w"], "zone": "UTC"},
            "category": {"column": "kind"},
        },
        measures={"n": "count", "who_n": {"distinct": "who"}, "sx": {"sum": "x"}},
        prune=prune,
    )


PRUNES = {
    "top": {"top": {"k": [3, 1], "by": "n", "rest": "m"}},
    "top-within-time": {"top": {"k": [3, 1], "by": "who_n", "rest": "m", "within": ["time"]}},
    "min-count-fold": {
        "top": {"k": [4, 2], "by": "n", "rest": "m"},
        "min_count": {"min": 3, "by": "who_n", "fold": True},
    },
    "min-count": {"min_count": {"min": 4}},
}


@pytest.mark.parametrize("prune", list(PRUNES.values()), ids=list(PRUNES))
def test_every_level_is_the_same_bytes_with_and_without_codes(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, prune: dict[str, object]
) -> None:
    path = _case(tmp_path, prune)
    recipe = reduce.load_recipe(path)
    coded = pipeline.Reducer(recipe, use_cache=False)
    finest = coded.finest()
    assert isinstance(finest, aggregate.Partial)
    dtype = finest.table.schema["kind"]
    assert isinstance(dtype, pl.Enum)  # the codes are in use
    labels = dtype.categories.to_list()
    assert labels == sorted(labels)  # in code-point order
    assert (recipe.top is None) or recipe.top.rest in labels

    monkeypatch.setattr(aggregate, "with_label_codes", lambda _r, p: p)
    plain = pipeline.Reducer(recipe, use_cache=False)
    assert plain.finest().table.schema["kind"] == pl.String
    levels = all_levels(recipe.ladder())
    assert len(levels) > 1
    for lv in levels:
        level = Level.of(lv)
        assert coded.payload(level) == plain.payload(level), lv
