"""Tests of the deterministic demo scenario generator (``reduce._scenario``)."""

from __future__ import annotations

import csv
import hashlib
import json
import math
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest
import shapely

from reduce._scenario import ScenarioFiles, generate

ROWS = 20_000
SEED = 7

EVENT_COLUMNS: list[tuple[str, pl.DataType]] = [
    ("event_id", pl.Int64()),
    ("observed_at", pl.Datetime("us", "UTC")),
    ("lat", pl.Float64()),
    ("lon", pl.Float64()),
    ("province", pl.String()),
    ("town", pl.String()),
    ("kind", pl.String()),
    ("severity", pl.Int16()),
    ("confirmations", pl.Int32()),
    ("observer_id", pl.Int64()),
]
FORWARD_COLUMNS: list[tuple[str, pl.DataType]] = [
    ("sent_at", pl.Datetime("us", "UTC")),
    ("from_town", pl.String()),
    ("to_town", pl.String()),
    ("from_lat", pl.Float64()),
    ("from_lon", pl.Float64()),
    ("to_lat", pl.Float64()),
    ("to_lon", pl.Float64()),
]
KINDS = {
    "rain", "gust", "hail", "fog", "lightning", "funnel",
    "waterspout", "flood", "dust", "snow", "halo", "rainbow",
}  # fmt: skip
LON_MIN, LAT_MIN, LON_MAX, LAT_MAX = -122.0, -36.0, -117.0, -33.0
YEAR_START = pl.datetime(2025, 1, 1, time_zone="UTC")
YEAR_END = pl.datetime(2026, 1, 1, time_zone="UTC")


def digests(root: Path) -> dict[str, str]:
    return {
        p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(root.rglob("*"))
        if p.is_file()
    }


def great_circle_km(lat1: Any, lon1: Any, lat2: Any, lon2: Any) -> Any:
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dp, dl = p2 - p1, np.radians(lon2) - np.radians(lon1)
    h = np.sin(dp / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dl / 2) ** 2
    return 2 * 6371.0 * np.arcsin(np.sqrt(h))


def valid_coordinates() -> pl.Expr:
    return (
        pl.col("lat").is_not_null()
        & pl.col("lon").is_not_null()
        & pl.col("lat").is_not_nan()
        & pl.col("lon").is_not_nan()
        & pl.col("lat").abs().le(90)
        & pl.col("lon").abs().le(180)
    )


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory) -> ScenarioFiles:
    return generate(tmp_path_factory.mktemp("scenario"), rows=ROWS, seed=SEED)


@pytest.fixture(scope="module")
def events(scenario: ScenarioFiles) -> pl.DataFrame:
    return pl.concat([pl.read_parquet(p) for p in scenario.events])


@pytest.fixture(scope="module")
def geojson(scenario: ScenarioFiles) -> dict[str, Any]:
    data: dict[str, Any] = json.loads(scenario.provinces.read_text(encoding="utf-8"))
    return data


@pytest.fixture(scope="module")
def provinces(geojson: dict[str, Any]) -> dict[str, shapely.Polygon]:
    return {
        f["properties"]["code"]: shapely.geometry.shape(f["geometry"]) for f in geojson["features"]
    }


@pytest.fixture(scope="module")
def towns(scenario: ScenarioFiles) -> pl.DataFrame:
    return pl.read_csv(scenario.towns)


# ------------------------------------------------------------------------ determinism, files


def test_same_seed_and_rows_write_byte_identical_files(
    scenario: ScenarioFiles, tmp_path: Path
) -> None:
    again = generate(tmp_path / "again", rows=ROWS, seed=SEED)
    first, second = digests(scenario.root), digests(again.root)
    assert len(first) == 8
    assert first == second


def test_different_seed_changes_every_file(scenario: ScenarioFiles, tmp_path: Path) -> None:
    other = digests(generate(tmp_path / "other", rows=ROWS, seed=SEED + 1).root)
    mine = digests(scenario.root)
    assert other.keys() == mine.keys()
    assert [name for name in mine if mine[name] == other[name]] == []


def test_returned_paths_are_exactly_the_files_written(scenario: ScenarioFiles) -> None:
    root = scenario.root
    assert [p.relative_to(root).as_posix() for p in scenario.events] == [
        f"events/part-0{i}.parquet" for i in range(4)
    ]
    assert scenario.provinces == root / "provinces.geojson"
    assert scenario.population == root / "population.csv"
    assert scenario.towns == root / "towns.csv"
    assert scenario.forwards == root / "forwards.parquet"
    on_disk = {p for p in root.rglob("*") if p.is_file()}
    assert on_disk == set(scenario.all())  # and so no temporary file is left behind


def test_progress_callback_hears_every_written_file(tmp_path: Path) -> None:
    messages: list[str] = []
    generate(tmp_path, rows=2_000, seed=3, progress=messages.append)
    assert all(isinstance(m, str) and m for m in messages)
    joined = "\n".join(messages)
    for name in ("part-00.parquet", "part-03.parquet", "provinces.geojson", "forwards.parquet"):
        assert name in joined


@pytest.mark.parametrize("rows", [0, 999, -5])
def test_too_few_rows_are_rejected(tmp_path: Path, rows: int) -> None:
    with pytest.raises(ValueError, match="rows"):
        generate(tmp_path, rows=rows)
    assert not any(tmp_path.iterdir())


def test_negative_seed_is_rejected(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="seed"):
        generate(tmp_path, rows=ROWS, seed=-1)


def _torn_parquet(self: pl.DataFrame, file: Any, *args: Any, **kwargs: Any) -> None:
    Path(file).write_bytes(b"PAR1 torn")
    raise OSError("disk full")


def _torn_bytes(self: Path, data: bytes) -> int:
    with open(self, "wb") as fh:
        fh.write(data[: len(data) // 2])
    raise OSError("disk full")


@pytest.mark.parametrize("stage", ["parquet", "text"])
def test_failed_write_keeps_previous_files_whole_and_leaves_no_temporary(
    scenario: ScenarioFiles, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, stage: str
) -> None:
    copy = tmp_path / "copy"
    shutil.copytree(scenario.root, copy)
    before = digests(copy)
    if stage == "parquet":
        monkeypatch.setattr(pl.DataFrame, "write_parquet", _torn_parquet)
    else:
        monkeypatch.setattr(Path, "write_bytes", _torn_bytes)
    with pytest.raises(OSError, match="disk full"):
        generate(copy, rows=ROWS, seed=SEED + 1)
    monkeypatch.undo()
    after = digests(copy)
    if stage == "parquet":
        assert after == before  # the very first write failed: nothing was replaced
    else:
        # Event parts were replaced whole by the new seed's; the text files are untouched.
        assert {k: after[k] for k in before if not k.endswith(".parquet")} == {
            k: before[k] for k in before if not k.endswith(".parquet")
        }
        for part in sorted(copy.glob("events/*.parquet")):
            assert pl.read_parquet(part).height == ROWS // 4
    assert after.keys() == before.keys()


# ------------------------------------------------------------------------------- events


def test_every_event_part_has_the_exact_schema(scenario: ScenarioFiles) -> None:
    for part in scenario.events:
        assert list(pl.read_parquet_schema(part).items()) == EVENT_COLUMNS


def test_event_rows_total_rows_with_unique_ids_split_evenly(
    scenario: ScenarioFiles, events: pl.DataFrame
) -> None:
    assert events.height == ROWS
    assert events.get_column("event_id").n_unique() == ROWS
    assert events.get_column("event_id").null_count() == 0
    assert [pl.read_parquet(p).height for p in scenario.events] == [ROWS // 4] * 4


def test_events_are_sorted_by_observed_at_then_event_id_across_parts(
    events: pl.DataFrame,
) -> None:
    assert events.select(["observed_at", "event_id"]).equals(
        events.select(["observed_at", "event_id"]).sort(["observed_at", "event_id"])
    )


def test_observed_at_stays_within_2025_utc(events: pl.DataFrame) -> None:
    t = events.get_column("observed_at")
    assert t.null_count() == 0
    assert events.select((pl.col("observed_at") >= YEAR_START).all()).item()
    assert events.select((pl.col("observed_at") < YEAR_END).all()).item()


def test_reports_peak_in_the_local_afternoon_and_evening(events: pl.DataFrame) -> None:
    hour = events.select(
        pl.col("observed_at").dt.convert_time_zone("Etc/GMT+8").dt.hour()
    ).to_series()
    evening = int(hour.is_between(15, 20).sum())
    night = int(hour.is_between(0, 5).sum())
    assert evening > 3 * night


def test_valid_points_lie_inside_the_polygon_of_their_province(
    events: pl.DataFrame, provinces: dict[str, shapely.Polygon]
) -> None:
    valid = events.filter(valid_coordinates())
    assert valid.height > 0.99 * ROWS
    for code, group in valid.group_by("province"):
        poly = provinces[str(code[0])]
        inside = shapely.contains_xy(poly, group["lon"].to_numpy(), group["lat"].to_numpy())
        assert inside.all(), f"{(~inside).sum()} points outside province {code[0]}"
    lat, lon = valid["lat"].to_numpy(), valid["lon"].to_numpy()
    assert LAT_MIN < lat.min() <= lat.max() < LAT_MAX
    assert LON_MIN < lon.min() <= lon.max() < LON_MAX


def test_invalid_coordinates_are_rare_and_cover_null_nan_and_out_of_range(
    events: pl.DataFrame, provinces: dict[str, shapely.Polygon], towns: pl.DataFrame
) -> None:
    bad = events.filter(~valid_coordinates())
    assert 0.0005 * ROWS <= bad.height <= 0.002 * ROWS
    flaws = bad.select(
        null_lat=pl.col("lat").is_null().sum(),
        null_lon=pl.col("lon").is_null().sum(),
        nan=(pl.col("lat").is_nan() | pl.col("lon").is_nan()).sum(),
        out_of_range=(pl.col("lat").abs().gt(90) | pl.col("lon").abs().gt(180)).sum(),
    ).row(0, named=True)
    assert all(n >= 1 for n in flaws.values()), flaws
    assert set(bad["province"]) <= set(provinces)
    assert set(bad["town"]) <= set(towns["town"])
    assert bad["province"].null_count() == 0 and bad["town"].null_count() == 0


def test_town_is_the_nearest_town(events: pl.DataFrame, towns: pl.DataFrame) -> None:
    valid = events.filter(valid_coordinates())
    lat = valid["lat"].to_numpy()[:, None]
    lon = valid["lon"].to_numpy()[:, None]
    dist = great_circle_km(lat, lon, towns["lat"].to_numpy(), towns["lon"].to_numpy())
    index = {name: i for i, name in enumerate(towns["town"])}
    chosen = dist[np.arange(len(dist)), [index[t] for t in valid["town"]]]
    # The generator measures in a flat local frame; allow its few-percent distortion.
    assert (chosen <= dist.min(axis=1) * 1.05 + 0.01).all()


def test_events_cluster_around_towns_in_proportion_to_residents(
    events: pl.DataFrame, towns: pl.DataFrame
) -> None:
    counts = towns.join(events.group_by("town").len(), on="town", how="left").fill_null(0)
    r = np.corrcoef(np.log1p(counts["len"].to_numpy()), np.log(counts["residents"].to_numpy()))
    assert r[0, 1] > 0.5


def test_kinds_are_the_twelve_with_a_long_tail(events: pl.DataFrame) -> None:
    counts = events["kind"].value_counts(sort=True)
    assert set(counts["kind"]) == KINDS
    assert counts["kind"][0] == "rain"
    assert counts["count"][0] >= 10 * counts["count"][-1]
    assert counts["count"].head(3).sum() > 0.5 * ROWS


def test_storms_raise_bursts_of_hail_lightning_and_gust(events: pl.DataFrame) -> None:
    stormy = events.filter(pl.col("kind").is_in(["hail", "lightning", "gust"]))
    per_hour = stormy.group_by(pl.col("observed_at").dt.truncate("1h")).len()["len"]
    per_hour = per_hour.sort(descending=True)
    hours = 365 * 24
    # Spread evenly over the year (daily cycle included), the busiest 1% of hours would
    # hold about 7% of these reports and the busiest hour some 10 times the mean.
    assert per_hour.head(hours // 100).sum() > 0.1 * stormy.height
    assert per_hour[0] > 20 * stormy.height / hours


def test_severity_spans_one_to_five_and_draws_more_confirmations(events: pl.DataFrame) -> None:
    assert set(events["severity"]) == {1, 2, 3, 4, 5}
    assert events["confirmations"].min() >= 0  # type: ignore[operator]
    mean = events.group_by("severity").agg(pl.col("confirmations").mean()).sort("severity")
    assert mean["confirmations"].is_sorted()
    assert mean["confirmations"][-1] > 3 * mean["confirmations"][0]


def test_dangerous_kinds_are_reported_as_more_severe(events: pl.DataFrame) -> None:
    mean = dict(events.group_by("kind").agg(pl.col("severity").mean()).iter_rows())
    assert min(mean["funnel"], mean["hail"]) > max(mean["rainbow"], mean["halo"]) + 1.0


def test_observers_report_mostly_around_one_home_town(events: pl.DataFrame) -> None:
    per = (
        events.group_by("observer_id", "town")
        .len()
        .group_by("observer_id")
        .agg(share=pl.col("len").max() / pl.col("len").sum(), n=pl.col("len").sum())
        .filter(pl.col("n") >= 10)
    )
    assert per.height > 100
    assert per["share"].median() > 0.6  # type: ignore[operator]
    assert events["observer_id"].n_unique() <= 40_000


# ---------------------------------------------------------------------------- provinces


def test_provinces_tile_the_island_without_overlaps_or_gaps(
    provinces: dict[str, shapely.Polygon],
) -> None:
    polys = list(provinces.values())
    assert len(polys) == 12
    union = shapely.union_all(polys)
    total = sum(p.area for p in polys)
    assert math.isclose(union.area, total, rel_tol=1e-9)
    assert union.geom_type == "Polygon" and len(union.interiors) == 0
    lon_min, lat_min, lon_max, lat_max = union.bounds
    assert LON_MIN < lon_min < lon_max < LON_MAX
    assert LAT_MIN < lat_min < lat_max < LAT_MAX


def test_province_features_are_valid_counter_clockwise_rounded_polygons(
    geojson: dict[str, Any], provinces: dict[str, shapely.Polygon]
) -> None:
    assert geojson["type"] == "FeatureCollection"
    codes = [f["properties"]["code"] for f in geojson["features"]]
    assert len(set(codes)) == len(codes) == 12
    for feature in geojson["features"]:
        assert feature["type"] == "Feature"
        assert set(feature["properties"]) == {"code", "name"}
        code = feature["properties"]["code"]
        assert len(code) == 3 and code.isascii() and code.isalpha() and code.isupper()
        geometry = feature["geometry"]
        assert geometry["type"] == "Polygon" and len(geometry["coordinates"]) == 1
        ring = geometry["coordinates"][0]
        assert ring[0] == ring[-1] and len(ring) >= 4
        assert all(round(v, 6) == v for point in ring for v in point)
        poly = provinces[code]
        assert poly.is_valid, shapely.is_valid_reason(poly)
        assert poly.exterior.is_ccw


def test_neighbouring_provinces_meet_along_lines_never_over_areas(
    provinces: dict[str, shapely.Polygon],
) -> None:
    polys = list(provinces.values())
    shared = 0
    for i, a in enumerate(polys):
        for b in polys[i + 1 :]:
            border = a.intersection(b)
            if border.length > 0:  # neighbours touch along a line, never over an area
                assert border.area == 0
                shared += 1
    assert shared >= 12


def test_population_lists_every_province_once_with_positive_residents(
    scenario: ScenarioFiles, geojson: dict[str, Any]
) -> None:
    with scenario.population.open(newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == ["province", "name", "residents"]
    body = rows[1:]
    expected = {f["properties"]["code"]: f["properties"]["name"] for f in geojson["features"]}
    assert [r[0] for r in body] == sorted(expected)
    assert {r[0]: r[1] for r in body} == expected
    residents = [int(r[2]) for r in body]
    assert all(n > 0 for n in residents)
    assert 2_300_000 <= sum(residents) <= 2_700_000


# ------------------------------------------------------------------------ towns, forwards


def test_towns_are_unique_and_lie_in_their_province(
    towns: pl.DataFrame, provinces: dict[str, shapely.Polygon], events: pl.DataFrame
) -> None:
    assert towns.columns == ["town", "province", "lat", "lon", "residents"]
    assert 35 <= towns.height <= 45
    assert towns["town"].n_unique() == towns.height
    assert (towns["residents"] > 0).all()
    assert set(towns["province"]) == set(provinces)
    for town, code, lat, lon in towns.select("town", "province", "lat", "lon").iter_rows():
        assert provinces[code].contains(shapely.Point(lon, lat)), town
    assert set(events["town"]) <= set(towns["town"])


def test_forwards_have_the_schema_and_link_distinct_towns(
    scenario: ScenarioFiles, towns: pl.DataFrame
) -> None:
    assert list(pl.read_parquet_schema(scenario.forwards).items()) == FORWARD_COLUMNS
    fw = pl.read_parquet(scenario.forwards)
    assert fw.height == ROWS // 20
    assert fw.null_count().row(0) == (0,) * len(FORWARD_COLUMNS)
    assert (fw["from_town"] != fw["to_town"]).all()
    assert (
        fw.select((pl.col("sent_at") >= YEAR_START) & (pl.col("sent_at") < YEAR_END))
        .to_series()
        .all()
    )
    where = towns.select("town", "lat", "lon")
    for side in ("from", "to"):
        joined = fw.join(where, left_on=f"{side}_town", right_on="town", how="left")
        assert (joined[f"{side}_lat"] == joined["lat"]).all()
        assert (joined[f"{side}_lon"] == joined["lon"]).all()


def test_forwards_flow_mostly_between_big_close_towns(
    scenario: ScenarioFiles, towns: pl.DataFrame
) -> None:
    fw = pl.read_parquet(scenario.forwards)
    n = towns.height
    index = {name: i for i, name in enumerate(towns["town"])}
    lat, lon = towns["lat"].to_numpy(), towns["lon"].to_numpy()
    km = great_circle_km(lat[:, None], lon[:, None], lat[None, :], lon[None, :])
    people = towns["residents"].to_numpy().astype(float)
    gravity = np.outer(people, people) / np.maximum(km, 1.0) ** 2
    flows = np.zeros((n, n))
    for a, b, count in fw.group_by("from_town", "to_town").len().iter_rows():
        flows[index[a], index[b]] = count
    off = ~np.eye(n, dtype=bool)
    g, f = gravity[off], flows[off]
    strong = f[g >= np.quantile(g, 0.9)].mean()
    weak = f[g <= np.quantile(g, 0.5)].mean()
    assert strong > 10 * weak


def test_forwards_are_sorted_by_sent_at(scenario: ScenarioFiles) -> None:
    assert pl.read_parquet(scenario.forwards)["sent_at"].is_sorted()
