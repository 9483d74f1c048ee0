"""The deterministic demo scenario: an invented island nation and its weather sightings.

This module owns the synthetic data set that demos, benchmarks and tests of ``reduce`` run on.
Everything is fictional and drawn from one ``numpy.random.default_rng(seed)`` stream: no wall
clock, no network, no real names or measurements. The island lies in empty open ocean
(latitude -36..-33, longitude -122..-117), its local clock is the fixed-offset zone
``Etc/GMT+8`` (UTC-8), and its residents report weather sightings from a phone app.

:func:`generate` writes, under a destination folder:

* ``events/part-00.parquet`` .. ``part-03.parquet``: the sightings, sorted by ``observed_at``
  then ``event_id`` and split by row index;
* ``provinces.geojson``: the 12 provinces as RFC 7946 polygons that tile the island;
* ``population.csv`` and ``towns.csv``: residents per province and per town;
* ``forwards.parquet``: reports forwarded between towns, for flow maps.

The same ``seed`` and ``rows`` always give byte-identical files. Each file is written to a
temporary name in its folder and moved into place with :func:`os.replace`, so an interrupted
run never leaves a torn file behind.
"""

from __future__ import annotations

import csv
import io
import itertools
import json
import math
import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl
import shapely
from numpy.typing import NDArray
from shapely.geometry.polygon import orient

from reduce._util.atomic import temp_path, write_atomic

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

#: IANA name of the island's fixed-offset local zone (UTC-8; the sign is POSIX-inverted).
LOCAL_ZONE = "Etc/GMT+8"
#: The bounding box every valid coordinate lies in: (lon_min, lat_min, lon_max, lat_max).
BOUNDS = (-122.0, -36.0, -117.0, -33.0)
#: Sighting kinds, most to least frequent in fair weather.
KINDS = (
    "rain",
    "gust",
    "fog",
    "lightning",
    "hail",
    "rainbow",
    "halo",
    "flood",
    "dust",
    "snow",
    "funnel",
    "waterspout",
)
#: Number of event part files.
EVENT_PARTS = 4
#: Smallest accepted ``rows``: enough for every province, storm and kind of bad coordinate.
MIN_ROWS = 1_000

EVENT_SCHEMA: dict[str, pl.DataType] = {
    "event_id": pl.Int64(),
    "observed_at": pl.Datetime("us", "UTC"),
    "lat": pl.Float64(),
    "lon": pl.Float64(),
    "province": pl.String(),
    "town": pl.String(),
    "kind": pl.String(),
    "severity": pl.Int16(),
    "confirmations": pl.Int32(),
    "observer_id": pl.Int64(),
}
FORWARD_SCHEMA: dict[str, pl.DataType] = {
    "sent_at": pl.Datetime("us", "UTC"),
    "from_town": pl.String(),
    "to_town": pl.String(),
    "from_lat": pl.Float64(),
    "from_lon": pl.Float64(),
    "to_lat": pl.Float64(),
    "to_lon": pl.Float64(),
}

# Invented province names with their codes, and invented town names (made-up syllables).
_PROVINCES: tuple[tuple[str, str], ...] = (
    ("VUS", "Vuskarra"),
    ("OMB", "Ombrelith"),
    ("TSK", "Teskavai"),
    ("YRW", "Yrrowen"),
    ("KLV", "Kalvethu"),
    ("PDR", "Pendrasco"),
    ("LQT", "Loqueth"),
    ("ZRV", "Zaruvenne"),
    ("HTM", "Hethmoril"),
    ("WYB", "Wystrobel"),
    ("NVK", "Nuvaskett"),
    ("EBH", "Ebberhaul"),
)
_TOWN_NAMES: tuple[str, ...] = (
    "Kestravo", "Ulvadrin", "Moressk", "Tavvenhal", "Quillomar", "Iskelvar", "Drunnavek",
    "Pellorisk", "Othvane", "Sarvunel", "Yennoduk", "Brelvasso", "Casmorrow", "Vothenor",
    "Lumbrasket", "Hukkovar", "Nessavrin", "Orrimeld", "Skovallis", "Tirrabune", "Ezzelvant",
    "Goravesk", "Frennikot", "Amblustra", "Wendroshi", "Jorrulan", "Pavestrom", "Illuvek",
    "Rastomeer", "Zembrovel", "Cadduvin", "Molvarrek", "Untravesh", "Bessolquin", "Trovallis",
    "Kerrudane", "Filbannok", "Ostrevaal", "Gulvensa", "Heskamund",
)  # fmt: skip

# Local planar frame (equirectangular about the island's centre), in kilometres.
_LAT0 = -34.5
_LON0 = -119.5
_KM_PER_DEG = 111.195
_KM_PER_DEG_LON = _KM_PER_DEG * math.cos(math.radians(_LAT0))

# Time: the year 2025 in UTC microseconds.
_US_PER_HOUR = 3_600_000_000
_US_PER_DAY = 24 * _US_PER_HOUR
_YEAR_START_US = 1_735_689_600_000_000  # 2025-01-01T00:00:00Z
_YEAR_DAYS = 365
_YEAR_END_US = _YEAR_START_US + _YEAR_DAYS * _US_PER_DAY
_LOCAL_OFFSET_US = 8 * _US_PER_HOUR  # local time + 8 h = UTC
_FIRST_WEEKDAY = 2  # 2025-01-01 is a Wednesday (Monday = 0)

# Reports per local hour of day: quiet nights, busy afternoons and evenings.
_HOUR_WEIGHTS = np.array(
    [0.35, 0.25, 0.18, 0.15, 0.15, 0.22, 0.45, 0.70, 0.85, 0.90, 0.95, 1.00,
     1.05, 1.10, 1.20, 1.40, 1.60, 1.75, 1.80, 1.70, 1.45, 1.10, 0.80, 0.55]
)  # fmt: skip

# Fair-weather kind weights: Zipf-like by rank, reshaped by (southern hemisphere) season.
_ZIPF_EXPONENT = 1.35
_SEASON_FACTORS = {  # season index: 0 summer (DJF), 1 autumn (MAM), 2 winter (JJA), 3 spring
    "fog": (0.8, 1.3, 1.4, 0.9),
    "lightning": (1.5, 0.9, 0.6, 1.1),
    "hail": (0.9, 0.9, 1.1, 1.5),
    "rainbow": (1.0, 1.4, 0.7, 1.4),
    "dust": (2.0, 1.0, 0.4, 0.9),
    "snow": (0.02, 0.5, 4.0, 0.6),
    "waterspout": (1.4, 1.4, 0.6, 0.8),
}
# Kinds reported under a passing storm.
_STORM_KIND_WEIGHTS = {
    "rain": 0.28,
    "gust": 0.26,
    "lightning": 0.20,
    "hail": 0.16,
    "funnel": 0.04,
    "flood": 0.04,
    "waterspout": 0.02,
}
# Severity is 1 + Binomial(4, p) with p by kind; storms push p up.
_SEVERITY_P = {
    "rain": 0.20, "gust": 0.30, "fog": 0.15, "lightning": 0.45, "hail": 0.50, "rainbow": 0.02,
    "halo": 0.02, "flood": 0.55, "dust": 0.25, "snow": 0.30, "funnel": 0.70, "waterspout": 0.60,
}  # fmt: skip

_TOWN_RESIDENTS = 2_200_000
_RURAL_RESIDENTS = 300_000
_STORM_SHARE = 0.08
_INVALID_SHARE = 0.001
_MAX_OBSERVERS = 40_000
# Forward flows between towns i and j ~ (residents_i * residents_j) ** mass / km ** distance.
_GRAVITY_MASS = 0.85
_GRAVITY_DISTANCE = 1.6
_PLACEMENT_TRIES = 60
_CHUNK = 1 << 18


@dataclass(frozen=True)
class ScenarioFiles:
    """Paths written by :func:`generate`, all under ``root``."""

    root: Path
    events: tuple[Path, ...]
    provinces: Path
    population: Path
    towns: Path
    forwards: Path

    def all(self) -> tuple[Path, ...]:
        """Every file of the scenario, events first."""
        return (*self.events, self.provinces, self.population, self.towns, self.forwards)


@dataclass(frozen=True)
class _Land:
    codes: tuple[str, ...]  # sorted
    names: tuple[str, ...]
    polygons: tuple[shapely.Polygon, ...]  # lon/lat, rounded to 6 decimals, CCW exterior
    seeds_km: FloatArray  # (provinces, 2): the Voronoi seed of each province
    island: shapely.Polygon  # union of the provinces, lon/lat
    island_km: shapely.Polygon


@dataclass(frozen=True)
class _Towns:
    names: tuple[str, ...]
    province: IntArray
    lon: FloatArray
    lat: FloatArray
    x: FloatArray
    y: FloatArray
    residents: IntArray


@dataclass(frozen=True)
class _Events:
    frame: pl.DataFrame  # sorted, in the published schema
    town: IntArray  # nearest town index of every row, in frame order
    observed_us: IntArray  # observed_at as UTC microseconds, in frame order


@dataclass(frozen=True)
class _Observers:
    ids: IntArray
    home: IntArray
    activity: FloatArray


def generate(
    dest: Path,
    *,
    rows: int = 2_000_000,
    seed: int = 20261202,
    progress: Callable[[str], None] | None = None,
) -> ScenarioFiles:
    """Write the demo scenario under ``dest`` and return the paths written.

    ``rows`` is the number of sighting events (at least :data:`MIN_ROWS`); forwarded reports
    number ``rows // 20``. The output depends only on ``seed`` and ``rows``.
    """
    if isinstance(rows, bool) or not isinstance(rows, int) or rows < MIN_ROWS:
        raise ValueError(f"rows must be an integer of at least {MIN_ROWS}, got {rows!r}")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    say = progress or (lambda _message: None)
    dest = Path(dest)
    rng = np.random.default_rng(seed)

    land = _build_land(rng)
    locator = _Locator(land)
    say(f"island of {len(land.codes)} provinces")
    towns = _build_towns(rng, land, locator)
    observers = _build_observers(rng, towns, rows)
    say(f"{len(towns.names)} towns, {observers.ids.size:,} observers")
    events = _build_events(rng, land, locator, towns, observers, rows)
    say(f"{rows:,} events")
    forwards = _build_forwards(rng, towns, events, rows // 20)
    say(f"{forwards.height:,} forwarded reports")

    files = ScenarioFiles(
        root=dest,
        events=tuple(dest / "events" / f"part-{i:02d}.parquet" for i in range(EVENT_PARTS)),
        provinces=dest / "provinces.geojson",
        population=dest / "population.csv",
        towns=dest / "towns.csv",
        forwards=dest / "forwards.parquet",
    )
    bounds = [rows * i // EVENT_PARTS for i in range(EVENT_PARTS + 1)]
    for path, (lo, hi) in zip(files.events, itertools.pairwise(bounds), strict=True):
        _write_parquet(events.frame.slice(lo, hi - lo), path)
        say(f"wrote {path.relative_to(dest).as_posix()}")
    _atomic_write(files.provinces, _geojson_bytes(land))
    _atomic_write(files.population, _population_bytes(land, towns))
    _atomic_write(files.towns, _towns_bytes(land, towns))
    say("wrote provinces.geojson, population.csv, towns.csv")
    _write_parquet(forwards, files.forwards)
    say("wrote forwards.parquet")
    return files


# --------------------------------------------------------------------------- geometry helpers


def _to_km(lon: FloatArray, lat: FloatArray) -> tuple[FloatArray, FloatArray]:
    return (lon - _LON0) * _KM_PER_DEG_LON, (lat - _LAT0) * _KM_PER_DEG


def _to_deg(x: FloatArray, y: FloatArray) -> tuple[FloatArray, FloatArray]:
    return _LON0 + x / _KM_PER_DEG_LON, _LAT0 + y / _KM_PER_DEG


def _coords_to_deg(coords: FloatArray) -> FloatArray:
    lon, lat = _to_deg(coords[:, 0], coords[:, 1])
    return np.column_stack([lon, lat])


def _coords_to_km(coords: FloatArray) -> FloatArray:
    x, y = _to_km(coords[:, 0], coords[:, 1])
    return np.column_stack([x, y])


def _nearest(x: FloatArray, y: FloatArray, px: FloatArray, py: FloatArray) -> IntArray:
    """Index of the nearest of the points (px, py) for every (x, y), in chunks."""
    out = np.empty(x.size, dtype=np.int64)
    for lo in range(0, x.size, _CHUNK):
        hi = min(lo + _CHUNK, x.size)
        d2 = (x[lo:hi, None] - px[None, :]) ** 2 + (y[lo:hi, None] - py[None, :]) ** 2
        out[lo:hi] = np.argmin(d2, axis=1)
    return out


def _uniform_in(rng: np.random.Generator, region: shapely.Polygon, n: int) -> FloatArray:
    """``n`` points drawn uniformly inside ``region`` by rejection from its bounding box."""
    minx, miny, maxx, maxy = region.bounds
    shapely.prepare(region)
    fill = max(region.area / ((maxx - minx) * (maxy - miny)), 0.05)
    found: list[FloatArray] = []
    have = 0
    while have < n:
        m = int((n - have) / fill * 1.2) + 16
        pts = np.column_stack([rng.uniform(minx, maxx, m), rng.uniform(miny, maxy, m)])
        pts = pts[shapely.contains_xy(region, pts[:, 0], pts[:, 1])]
        found.append(pts)
        have += len(pts)
    return np.concatenate(found)[:n]


def _spread(
    rng: np.random.Generator,
    region: shapely.Polygon,
    n: int,
    candidates: int,
    existing: FloatArray,
    coast_weight: float,
    min_coast: float,
) -> FloatArray:
    """Best-candidate sampling: ``n`` points inside ``region`` kept apart from each other.

    Each new point is the candidate farthest from the points placed so far, where the coast
    counts as a neighbour at ``coast_weight`` times its distance; candidates closer than
    ``min_coast`` to the coast are discarded unless all are.
    """
    coast = region.exterior
    placed = [p for p in existing]
    for _ in range(n):
        cand = _uniform_in(rng, region, candidates)
        shore = shapely.distance(coast, shapely.points(cand))
        if placed:
            other = np.asarray(placed)
            gap = np.sqrt(((cand[:, None, :] - other[None, :, :]) ** 2).sum(axis=2)).min(axis=1)
        else:
            gap = np.full(len(cand), np.inf)
        score = np.minimum(gap, coast_weight * shore)
        score[shore < min_coast] -= 1e9
        placed.append(cand[int(np.argmax(score))])
    return np.asarray(placed[len(existing) :])


# ------------------------------------------------------------------------------- the land


def _island_outline_km(rng: np.random.Generator) -> FloatArray:
    """An irregular star-shaped coastline of 360 vertices, counter-clockwise, in km."""
    n = 360
    phi = np.arange(n) * (2.0 * np.pi / n)
    r = np.ones(n)
    for k in range(2, 9):
        r += rng.uniform(0.02, 0.16) / k**0.6 * np.cos(k * phi + rng.uniform(0.0, 2.0 * np.pi))
    noise = rng.normal(0.0, 1.0, n)
    kernel = np.exp(-0.5 * (np.arange(-6, 7) / 2.5) ** 2)
    rough = np.convolve(np.concatenate([noise[-6:], noise, noise[:6]]), kernel, "valid")
    r += 0.03 * rough / rough.std()
    r = np.maximum(r, 0.45)
    turn = rng.uniform(-0.35, 0.35)
    ex, ey = 165.0 * r * np.cos(phi), 100.0 * r * np.sin(phi)
    x = ex * math.cos(turn) - ey * math.sin(turn)
    y = ex * math.sin(turn) + ey * math.cos(turn)
    # Shrink about the centre until the island sits inside BOUNDS with a margin.
    lon, lat = _to_deg(x, y)
    half_lon = (BOUNDS[2] - BOUNDS[0]) / 2 - 0.1
    half_lat = (BOUNDS[3] - BOUNDS[1]) / 2 - 0.1
    shrink = min(
        1.0,
        half_lon / np.abs(lon - _LON0).max(),
        half_lat / np.abs(lat - _LAT0).max(),
    )
    return np.column_stack([x * shrink, y * shrink])


def _round_ring(coords: FloatArray) -> FloatArray:
    ring = np.round(coords, 6)
    keep = np.ones(len(ring), dtype=bool)
    keep[1:] = np.any(ring[1:] != ring[:-1], axis=1)
    return ring[keep]


def _partition(island: shapely.Polygon, seeds_km: FloatArray) -> list[shapely.Polygon] | None:
    """Voronoi cells of the seeds clipped to the island, one polygon per seed, or None.

    Cell borders and the coast are noded once and polygonized, so neighbouring provinces
    share their border vertices exactly, also after rounding to 6 decimals.
    """
    island_km = shapely.transform(island, _coords_to_km)
    frame = shapely.box(*island_km.buffer(100.0).bounds)
    cells = shapely.voronoi_polygons(shapely.multipoints(seeds_km), extend_to=frame)
    cells_deg = shapely.transform(cells, _coords_to_deg)
    lines = [island.exterior, *(c.exterior for c in shapely.get_parts(cells_deg))]
    noded = shapely.union_all(lines)
    faces = shapely.get_parts(shapely.polygonize(shapely.get_parts(noded)))
    inner = shapely.point_on_surface(faces)
    faces = faces[shapely.contains(island, inner)]
    inner = shapely.point_on_surface(faces)
    fx, fy = _to_km(shapely.get_x(inner), shapely.get_y(inner))
    owner = _nearest(fx, fy, seeds_km[:, 0], seeds_km[:, 1])
    if not np.array_equal(np.bincount(owner, minlength=len(seeds_km)), np.ones(len(seeds_km))):
        return None  # a cell fell apart on a ragged coast, or a seed lost its cell
    polygons: list[shapely.Polygon] = [shapely.Polygon()] * len(seeds_km)
    for face, k in zip(faces, owner, strict=True):
        poly = orient(shapely.Polygon(_round_ring(np.asarray(face.exterior.coords))), 1.0)
        if not poly.is_valid or poly.area < island.area * 0.02:
            return None
        polygons[int(k)] = poly
    union = shapely.union_all(polygons)
    total = sum(p.area for p in polygons)
    if (
        union.geom_type != "Polygon"
        or len(union.interiors) > 0
        or abs(union.area - total) > 1e-12 * total
    ):
        return None
    return polygons


def _build_land(rng: np.random.Generator) -> _Land:
    outline = _round_ring(_coords_to_deg(_island_outline_km(rng)))
    coast = shapely.Polygon(outline)
    coast_km = shapely.transform(coast, _coords_to_km)
    n = len(_PROVINCES)
    for _ in range(200):
        seeds = _spread(rng, coast_km, n, 24, np.empty((0, 2)), coast_weight=1.6, min_coast=0.0)
        polygons = _partition(coast, seeds)
        if polygons is not None:
            break
    else:  # pragma: no cover - the retry budget is far above what any seed has needed
        raise RuntimeError("could not partition the island into provinces")
    labels = rng.permutation(n)
    order = sorted(range(n), key=lambda i: _PROVINCES[labels[i]][0])
    island = shapely.union_all(polygons)
    return _Land(
        codes=tuple(_PROVINCES[labels[i]][0] for i in order),
        names=tuple(_PROVINCES[labels[i]][1] for i in order),
        polygons=tuple(polygons[i] for i in order),
        seeds_km=seeds[order],
        island=island,
        island_km=shapely.transform(island, _coords_to_km),
    )


class _Locator:
    """Finds the province containing each point (-1 at sea), vectorized."""

    def __init__(self, land: _Land) -> None:
        self._polygons = land.polygons
        self._island = land.island
        self._seeds = land.seeds_km
        for poly in (*self._polygons, self._island):
            shapely.prepare(poly)

    def province(self, lon: FloatArray, lat: FloatArray) -> IntArray:
        out = np.full(lon.size, -1, dtype=np.int64)
        x, y = _to_km(lon, lat)
        # The nearest seed names the province of all but the points on a rounded border.
        guess = _nearest(x, y, self._seeds[:, 0], self._seeds[:, 1])
        for k, poly in enumerate(self._polygons):
            sel = np.flatnonzero(guess == k)
            out[sel[shapely.contains_xy(poly, lon[sel], lat[sel])]] = k
        rest = np.flatnonzero(out < 0)
        rest = rest[shapely.contains_xy(self._island, lon[rest], lat[rest])]
        for k, poly in enumerate(self._polygons):
            if rest.size == 0:
                break
            inside = shapely.contains_xy(poly, lon[rest], lat[rest])
            out[rest[inside]] = k
            rest = rest[~inside]
        return out


def _place(
    locator: _Locator,
    n: int,
    propose: Callable[[IntArray], tuple[FloatArray, FloatArray]],
    fallback: Callable[[IntArray], tuple[FloatArray, FloatArray]],
    decimals: int,
) -> tuple[FloatArray, FloatArray, IntArray]:
    """Draw ``n`` points on land: re-propose those at sea, then use ``fallback`` (km)."""
    lon = np.empty(n)
    lat = np.empty(n)
    prov = np.full(n, -1, dtype=np.int64)
    todo = np.arange(n)
    for attempt in range(_PLACEMENT_TRIES + 1):
        if todo.size == 0:
            break
        x, y = (propose if attempt < _PLACEMENT_TRIES else fallback)(todo)
        lo, la = _to_deg(x, y)
        lo, la = np.round(lo, decimals), np.round(la, decimals)
        found = locator.province(lo, la)
        ok = found >= 0
        lon[todo[ok]], lat[todo[ok]], prov[todo[ok]] = lo[ok], la[ok], found[ok]
        todo = todo[~ok]
    if todo.size:  # pragma: no cover - fallbacks are town centres and storm targets on land
        raise RuntimeError(f"{todo.size} points could not be placed on land")
    return lon, lat, prov


# ---------------------------------------------------------------------- towns and people


def _build_towns(rng: np.random.Generator, land: _Land, locator: _Locator) -> _Towns:
    n_towns = len(_TOWN_NAMES)
    capitals = []
    for poly in land.polygons:
        region = shapely.transform(poly, _coords_to_km)
        cand = _uniform_in(rng, region, 16)
        inland = shapely.distance(region.exterior, shapely.points(cand))
        ok = np.flatnonzero(inland >= 4.0)
        capitals.append(cand[ok[rng.integers(ok.size)]] if ok.size else cand[np.argmax(inland)])
    first = np.asarray(capitals)
    rest = _spread(
        rng, land.island_km, n_towns - len(first), 6, first, coast_weight=3.0, min_coast=1.5
    )
    xy = np.concatenate([first, rest])
    lon, lat = _to_deg(xy[:, 0], xy[:, 1])
    lon, lat = np.round(lon, 6), np.round(lat, 6)
    province = locator.province(lon, lat)
    if (province < 0).any():  # pragma: no cover - towns are drawn inside the island
        raise RuntimeError("a town fell outside every province")
    x, y = _to_km(lon, lat)
    rank = rng.permutation(n_towns)
    size = 1.0 / (rank + 1.0) ** 1.05 * rng.lognormal(0.0, 0.12, n_towns)
    residents = np.round(size / size.sum() * _TOWN_RESIDENTS).astype(np.int64)
    names = tuple(_TOWN_NAMES[i] for i in rng.permutation(n_towns))
    return _Towns(names, province, lon, lat, x, y, residents)


def _build_observers(rng: np.random.Generator, towns: _Towns, rows: int) -> _Observers:
    n_towns = len(towns.names)
    n = min(_MAX_OBSERVERS, max(4 * n_towns, rows // 50))
    share = towns.residents / towns.residents.sum()
    # Every town has at least one observer; the rest live where the people live.
    home = np.concatenate([np.arange(n_towns), rng.choice(n_towns, n - n_towns, p=share)])
    activity = rng.lognormal(0.0, 1.1, n)
    ids = rng.choice(9_000_000, n, replace=False).astype(np.int64) + 1_000_000
    return _Observers(ids=ids, home=home.astype(np.int64), activity=activity)


def _observer_in_town(
    rng: np.random.Generator, observers: _Observers, town: IntArray, n_towns: int
) -> IntArray:
    """An observer living in each given town, chosen in proportion to activity."""
    order = np.argsort(observers.home, kind="stable")
    weight = np.concatenate([[0.0], np.cumsum(observers.activity[order])])
    counts = np.bincount(observers.home, minlength=n_towns)
    start = np.concatenate([[0], np.cumsum(counts)])
    lo, hi = weight[start[town]], weight[start[town + 1]]
    pos = np.searchsorted(weight, lo + rng.random(town.size) * (hi - lo), side="right") - 1
    pos = np.clip(pos, start[town], start[town + 1] - 1)
    return np.asarray(order[pos], dtype=np.int64)


# ------------------------------------------------------------------------------- time


def _day_weights() -> FloatArray:
    day = np.arange(_YEAR_DAYS)
    winter = 1.0 + 0.25 * np.cos(2.0 * np.pi * (day - 196) / _YEAR_DAYS)  # peak mid-July
    weekend = np.where((day + _FIRST_WEEKDAY) % 7 >= 5, 1.15, 1.0)
    weights = winter * weekend
    return np.asarray(weights / weights.sum(), dtype=np.float64)


def _local_times(rng: np.random.Generator, n: int) -> IntArray:
    """UTC microseconds in 2025 whose local (UTC-8) hour follows the daily cycle."""
    day = rng.choice(_YEAR_DAYS, n, p=_day_weights())
    hour = rng.choice(24, n, p=_HOUR_WEIGHTS / _HOUR_WEIGHTS.sum())
    within = rng.integers(0, _US_PER_HOUR, n)
    utc = _YEAR_START_US + day * _US_PER_DAY + hour * _US_PER_HOUR + within + _LOCAL_OFFSET_US
    # The last local evening of the year is already 2026 in UTC: fold it onto 1 January.
    return np.where(utc >= _YEAR_END_US, utc - _YEAR_DAYS * _US_PER_DAY, utc)


def _season(utc_us: IntArray) -> IntArray:
    """0 summer, 1 autumn, 2 winter, 3 spring (southern hemisphere), by local month."""
    local = (utc_us - _LOCAL_OFFSET_US).astype("datetime64[us]")
    month = local.astype("datetime64[M]").astype(np.int64) % 12  # 0 = January
    return ((month + 1) % 12) // 3


# ------------------------------------------------------------------------------- events


def _kind_index(name: str) -> int:
    return KINDS.index(name)


def _fair_weather_kinds(rng: np.random.Generator, season: IntArray) -> IntArray:
    base = 1.0 / np.arange(1, len(KINDS) + 1) ** _ZIPF_EXPONENT
    out = np.empty(season.size, dtype=np.int64)
    for s in range(4):
        w = base.copy()
        for name, factors in _SEASON_FACTORS.items():
            w[_kind_index(name)] *= factors[s]
        sel = np.flatnonzero(season == s)
        out[sel] = rng.choice(len(KINDS), sel.size, p=w / w.sum())
    return out


def _build_events(
    rng: np.random.Generator,
    land: _Land,
    locator: _Locator,
    towns: _Towns,
    observers: _Observers,
    rows: int,
) -> _Events:
    n_towns = len(towns.names)
    n_storm = round(rows * _STORM_SHARE)
    n_fair = rows - n_storm
    share = towns.residents / towns.residents.sum()
    spread = 1.2 + 5.5 * np.sqrt(towns.residents / towns.residents.max())  # km

    # Fair weather: an observer reports near home, sometimes from another town or the open
    # country; a quarter of the reports come from the wider outskirts.
    fair_obs = rng.choice(
        observers.ids.size, n_fair, p=observers.activity / observers.activity.sum()
    )
    mode = rng.random(n_fair)
    centre = np.where(mode < 0.82, observers.home[fair_obs], rng.choice(n_towns, n_fair, p=share))
    country = np.flatnonzero(mode >= 0.95)
    reach = spread[centre] * np.where(rng.random(n_fair) < 0.25, 2.5, 1.0)

    def propose_fair(idx: IntArray) -> tuple[FloatArray, FloatArray]:
        c = centre[idx]
        return (
            towns.x[c] + rng.normal(0.0, 1.0, idx.size) * reach[idx],
            towns.y[c] + rng.normal(0.0, 1.0, idx.size) * reach[idx],
        )

    def at_town(idx: IntArray) -> tuple[FloatArray, FloatArray]:
        return towns.x[centre[idx]], towns.y[centre[idx]]

    fair_lon, fair_lat, fair_prov = _place(locator, n_fair, propose_fair, at_town, 5)
    if country.size:
        pts = _uniform_in(rng, land.island_km, country.size)
        c_lon, c_lat = _to_deg(pts[:, 0], pts[:, 1])
        c_lon, c_lat = np.round(c_lon, 5), np.round(c_lat, 5)
        c_prov = locator.province(c_lon, c_lat)
        ok = c_prov >= 0  # a point rounded onto a border keeps its town-centred position
        fair_lon[country[ok]], fair_lat[country[ok]] = c_lon[ok], c_lat[ok]
        fair_prov[country[ok]] = c_prov[ok]
    fair_t = _local_times(rng, n_fair)

    # Storms cross the island west to east-ish over a few hours.
    n_storms = int(rng.integers(30, 43))
    target = _uniform_in(rng, land.island_km, n_storms)
    heading = rng.normal(math.radians(20.0), math.radians(25.0), n_storms)
    speed = rng.uniform(25.0, 65.0, n_storms)  # km/h
    hours = rng.uniform(4.0, 14.0, n_storms)
    radius = rng.uniform(10.0, 30.0, n_storms)
    strength = rng.lognormal(0.0, 0.6, n_storms)
    mid_day = rng.choice(_YEAR_DAYS, n_storms, p=_day_weights())
    mid = _YEAR_START_US + mid_day * _US_PER_DAY + rng.integers(0, _US_PER_DAY, n_storms)
    half = (hours * _US_PER_HOUR / 2).astype(np.int64)
    mid = np.clip(mid, _YEAR_START_US + half, _YEAR_END_US - 1 - half)
    storm = rng.choice(n_storms, n_storm, p=strength * hours / (strength * hours).sum())
    lag = np.empty(n_storm)  # hours from the storm's mid-point

    def propose_storm(idx: IntArray) -> tuple[FloatArray, FloatArray]:
        s = storm[idx]
        lag[idx] = (rng.random(idx.size) - 0.5) * hours[s]
        run = speed[s] * lag[idx]
        return (
            target[s, 0] + run * np.cos(heading[s]) + rng.normal(0.0, 1.0, idx.size) * radius[s],
            target[s, 1] + run * np.sin(heading[s]) + rng.normal(0.0, 1.0, idx.size) * radius[s],
        )

    def at_target(idx: IntArray) -> tuple[FloatArray, FloatArray]:
        lag[idx] = 0.0
        return target[storm[idx], 0], target[storm[idx], 1]

    storm_lon, storm_lat, storm_prov = _place(locator, n_storm, propose_storm, at_target, 5)
    storm_t = mid[storm] + (lag * _US_PER_HOUR).astype(np.int64)

    lon = np.concatenate([fair_lon, storm_lon])
    lat = np.concatenate([fair_lat, storm_lat])
    prov = np.concatenate([fair_prov, storm_prov])
    t_us = np.concatenate([fair_t, storm_t])
    stormy = np.concatenate([np.zeros(n_fair, dtype=bool), np.ones(n_storm, dtype=bool)])
    x, y = _to_km(lon, lat)
    town = _nearest(x, y, towns.x, towns.y)
    observer = np.concatenate([fair_obs, _observer_in_town(rng, observers, town[n_fair:], n_towns)])

    storm_names = list(_STORM_KIND_WEIGHTS)
    storm_p = np.array([_STORM_KIND_WEIGHTS[k] for k in storm_names])
    storm_kind = np.array([_kind_index(k) for k in storm_names])[
        rng.choice(len(storm_names), n_storm, p=storm_p / storm_p.sum())
    ]
    kind = np.concatenate([_fair_weather_kinds(rng, _season(fair_t)), storm_kind])
    sev_p = np.array([_SEVERITY_P[k] for k in KINDS])[kind]
    sev_p = np.where(stormy, np.minimum(sev_p + 0.2, 0.95), sev_p)
    severity = 1 + rng.binomial(4, sev_p)
    crowd = (towns.residents[town] / np.median(towns.residents)) ** 0.25
    mean = 0.25 * severity**1.4 * crowd * np.where(stormy, 2.0, 1.0)
    confirmations = rng.poisson(rng.gamma(1.2, mean / 1.2))

    # Event ids follow the order reports reach the server: most within minutes, some hours
    # later when a phone was offline.
    delay = rng.exponential(90e6, rows) + np.where(
        rng.random(rows) < 0.03, rng.exponential(6 * _US_PER_HOUR, rows), 0.0
    )
    event_id = np.empty(rows, dtype=np.int64)
    event_id[np.argsort(t_us + delay.astype(np.int64), kind="stable")] = 10_000_001 + np.arange(
        rows, dtype=np.int64
    )

    # About 0.1% of rows carry broken coordinates (they keep their province and town):
    # null latitude, null longitude, NaN, and out-of-range values from swapped axes,
    # a 0..360 longitude or micro-degrees.
    n_bad = max(4, round(rows * _INVALID_SHARE))
    bad = rng.choice(rows, n_bad, replace=False)
    flavour = np.arange(n_bad) % 4
    null_lat = np.zeros(rows, dtype=bool)
    null_lon = np.zeros(rows, dtype=bool)
    null_lat[bad[flavour == 0]] = True
    null_lon[bad[flavour == 1]] = True
    nan_rows = bad[flavour == 2]
    nan_pick = rng.integers(0, 3, nan_rows.size)
    lat[nan_rows[nan_pick != 1]] = np.nan
    lon[nan_rows[nan_pick != 0]] = np.nan
    far_rows = bad[flavour == 3]
    far_pick = rng.integers(0, 3, far_rows.size)
    swap = far_rows[far_pick == 0]
    lat[swap], lon[swap] = lon[swap].copy(), lat[swap].copy()
    lon[far_rows[far_pick == 1]] += 360.0
    micro = far_rows[far_pick == 2]
    lat[micro] *= 1e6
    lon[micro] *= 1e6

    order = np.lexsort((event_id, t_us))
    frame = pl.DataFrame(
        {
            "event_id": event_id[order],
            "observed_at": t_us[order],
            "lat": lat[order],
            "lon": lon[order],
            "province": pl.Series(land.codes)[prov[order]],
            "town": pl.Series(towns.names)[town[order]],
            "kind": pl.Series(KINDS)[kind[order]],
            "severity": severity[order],
            "confirmations": confirmations[order],
            "observer_id": observers.ids[observer[order]],
            "_null_lat": null_lat[order],
            "_null_lon": null_lon[order],
        }
    )
    frame = frame.select(
        pl.col("event_id"),
        pl.col("observed_at").cast(EVENT_SCHEMA["observed_at"]),
        pl.when(pl.col("_null_lat")).then(None).otherwise(pl.col("lat")).alias("lat"),
        pl.when(pl.col("_null_lon")).then(None).otherwise(pl.col("lon")).alias("lon"),
        pl.col("province"),
        pl.col("town"),
        pl.col("kind"),
        pl.col("severity").cast(pl.Int16),
        pl.col("confirmations").cast(pl.Int32),
        pl.col("observer_id"),
    )
    return _Events(frame=frame, town=town[order], observed_us=t_us[order])


def _build_forwards(
    rng: np.random.Generator, towns: _Towns, events: _Events, n: int
) -> pl.DataFrame:
    """Reports forwarded between towns, gravity style: bigger and closer towns exchange more.

    Each forward re-sends a report observed near the sending town, minutes later, so storms
    show up as bursts in the flows too.
    """
    k = len(towns.names)
    dist = np.hypot(towns.x[:, None] - towns.x[None, :], towns.y[:, None] - towns.y[None, :])
    pull = np.outer(towns.residents, towns.residents).astype(np.float64) ** _GRAVITY_MASS
    pull /= np.maximum(dist, 10.0) ** _GRAVITY_DISTANCE
    np.fill_diagonal(pull, 0.0)
    pair = rng.choice(k * k, n, p=(pull / pull.sum()).ravel())
    src, dst = pair // k, pair % k

    order = np.argsort(events.town, kind="stable")
    counts = np.bincount(events.town, minlength=k)
    start = np.concatenate([[0], np.cumsum(counts)])
    has = counts[src] > 0
    pick = start[src] + np.floor(rng.random(n) * np.maximum(counts[src], 1)).astype(np.int64)
    base = np.where(
        has, events.observed_us[order[np.minimum(pick, len(order) - 1)]], _local_times(rng, n)
    )
    sent = np.minimum(base + rng.exponential(25 * 60e6, n).astype(np.int64), _YEAR_END_US - 1)

    order = np.lexsort((dst, src, sent))
    src, dst, sent = src[order], dst[order], sent[order]
    names = pl.Series(towns.names)
    return pl.DataFrame(
        {
            "sent_at": pl.Series(sent).cast(FORWARD_SCHEMA["sent_at"]),
            "from_town": names[src],
            "to_town": names[dst],
            "from_lat": towns.lat[src],
            "from_lon": towns.lon[src],
            "to_lat": towns.lat[dst],
            "to_lon": towns.lon[dst],
        }
    )


# ------------------------------------------------------------------------------- writing


def _temp_path(path: Path) -> Path:
    return temp_path(path)


def _replace_durably(tmp: Path, path: Path) -> None:
    with open(tmp, "rb+") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def _atomic_write(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    write_atomic(path, data, durable=True)


def _write_parquet(frame: pl.DataFrame, path: Path) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = _temp_path(path)
    try:
        frame.write_parquet(tmp, compression="zstd", statistics=True)
        _replace_durably(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _geojson_bytes(land: _Land) -> bytes:
    features = [
        {
            "type": "Feature",
            "properties": {"code": code, "name": name},
            "geometry": {
                "type": "Polygon",
                "coordinates": [[[float(x), float(y)] for x, y in poly.exterior.coords]],
            },
        }
        for code, name, poly in zip(land.codes, land.names, land.polygons, strict=True)
    ]
    lines = ",\n".join(json.dumps(f, separators=(",", ":")) for f in features)
    return ('{"type":"FeatureCollection","features":[\n' + lines + "\n]}\n").encode()


def _csv_bytes(header: list[str], records: list[list[object]]) -> bytes:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(records)
    return out.getvalue().encode()


def _population_bytes(land: _Land, towns: _Towns) -> bytes:
    area = np.array([shapely.transform(p, _coords_to_km).area for p in land.polygons])
    rural = area / area.sum() * _RURAL_RESIDENTS
    in_towns = np.bincount(towns.province, weights=towns.residents, minlength=len(land.codes))
    residents = np.round(in_towns + rural).astype(np.int64)
    return _csv_bytes(
        ["province", "name", "residents"],
        [[c, n, int(r)] for c, n, r in zip(land.codes, land.names, residents, strict=True)],
    )


def _towns_bytes(land: _Land, towns: _Towns) -> bytes:
    rows = sorted(
        (land.codes[int(p)], name, f"{la:.6f}", f"{lo:.6f}", int(r))
        for name, p, la, lo, r in zip(
            towns.names, towns.province, towns.lat, towns.lon, towns.residents, strict=True
        )
    )
    return _csv_bytes(
        ["town", "province", "lat", "lon", "residents"],
        [[name, code, la, lo, r] for code, name, la, lo, r in rows],
    )
