"""Rates per 100,000 and location quotients against hand-worked handbook examples.

Outside sources:
- Crude rate = events / population × 100,000 (crude rate definition, e.g. standard
  epidemiology texts (from memory)). Worked example: 250 events in a population of 1,250,000
  give 250 / 1,250,000 × 100,000 = 20.0 per 100,000.
- Location quotient LQ_ij = (e_ij / e_j) / (E_i / E): the share of category i in region j
  over its share in all regions (the standard regional-analysis ratio, e.g. regional
  economics textbooks (from memory)). LQ > 1 means the category is over-represented there.
- RFC 8259: JSON has no NaN or Infinity.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import polars as pl
import pytest

import reduce
from tests._builders import payload_frame, write_case


def _no_nan_loads(data: bytes) -> dict[str, Any]:
    def refuse(token: str) -> Any:
        raise AssertionError(f"payload holds {token}, which RFC 8259 JSON does not allow")

    return json.loads(data, parse_constant=refuse)


def _events(counts: dict[tuple[str, str], int]) -> pl.DataFrame:
    prov, kind = [], []
    for (p, k), n in counts.items():
        prov += [p] * n
        kind += [k] * n
    return pl.DataFrame({"prov": prov, "kind": kind})


# --------------------------------------------------------------------------------------------
# Crude rates per 100,000
# --------------------------------------------------------------------------------------------

RATE_EVENTS = {
    ("north", "a"): 200,
    ("north", "b"): 50,
    ("south", "a"): 3,
    ("east", "a"): 40,
    ("west", "b"): 5,
}
POPULATION = {"prov": ["north", "south", "east", "hills"], "pop": [1_250_000, 7_000, 0, 80_000]}


def _rate_recipe(folder: Path, *, by_kind: bool) -> Path:
    group: dict[str, Any] = {"region": {"column": "prov"}}
    if by_kind:
        group["category"] = {"column": "kind"}
    return write_case(
        folder,
        _events(RATE_EVENTS),
        group=group,
        measures={"n": "count"},
        normalize={
            "denominators": {"path": "pop.csv", "key": "prov", "value": "pop"},
            "per": 100000,
            "measures": ["n"],
        },
        output={"path": "out/rates.json", "digits": 6},
        denominators=POPULATION,
    )


def test_crude_rate_per_100000_matches_worked_example(tmp_path: Path) -> None:
    res = reduce.run(_rate_recipe(tmp_path, by_kind=False), use_cache=False)
    assert res.path is not None
    rows = {r["prov"]: r for r in payload_frame(_no_nan_loads(res.path.read_bytes())).to_dicts()}
    # Worked example: 250 / 1,250,000 × 100,000 = 20.0.
    assert rows["north"]["n"] == 250
    assert rows["north"]["n_per_100000"] == pytest.approx(20.0, abs=1e-9)
    # 3 / 7,000 × 100,000 = 42.857142857... (rounded to the recipe's 6 digits).
    assert rows["south"]["n_per_100000"] == pytest.approx(42.857143, abs=1e-9)


def test_rate_of_each_category_row_uses_its_regions_population(tmp_path: Path) -> None:
    res = reduce.fit(_rate_recipe(tmp_path, by_kind=True), use_cache=False)
    assert res.payload is not None
    rows = {
        (r["prov"], r["kind"]): r["n_per_100000"]
        for r in payload_frame(_no_nan_loads(res.payload)).to_dicts()
    }
    assert rows[("north", "a")] == pytest.approx(200 / 1_250_000 * 100_000)  # 16.0
    assert rows[("north", "b")] == pytest.approx(50 / 1_250_000 * 100_000)  # 4.0


@pytest.mark.parametrize("by_kind", [False, True])
def test_zero_or_missing_denominator_gives_null_and_is_counted(
    tmp_path: Path, by_kind: bool
) -> None:
    res = reduce.run(_rate_recipe(tmp_path, by_kind=by_kind), use_cache=False)
    assert res.path is not None and res.manifest is not None
    frame = payload_frame(_no_nan_loads(res.path.read_bytes()))
    rates = frame.select("prov", "n_per_100000").to_dicts()
    # east has population 0, west has no denominator row: both null, never inf or NaN.
    for r in rates:
        if r["prov"] in ("east", "west"):
            assert r["n_per_100000"] is None, r
        else:
            assert r["n_per_100000"] is not None and r["n_per_100000"] > 0, r
    expected_missing = sum(1 for r in rates if r["prov"] in ("east", "west"))
    assert expected_missing == 2  # east (and east/a), west (and west/b)
    den = res.manifest["denominators"]
    assert den["rows_without_denominator"] == expected_missing
    # Keys only in the data / only in the denominators are reported.
    assert den["data_only_keys"] == ["west"]
    assert den["denominator_only_keys"] == ["hills"]
    # The same report is on the fit result.
    assert res.fit.rows is not None
    assert res.fit.rows.report.rows_without_denominator == expected_missing


def test_rate_per_other_base_scales_linearly(tmp_path: Path) -> None:
    # Crude rate per 1,000 = events / population × 1,000: 250 / 1,250,000 × 1,000 = 0.2.
    path = write_case(
        tmp_path,
        _events(RATE_EVENTS),
        group={"region": {"column": "prov"}},
        measures={"n": "count"},
        normalize={
            "denominators": {"path": "pop.csv", "key": "prov", "value": "pop"},
            "per": 1000,
            "measures": ["n"],
        },
        output={"path": "out/r.json", "digits": 6},
        denominators=POPULATION,
    )
    res = reduce.fit(path, use_cache=False)
    assert res.payload is not None
    rows = {r["prov"]: r for r in payload_frame(_no_nan_loads(res.payload)).to_dicts()}
    assert rows["north"]["n_per_1000"] == pytest.approx(0.2)
    assert "n_per_100000" not in rows["north"]


# --------------------------------------------------------------------------------------------
# Location quotient
# --------------------------------------------------------------------------------------------

# Hand-worked table (events by region j and category i):
#
#            x     y   | e_j
#   A       30    10   |  40
#   B       20    50   |  70
#   C       10     -   |  10
#   ---------------------------
#   E_i     60    60   | E = 120
#
# LQ_ij = (e_ij / e_j) / (E_i / E) = e_ij · E / (e_j · E_i):
#   LQ(A,x) = 30·120 / (40·60) = 3600 / 2400 = 1.5
#   LQ(A,y) = 10·120 / (40·60) = 1200 / 2400 = 0.5
#   LQ(B,x) = 20·120 / (70·60) = 2400 / 4200 = 4/7  ≈ 0.571429
#   LQ(B,y) = 50·120 / (70·60) = 6000 / 4200 = 10/7 ≈ 1.428571
#   LQ(C,x) = 10·120 / (10·60) = 1200 /  600 = 2.0
LQ_EVENTS = {("A", "x"): 30, ("A", "y"): 10, ("B", "x"): 20, ("B", "y"): 50, ("C", "x"): 10}
LQ_EXPECTED = {
    ("A", "x"): 1.5,
    ("A", "y"): 0.5,
    ("B", "x"): 4 / 7,
    ("B", "y"): 10 / 7,
    ("C", "x"): 2.0,
}


def test_location_quotient_matches_hand_worked_table(tmp_path: Path) -> None:
    path = write_case(
        tmp_path,
        _events(LQ_EVENTS),
        group={"region": {"column": "prov"}, "category": {"column": "kind"}},
        measures={"n": "count"},
        normalize={"location_quotient": {"measure": "n"}},
        output={"path": "out/lq.json", "digits": 6},
    )
    res = reduce.fit(path, use_cache=False)
    assert res.payload is not None
    got = {
        (r["prov"], r["kind"]): r["n_lq"]
        for r in payload_frame(_no_nan_loads(res.payload)).to_dicts()
    }
    assert set(got) == set(LQ_EXPECTED)
    for key, lq in LQ_EXPECTED.items():
        assert got[key] == pytest.approx(lq, abs=5e-7), key  # 6 digits in the payload


def test_location_quotient_is_computed_within_each_time_bin(tmp_path: Path) -> None:
    # Day 1 holds the hand-worked table; day 2 holds A/x 5, B/y 5, so on day 2
    # LQ(A,x) = 5·10 / (5·5) = 2.0 and LQ(B,y) = 2.0.
    day1 = _events(LQ_EVENTS).with_columns(pl.datetime(2024, 5, 1, 12, time_zone="UTC").alias("t"))
    day2 = _events({("A", "x"): 5, ("B", "y"): 5}).with_columns(
        pl.datetime(2024, 5, 2, 12, time_zone="UTC").alias("t")
    )
    path = write_case(
        tmp_path,
        pl.concat([day1, day2]),
        source={"time": "t"},
        group={
            "time": {"bin": "1d", "zone": "UTC"},
            "region": {"column": "prov"},
            "category": {"column": "kind"},
        },
        measures={"n": "count"},
        normalize={"location_quotient": {"measure": "n"}},
        output={"path": "out/lq.json", "digits": 6},
    )
    res = reduce.fit(path, use_cache=False)
    assert res.payload is not None
    rows = payload_frame(_no_nan_loads(res.payload)).to_dicts()
    t1 = min(r["time"] for r in rows)
    got1 = {(r["prov"], r["kind"]): r["n_lq"] for r in rows if r["time"] == t1}
    got2 = {(r["prov"], r["kind"]): r["n_lq"] for r in rows if r["time"] != t1}
    for key, lq in LQ_EXPECTED.items():
        assert got1[key] == pytest.approx(lq, abs=5e-7), key
    assert got2 == {("A", "x"): pytest.approx(2.0), ("B", "y"): pytest.approx(2.0)}
