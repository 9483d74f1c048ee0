"""The Level type and the store of measured levels (reduce.levels), and the fast-compression
verdict that a stored record replays (reduce.sizes.quick_verdict).

Outside source: Python's ``zlib``/``gzip`` and the ``brotli`` module for the lengths a record
keeps (RFC 1952 gzip framing: 18 bytes of header and trailer, from memory).
"""

from __future__ import annotations

import gzip
import zlib
from pathlib import Path

import orjson
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from reduce import levels
from reduce.levels import Level, Record, Store
from reduce.sizes import quick_look, quick_verdict


def test_a_level_reads_like_a_mapping_of_the_axes_it_has_in_axis_order() -> None:
    lv = Level.of({"digits": 2, "hex": 7, "time": "1d"})
    assert list(lv) == ["hex", "time", "digits"]
    assert dict(lv) == {"hex": 7, "time": "1d", "digits": 2}
    assert lv["hex"] == 7 and lv.get("top") is None and len(lv) == 3
    with pytest.raises(KeyError):
        lv["top"]
    assert lv == {"hex": 7, "time": "1d", "digits": 2}  # equal to the same plain mapping
    assert lv.with_("hex", 6) == Level(hex=6, time="1d", digits=2)
    assert {lv: 1}[Level.of(dict(lv))] == 1  # hashable by value
    assert orjson.dumps(dict(lv)) == b'{"hex":7,"time":"1d","digits":2}'


@pytest.mark.parametrize(
    ("bad", "message"),
    [
        ({"hexes": 7}, "not a ladder axis: hexes"),
        ({"hex": "7"}, "level axis 'hex': '7' is not a int"),
        ({"top": True}, "level axis 'top': True is not a int"),
    ],
)
def test_a_level_refuses_unknown_axes_and_wrong_types(bad: dict[str, object], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        Level.of(bad)


def _record(**kw: object) -> Record:
    base: dict[str, object] = {
        "level": {"hex": 7},
        "rows": 10,
        "elements": 10,
        "raw": 1000,
        "sha256": "0" * 64,
    }
    return Record(**{**base, **kw})  # type: ignore[arg-type]


def test_a_record_settles_a_verdict_only_from_exact_lengths_or_certain_floors() -> None:
    exact = _record(gzip=400)
    assert exact.verdict("gzip", 400) is True and exact.verdict("gzip", 399) is False
    assert exact.verdict("raw", 999) is False and exact.verdict("raw", 1000) is True
    floor = _record(gzip_floor=501)  # an exact compression stopped once over 500
    assert floor.verdict("gzip", 500) is False
    assert floor.verdict("gzip", 600) is None  # not settled: measure
    assert _record().verdict("brotli", 10**9) is None


def test_records_of_one_level_merge_their_knowledge() -> None:
    a = _record(gzip=400, gzip_fast=520)
    b = _record(brotli=350, gzip_floor=300)
    m = a.merge(b)
    assert (m.gzip, m.brotli, m.gzip_fast, m.gzip_floor) == (400, 350, 520, 300)


def test_a_store_round_trips_and_checks_kept_payloads(tmp_path: Path) -> None:
    s = Store(tmp_path, "x")
    rec = _record(sha256=__import__("hashlib").sha256(b"payload bytes").hexdigest(), gzip=5)
    s.put(rec)
    s.put_count({"hex": 5}, 42)
    s.keep_payload({"hex": 7}, b"payload bytes")
    s.save()
    again = Store(tmp_path, "x")
    assert again.get({"hex": 7}) == again.records[levels.level_id({"hex": 7})]
    assert again.count({"hex": 5}) == 42 and again.count({"hex": 7}) == 10
    assert again.payload({"hex": 7}) == b"payload bytes"
    kept = next(tmp_path.glob("payload-x-*.z"))
    kept.write_bytes(zlib.compress(b"other bytes"))  # no longer the recorded sha256
    assert Store(tmp_path, "x").payload({"hex": 7}) is None
    (tmp_path / "levels-x.json").write_bytes(b"\x00garbage")
    assert Store(tmp_path, "x").records == {}  # a store that does not parse is empty


def test_the_store_name_ignores_the_budget_but_not_the_rest() -> None:
    doc = {"name": "r", "group": {"hex": {"levels": [7, 6]}}, "budget": {"max": 100}}
    same = levels.store_hash({**doc, "budget": {"max": 999}})
    assert levels.store_hash(doc) == same
    assert levels.store_hash({**doc, "output": {"digits": [3]}}) != same
    assert levels.store_hash(doc, "denominators changed") != same


@settings(max_examples=60, deadline=None)
@given(
    data=st.binary(min_size=0, max_size=4000),
    limit=st.integers(1, 6000),
    other=st.integers(1, 6000),
)
def test_a_stored_fast_length_replays_the_quick_verdict_for_any_limit(
    data: bytes, limit: int, other: int
) -> None:
    # The lengths a quick look took at one limit give, at any other limit, the verdict a
    # quick look on the bytes would give (a re-fit replays it without the payload).
    first = quick_look(data, "gzip", limit)
    assert first.fast == len(zlib.compress(data, 1)) + 18 - 6
    again = quick_look(data, "gzip", other)
    replay = quick_verdict("gzip", other, first.fast, again.mid if first.mid is None else first.mid)
    assert replay.fits == again.fits
    # and a quick "fits" never contradicts the exact length (Python's gzip, level 9)
    if again.fits is True:
        assert len(gzip.compress(data, compresslevel=9, mtime=0)) <= other
