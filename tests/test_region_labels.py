"""Region labels: a polygon property carried into payloads (group.region.label).

Outside source: RFC 7946 (GeoJSON): §3.2 a Feature's "properties" member is a JSON object;
§3.3 a FeatureCollection's "features" is an array of Features.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from tests._builders import FIXTURES, invoke, write_recipe

NAMES = {"A": "Avra", "B": "Brell", "C": "Cosk", "D": "Dunmere"}


@pytest.fixture(autouse=True)
def _in_tmp(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)


def _case(
    folder: Path,
    layout: str,
    label: str = "name",
    names: dict[str, object] | None = None,
    outside: str = "",
) -> Path:
    doc = json.loads((FIXTURES / "squares.geojson").read_bytes())  # codes A..D, names
    for f in doc["features"]:
        f["properties"]["name"] = (names or NAMES).get(f["properties"]["code"])
    (folder / "squares.geojson").write_text(json.dumps(doc))
    rng = np.random.default_rng(4)
    n = 3000
    pl.DataFrame({"lat": rng.uniform(-0.2, 2.0, n), "lon": rng.uniform(0.0, 2.0, n)}).write_parquet(
        folder / "ev.parquet"
    )
    ext = {"geojson": "geojson", "csv": "csv"}.get(layout, "json")
    return write_recipe(
        folder,
        f"""
        name = "squares"
        [source]
        path = "ev.parquet"
        lat = "lat"
        lon = "lon"
        [group]
        region = {{ boundaries = "squares.geojson", id = "code", name = "square", label = "{label}"{outside} }}
        [measures]
        n = "count"
        [output]
        path = "out/squares.{ext}"
        layout = "{layout}"
        """,
    )


def test_geojson_features_carry_the_label_property(tmp_path: Path) -> None:
    recipe = _case(tmp_path, "geojson")
    code, _, err = invoke("run", str(recipe), "--quiet")
    assert code == 0, err
    doc = json.loads((tmp_path / "out" / "squares.geojson").read_bytes())
    assert doc["type"] == "FeatureCollection" and isinstance(doc["features"], list)  # §3.3
    seen = {}
    for f in doc["features"]:
        assert f["type"] == "Feature" and isinstance(f["properties"], dict)  # §3.2
        seen[f["properties"]["square"]] = f["properties"]["square_label"]
    assert seen == NAMES


def test_columns_payload_carries_a_label_column(tmp_path: Path) -> None:
    recipe = _case(tmp_path, "columns", outside=', outside = "sea"')
    code, _, err = invoke("run", str(recipe), "--quiet")
    assert code == 0, err
    doc = json.loads((tmp_path / "out" / "squares.json").read_bytes())
    cols, dicts = doc["columns"], doc.get("dictionaries", {})

    def values(name: str) -> list[object]:
        v = cols[name]
        return [dicts[name][i] if i is not None else None for i in v] if name in dicts else v

    assert list(cols)[:2] == ["square", "square_label"]
    pairs = dict(zip(values("square"), values("square_label")))
    assert pairs == {**NAMES, "sea": None}  # "sea" is no polygon: no label


def test_rows_and_csv_layouts_carry_the_label(tmp_path: Path) -> None:
    recipe = _case(tmp_path, "csv")
    code, _, err = invoke("run", str(recipe), "--quiet")
    assert code == 0, err
    text = (tmp_path / "out" / "squares.csv").read_text().splitlines()
    assert text[0] == "square,square_label,n"
    assert {tuple(line.split(",")[:2]) for line in text[1:]} == set(NAMES.items())


def test_feature_without_the_label_property_is_exit_2(tmp_path: Path) -> None:
    recipe = _case(tmp_path, "columns", names={"A": "Avra", "B": None, "C": "Cosk", "D": "D"})
    code, _, err = invoke("check", str(recipe))
    assert code == 2
    assert err.strip() == (
        "error: squares.geojson: feature 1 ('B') has no text 'name' property "
        "(group.region.label); give every feature one or name another "
        "property"
    )


def test_label_on_a_region_column_is_refused(tmp_path: Path) -> None:
    recipe = write_recipe(
        tmp_path,
        """
        name = "x"
        [source]
        path = "ev.parquet"
        [group]
        region = { column = "prov", label = "name" }
        """,
    )
    code, _, err = invoke("check", str(recipe))
    assert code == 2
    assert err.strip() == "error: recipe.toml: group.region.label: applies to boundaries only"
