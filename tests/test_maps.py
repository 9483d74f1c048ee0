"""Map-ready payloads through the pipeline: regions from boundaries, GeoJSON, flows."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest
import shapely

import reduce
from reduce.maps.geojson import ring_area
from tests._builders import FIXTURES, write_recipe


def _squares(folder: Path) -> Path:
    """Four unit squares tiling [0, 2] x [0, 2] degrees, ids A..D (A bottom-left):
    fixtures/squares.geojson."""
    path = folder / "squares.geojson"
    path.write_bytes((FIXTURES / "squares.geojson").read_bytes())
    return path


def _points(folder: Path, n: int = 4000, seed: int = 3) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    df = pl.DataFrame(
        {
            "lat": rng.uniform(-0.2, 2.0, n),  # some below the squares: outside
            "lon": rng.uniform(0.0, 2.0, n),
            "kind": rng.choice(["x", "y", "z"], n),
            "from_town": rng.choice(["T1", "T2", "T3", "T4", "T5"], n),
            "to_town": rng.choice(["T1", "T2", "T3", "T4", "T5"], n),
        }
    )
    df.write_parquet(folder / "ev.parquet")
    pl.DataFrame({"code": ["A", "B", "C", "D"], "pop": [1000, 2000, 0, 4000]}).write_csv(
        folder / "pop.csv"
    )
    return df


REGION = """
name = "squares"
[source]
path = "ev.parquet"
lat = "lat"
lon = "lon"
[group]
region = {{ boundaries = "squares.geojson", id = "code", name = "square"{outside} }}
[measures]
n = "count"
[normalize]
denominators = {{ path = "pop.csv", key = "code", value = "pop" }}
per = 100000
measures = ["n"]
[output]
path = "out/squares.geojson"
layout = "geojson"
"""


@pytest.fixture(autouse=True)
def _cache(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)


def test_points_outside_every_polygon_are_counted_as_unassigned(tmp_path: Path) -> None:
    _squares(tmp_path)
    df = _points(tmp_path)
    res = reduce.run(write_recipe(tmp_path, REGION.format(outside="")))
    doc = json.loads(res.path.read_bytes())  # type: ignore[union-attr]
    acc = doc["reduce"]["accounting"]
    outside = int((df["lat"] < 0).sum())
    assert acc["unassigned_rows"] == outside > 0
    assert acc["input_rows"] == (
        acc["filtered_rows"]
        + acc["invalid_rows"]
        + acc["unassigned_rows"]
        + acc["suppressed_rows"]
        + acc["represented_rows"]
    )
    # Brute force with shapely: each feature's count equals the points its square covers
    # (boundary points go to the smallest id; random floats never hit an edge here).
    for f in doc["features"]:
        square = shapely.geometry.shape(f["geometry"])
        inside = int(shapely.covers(square, shapely.points(df["lon"], df["lat"])).sum())
        assert f["properties"]["n"] == inside


def test_outside_label_keeps_points_as_an_explicit_region(tmp_path: Path) -> None:
    _squares(tmp_path)
    df = _points(tmp_path)
    res = reduce.run(write_recipe(tmp_path, REGION.format(outside=', outside = "sea"')))
    doc = json.loads(res.path.read_bytes())  # type: ignore[union-attr]
    sea = [f for f in doc["features"] if f["properties"]["square"] == "sea"]
    assert len(sea) == 1 and sea[0]["geometry"] is None  # RFC 7946 §3.2: null geometry
    assert sea[0]["properties"]["n"] == int((df["lat"] < 0).sum())
    assert doc["reduce"]["accounting"]["unassigned_rows"] == 0


def test_geojson_payload_follows_rfc_7946(tmp_path: Path) -> None:
    _squares(tmp_path)
    _points(tmp_path)
    res = reduce.run(write_recipe(tmp_path, REGION.format(outside="")))
    doc = json.loads(res.path.read_bytes(), parse_constant=lambda c: pytest.fail(c))  # type: ignore[union-attr]
    assert doc["type"] == "FeatureCollection"
    for f in doc["features"]:
        ring = f["geometry"]["coordinates"][0]
        assert ring[0] == ring[-1]
        assert ring_area(ring) > 0  # §3.1.6: exterior rings counter-clockwise
        assert all(0 <= x <= 2 and 0 <= y <= 2 for x, y in ring)  # longitude first
    props = {f["properties"]["square"]: f["properties"] for f in doc["features"]}
    assert props["C"]["n_per_100000"] is None  # zero population: null, never inf
    assert props["A"]["n_per_100000"] == pytest.approx(props["A"]["n"] / 1000 * 100000)


def test_audit_recognises_the_geojson_payload(tmp_path: Path) -> None:
    from click.testing import CliRunner

    from reduce.cli import main

    _squares(tmp_path)
    _points(tmp_path)
    res = reduce.run(write_recipe(tmp_path, REGION.format(outside="")))
    out = CliRunner().invoke(main, ["audit", str(res.path), "--json"])
    assert out.exit_code == 0, out.stderr
    report = json.loads(out.stdout)
    assert report["files"][0]["kind"] == "geojson"
    assert report["files"][0]["elements"] == 4


FLOWS = """
name = "flows"
[source]
path = "ev.parquet"
[group]
flow = {{ origin = "from_town", destination = "to_town" }}
[measures]
n = "count"
[prune]
top = {{ k = [{k}] }}
[output]
path = "out/flows.json"
"""


@pytest.mark.parametrize("k", [25, 10, 3, 1])
def test_flows_keep_top_pairs_and_conserve_the_total(tmp_path: Path, k: int) -> None:
    df = _points(tmp_path)
    res = reduce.run(write_recipe(tmp_path, FLOWS.format(k=k)))
    doc = json.loads(res.path.read_bytes())  # type: ignore[union-attr]
    cols = doc["columns"]
    dicts = doc.get("dictionaries", {})
    origin = [dicts["origin"][i] for i in cols["origin"]] if "origin" in dicts else cols["origin"]
    dest = (
        [dicts["destination"][i] for i in cols["destination"]]
        if "destination" in dicts
        else cols["destination"]
    )
    assert sum(cols["n"]) == df.height  # totals conserved, remainder row included
    pairs = df.group_by("from_town", "to_town").len()
    kept = [(o, d) for o, d in zip(origin, dest) if (o, d) != ("other", "other")]
    assert len(kept) == min(k, pairs.height)
    top = pairs.sort(["len", "from_town", "to_town"], descending=[True, False, False]).head(k)
    assert set(kept) == set(zip(top["from_town"], top["to_town"]))


def test_flows_from_coordinates_use_hex_cells(tmp_path: Path) -> None:
    import h3

    rng = np.random.default_rng(5)
    n = 500
    df = pl.DataFrame(
        {
            "a_lat": rng.uniform(10, 11, n),
            "a_lon": rng.uniform(20, 21, n),
            "b_lat": rng.uniform(10, 11, n),
            "b_lon": rng.uniform(20, 21, n),
        }
    )
    df.write_parquet(tmp_path / "ev.parquet")
    recipe = write_recipe(
        tmp_path,
        """
        name = "hexflows"
        [source]
        path = "ev.parquet"
        [group]
        flow = { origin = { lat = "a_lat", lon = "a_lon" }, destination = { lat = "b_lat", lon = "b_lon" }, hex = 4 }
        [output]
        path = "out/hexflows.json"
        layout = "rows"
        """,
    )
    res = reduce.run(recipe)
    rows = json.loads(res.path.read_bytes())  # type: ignore[union-attr]
    # Reference: the h3 bindings index each end directly.
    want: dict[tuple[str, str], int] = {}
    for r in df.iter_rows(named=True):
        key = (
            h3.latlng_to_cell(r["a_lat"], r["a_lon"], 4),
            h3.latlng_to_cell(r["b_lat"], r["b_lon"], 4),
        )
        want[key] = want.get(key, 0) + 1
    assert {(r["origin"], r["destination"]): r["count"] for r in rows} == want


def test_simplification_is_a_ladder_axis_under_the_budget(tmp_path: Path) -> None:
    from reduce.demo import ensure_scenario

    demo = ensure_scenario(rows=20_000, dest=tmp_path / "demo")
    recipe = write_recipe(
        tmp_path,
        f"""
        name = "choro"
        [source]
        path = "{demo}/events/*.parquet"
        lat = "lat"
        lon = "lon"
        [group]
        region = {{ boundaries = "{demo}/provinces.geojson", id = "code" }}
        [output]
        layout = "geojson"
        simplify = [0.0, 0.002, 0.01]
        coordinate_digits = [6, 4]
        """,
    )
    full = reduce.ladder(recipe, every_level=True)
    sizes = {(c.level["simplify"], c.level["coords"]): c.gzip for c in full.candidates}
    assert sizes[(0.0, 6)] > sizes[(0.002, 6)] > sizes[(0.01, 6)]
    assert sizes[(0.01, 6)] > sizes[(0.01, 4)]
    budget = sizes[(0.002, 6)]
    fit = reduce.fit(recipe, budget=budget)
    assert fit.level is not None and fit.level["simplify"] == 0.002
    assert fit.chosen is not None and fit.chosen.gzip is not None and fit.chosen.gzip <= budget


def test_flows_split_by_a_category_match_duckdb(tmp_path: Path) -> None:
    """Outside source: DuckDB GROUP BY over (origin, destination, kind) gives the counts."""
    import duckdb

    df = _points(tmp_path)
    recipe = write_recipe(
        tmp_path,
        FLOWS.format(k=1000).replace(
            'destination = "to_town" }', 'destination = "to_town" }\ncategory = { column = "kind" }'
        ),
    )
    res = reduce.run(recipe)
    doc = json.loads(res.path.read_bytes())  # type: ignore[union-attr]
    cols, dicts = doc["columns"], doc.get("dictionaries", {})

    def values(name: str) -> list[str]:
        return [dicts[name][i] for i in cols[name]] if name in dicts else cols[name]

    got = dict(zip(zip(values("origin"), values("destination"), values("kind")), cols["n"]))
    con = duckdb.connect()
    con.register("ev", df.to_arrow())
    want = {
        (o, d, k): n
        for o, d, k, n in con.execute(
            "SELECT from_town, to_town, kind, count(*) FROM ev GROUP BY ALL"
        ).fetchall()
    }
    assert got == want
    assert list(cols)[:3] == ["origin", "destination", "kind"]


def test_flow_category_named_like_a_flow_end_is_refused(tmp_path: Path) -> None:
    _points(tmp_path)
    recipe = write_recipe(
        tmp_path,
        FLOWS.format(k=3).replace(
            'destination = "to_town" }',
            'destination = "to_town" }\ncategory = { column = "origin" }',
        ),
    )
    with pytest.raises(reduce.RecipeError, match="column 'origin' has the name of another key"):
        reduce.load_recipe(recipe)
