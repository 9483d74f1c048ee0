"""Regions from boundaries: reading region polygons and assigning points to them.

This module owns the ``region = { boundaries = ..., id = ... }`` key: reading an RFC 7946
GeoJSON FeatureCollection of Polygon/MultiPolygon features into :class:`Boundaries` (ids
sorted, every polygon checked), and the point-in-polygon step that gives each event the
region it falls in, as a NumPy function (:func:`assign`) and as a polars expression
(:func:`assign_expr`) usable in a streaming scan.

The assignment rule, which makes results deterministic whatever the polygons look like:

- a point belongs to every polygon that *covers* it (shapely ``covers`` semantics: the
  boundary counts as inside);
- a point covered by several polygons (a point on a shared edge or vertex, or inside an
  overlap) goes to the polygon whose id comes first in sorted order;
- a point covered by none, or whose coordinates are invalid (NaN, infinite, |lat| > 90,
  |lon| > 180), gets no region: index -1, null in the expression.

Coordinates are planar longitude/latitude degrees as RFC 7946 prescribes; edges are
straight lines in that plane.

How :func:`assign` is fast. Measured with ``bench/pip_bench.py`` (50 polygons, ~150,000
vertices, 5 M points, 2 cores): a shapely ``STRtree.query(points, predicate="intersects")``
runs at ~0.03 M points/s (making a Point per event dominates); a bounding-box prefilter
with ``shapely.intersects_xy`` per prepared polygon at ~3.4 M points/s; both are exact.
This module instead lays a regular lon/lat grid (about a million cells) over the polygons
once per :class:`Boundaries` (~0.1 s): every cell that no boundary passes near is labelled
with its one answer (the same for every point in it), so most points are resolved by a
table lookup, and only points in the thin band of cells along boundaries (a few percent)
get the exact ``intersects_xy`` test: ~21 M points/s on one core, with answers identical
to the exact test. An H3 prefilter was not pursued: indexing points to H3 alone runs at
~3 M points/s (DESIGN notes), slower than the whole grid lookup.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import polars as pl
import shapely
from shapely.geometry import shape

from reduce.errors import SourceError, shown_path

__all__ = ["Boundaries", "assign", "assign_expr", "load_boundaries"]

_POLYGONAL = ("Polygon", "MultiPolygon")
# Grid cells laid over the polygons' bounding box by the lookup index: ~1 million cells
# (a 2 MB table) keeps the boundary band to a few percent of the area at benchmark
# complexity, and builds in a few tens of milliseconds.
_GRID_CELLS = 1 << 20
_AMBIGUOUS = -2
# Points are looked up in chunks to bound the temporary arrays.
_CHUNK = 1 << 20


@dataclass(frozen=True)
class Boundaries:
    """Region polygons sorted by id; ``geoms[i]`` is the region ``ids[i]``."""

    ids: tuple[str, ...]
    geoms: tuple[Any, ...]
    path: Path

    @cached_property
    def _index(self) -> _GridIndex:
        # Built on first use and kept on the instance (cached_property writes the
        # instance dictionary directly, which a frozen dataclass allows).
        return _GridIndex.build(self.geoms)


# ------------------------------------------------------------------------------------ loading


def load_boundaries(path: Path, id_property: str) -> Boundaries:
    """Read region polygons from an RFC 7946 GeoJSON FeatureCollection.

    Every feature must have a Polygon or MultiPolygon geometry that shapely finds valid,
    and a unique ``id_property`` (a string, or an integer taken as its decimal text).
    Raises :class:`SourceError` (one line naming the file and what to do) otherwise.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise SourceError(f"{path}: boundaries file not found; check the path") from None
    except IsADirectoryError:
        raise SourceError(
            f"{path}: is a folder, not a boundaries file; name a GeoJSON file"
        ) from None
    except OSError as e:
        raise SourceError(
            f"{path}: cannot read the boundaries file ({e.strerror}); check its permissions"
        ) from None
    try:
        doc = orjson.loads(raw)
    except orjson.JSONDecodeError as e:
        raise SourceError(
            f"{path}: not valid JSON (line {e.lineno}, column {e.colno}); "
            "save the boundaries as GeoJSON (RFC 7946)"
        ) from None
    kind = doc.get("type") if isinstance(doc, dict) else type(doc).__name__
    if not isinstance(doc, dict) or kind != "FeatureCollection":
        raise SourceError(
            f"{path}: not a GeoJSON FeatureCollection (top-level type is "
            f"{kind!r}); save the boundaries as a FeatureCollection of "
            "Polygon or MultiPolygon features"
        )
    features = doc.get("features")
    if not isinstance(features, list):
        raise SourceError(
            f'{path}: the FeatureCollection has no "features" list; '
            "save the boundaries as a FeatureCollection of Polygon or "
            "MultiPolygon features"
        )
    if not features:
        raise SourceError(f"{path}: the FeatureCollection has no features; add the region polygons")
    first_seen: dict[str, int] = {}
    regions: list[tuple[str, Any]] = []
    for i, feature in enumerate(features):
        region_id = _feature_id(path, i, feature, id_property)
        if region_id in first_seen:
            raise SourceError(
                f"{path}: id {region_id!r} (property {id_property!r}) appears "
                f"in features {first_seen[region_id]} and {i}; make the ids "
                "unique, or merge those features into one MultiPolygon"
            )
        first_seen[region_id] = i
        regions.append((region_id, _feature_geometry(path, i, region_id, feature)))
    regions.sort(key=lambda r: r[0])
    return Boundaries(
        ids=tuple(r[0] for r in regions), geoms=tuple(r[1] for r in regions), path=path
    )


def region_labels(path: Path, id_property: str, label_property: str) -> dict[str, str]:
    """Each region id's label: the ``label_property`` of its feature (text, or a number as
    its decimal text). Raises :class:`SourceError` naming a feature without one."""
    b = load_boundaries(path, id_property)  # every check of the polygons and their ids
    doc = orjson.loads(Path(path).read_bytes())
    out: dict[str, str] = {}
    for i, feature in enumerate(doc["features"]):
        region_id = _feature_id(path, i, feature, id_property)
        value = (feature.get("properties") or {}).get(label_property)
        if isinstance(value, bool) or not isinstance(value, (str, int, float)):
            raise SourceError(
                f"{shown_path(path)}: feature {i} ({region_id!r}) has no text "
                f"{label_property!r} property (group.region.label); give every "
                "feature one or name another property"
            )
        out[region_id] = value if isinstance(value, str) else str(value)
    del b
    return out


def _feature_id(path: Path, i: int, feature: Any, id_property: str) -> str:
    if not isinstance(feature, dict) or feature.get("type") != "Feature":
        raise SourceError(
            f"{path}: feature {i} is not a GeoJSON Feature object; "
            'write each region as {"type": "Feature", "geometry": ..., '
            '"properties": ...}'
        )
    props = feature.get("properties")
    value = props.get(id_property) if isinstance(props, dict) else None
    if value is None:
        raise SourceError(
            f"{path}: feature {i} has no {id_property!r} property; give every "
            f"feature an {id_property!r} or name another id property"
        )
    if isinstance(value, str):
        return value
    if isinstance(value, int) and not isinstance(value, bool):
        return str(value)
    raise SourceError(
        f"{path}: feature {i} has {id_property!r} = {value!r}, not a string "
        "or an integer; use text ids"
    )


def _feature_geometry(path: Path, i: int, region_id: str, feature: dict[str, Any]) -> Any:
    where = f"{path}: feature {i} ({region_id!r})"
    geometry = feature.get("geometry")
    if not isinstance(geometry, dict):
        raise SourceError(f"{where} has no geometry; give it a Polygon or MultiPolygon")
    kind = geometry.get("type")
    if kind not in _POLYGONAL:
        raise SourceError(
            f"{where} is a {kind}, not a Polygon or MultiPolygon; region "
            "boundaries must be polygons"
        )
    try:
        geom = shapely.force_2d(shape(geometry))
    except (
        ValueError,
        TypeError,
        KeyError,
        IndexError,
        AttributeError,
        shapely.errors.ShapelyError,
    ) as e:
        raise SourceError(
            f"{where} has malformed {kind} coordinates ({e}); write closed "
            "rings of [longitude, latitude] positions (RFC 7946)"
        ) from None
    if geom.is_empty:
        raise SourceError(
            f"{where} has an empty geometry; give it coordinates or remove the feature"
        )
    if not shapely.is_valid(geom):
        reason = shapely.is_valid_reason(geom)
        raise SourceError(
            f"{where} is not a valid polygon ({reason}); make it valid, e.g. "
            "with shapely.make_valid"
        )
    return geom


# ---------------------------------------------------------------------------------- assigning


def assign(lat: np.ndarray, lon: np.ndarray, b: Boundaries) -> np.ndarray:
    """The index into ``b.ids`` of the region of each point, as ``int32``.

    -1 for a point outside every polygon or with invalid coordinates (NaN, infinite,
    |lat| > 90, |lon| > 180). A point covered by several polygons (on a shared edge or
    vertex) goes to the one whose id sorts first. See the module docstring.
    """
    lat_a = np.asarray(lat, dtype=np.float64)
    lon_a = np.asarray(lon, dtype=np.float64)
    if lat_a.shape != lon_a.shape:
        raise ValueError(f"assign: lat has shape {lat_a.shape} but lon has {lon_a.shape}")
    flat_lat, flat_lon = lat_a.ravel(), lon_a.ravel()
    out = np.full(flat_lat.size, -1, dtype=np.int32)
    index = b._index
    for start in range(0, flat_lat.size, _CHUNK):
        y = flat_lat[start : start + _CHUNK]
        x = flat_lon[start : start + _CHUNK]
        with np.errstate(invalid="ignore"):
            valid = (np.abs(y) <= 90.0) & (np.abs(x) <= 180.0)  # False for NaN
        out[start : start + _CHUNK] = index.locate(x, y, valid)
    return out.reshape(lat_a.shape)


def assign_expr(lat: str, lon: str, b: Boundaries) -> pl.Expr:
    """A polars expression: the region id (String) of columns ``lat``/``lon``, null outside.

    Named ``region``; rename it with ``.alias``. Elementwise and vectorized per batch, so it
    runs inside ``LazyFrame.select``/``with_columns`` under ``collect(engine="streaming")``.
    Null coordinates get a null region, like NaN or out-of-range ones.
    """
    labels = pl.Series("region", b.ids, dtype=pl.String)
    # Build the lookup grid now, in this thread, not inside batches that the streaming
    # engine may run on several threads at once.
    _ = b._index

    def regions(batch: pl.Series) -> pl.Series:
        fields = batch.struct.unnest()
        lat_np = _float_array(fields.get_column(lat))
        lon_np = _float_array(fields.get_column(lon))
        idx = assign(lat_np, lon_np, b)
        gather = pl.Series("i", idx, dtype=pl.Int32)
        gather = pl.select(pl.when(gather >= 0).then(gather)).to_series()
        return labels.gather(gather).alias("region")

    return (
        pl.struct([pl.col(lat), pl.col(lon)])
        .map_batches(regions, return_dtype=pl.String, is_elementwise=True)
        .alias("region")
    )


def _float_array(s: pl.Series) -> np.ndarray:
    # Nulls become NaN, which assign treats as invalid coordinates.
    return s.cast(pl.Float64).fill_null(float("nan")).to_numpy()


# ------------------------------------------------------------------------------- the grid index


def _first_covering(
    geoms: tuple[Any, ...], bounds: np.ndarray, x: np.ndarray, y: np.ndarray
) -> np.ndarray:
    """Exact: index of the first polygon (in order) covering each point, else -1."""
    out = np.full(x.size, -1, dtype=np.int32)
    todo = np.arange(x.size)
    for k, geom in enumerate(geoms):
        if todo.size == 0:
            break
        xt, yt = x[todo], y[todo]
        xmin, ymin, xmax, ymax = bounds[k]
        sel = todo[(xt >= xmin) & (xt <= xmax) & (yt >= ymin) & (yt <= ymax)]
        if sel.size == 0:
            continue
        # For a point and a polygon, intersects is covers: the boundary counts as inside.
        hit = shapely.intersects_xy(geom, x[sel], y[sel])
        if hit.any():
            out[sel[hit]] = k
            todo = todo[out[todo] < 0]
    return out


@dataclass(frozen=True, eq=False)
class _GridIndex:
    """A lon/lat grid over the polygons; each cell holds its answer or ``_AMBIGUOUS``.

    Cells are the classes of one monotone map, ``i = floor((x - x0) * scale)`` (the same
    floating-point operations for vertices and for points), so they partition the plane
    into rectangles exactly and a point lies in the cell it is mapped to. A cell is
    ambiguous when a boundary passes through it or a neighbouring cell: boundaries are cut
    into pieces at most half a cell long, every cell a piece touches is marked, with its
    neighbours, so a boundary cannot slip through an unmarked cell even with rounding in
    the cut points. Along a grid row, a run of unmarked cells holds no boundary, so every
    point in the run is covered by the same polygons: one exact test at the first cell's
    centre labels the run.
    """

    geoms: tuple[Any, ...]
    bounds: np.ndarray
    x0: float
    y0: float
    scale: float
    width: int
    height: int
    table: np.ndarray  # flat, row-major (row = y); polygon index, -1, or _AMBIGUOUS

    @staticmethod
    def build(geoms: tuple[Any, ...]) -> _GridIndex:
        for g in geoms:
            shapely.prepare(g)
        bounds = shapely.bounds(np.asarray(geoms, dtype=object)).reshape(-1, 4)
        # GEOS builds a prepared polygon's point locator on its first use: use each once
        # here (a point inside its bounding box), so later calls, possibly from several
        # threads, only read it.
        for g, (gx0, gy0, gx1, gy1) in zip(geoms, bounds, strict=True):
            shapely.intersects_xy(g, 0.5 * (gx0 + gx1), 0.5 * (gy0 + gy1))
        xmin, ymin = float(bounds[:, 0].min()), float(bounds[:, 1].min())
        xmax, ymax = float(bounds[:, 2].max()), float(bounds[:, 3].max())
        w, h = xmax - xmin, ymax - ymin
        step = math.sqrt(max(w, 1e-12) * max(h, 1e-12) / _GRID_CELLS)
        step = max(step, w / 4096, h / 4096, 1e-12)
        # Two spare cells on every side: boundaries map inside, marked neighbours too.
        x0, y0 = xmin - 2 * step, ymin - 2 * step
        width = math.ceil(w / step) + 5
        height = math.ceil(h / step) + 5
        scale = 1.0 / step
        rings = np.asarray([r for g in geoms for r in _rings(g)], dtype=object)
        pieces = shapely.segmentize(rings, 0.5 * step)
        coords = shapely.get_coordinates(pieces)
        ci = np.floor((coords[:, 0] - x0) * scale).astype(np.int64)
        cj = np.floor((coords[:, 1] - y0) * scale).astype(np.int64)
        marked = np.zeros((height, width), dtype=bool)
        for dj in (-1, 0, 1):
            for di in (-1, 0, 1):
                marked[cj + dj, ci + di] = True
        flat = marked.ravel()
        free = ~flat
        col = np.arange(flat.size) % width
        starts = free.copy()
        starts[1:] &= flat[:-1] | (col[1:] == 0)
        first = np.flatnonzero(starts)
        run_of = np.cumsum(starts) - 1
        cx = x0 + (first % width + 0.5) * step
        cy = y0 + (first // width + 0.5) * step
        owner = _first_covering(geoms, bounds, cx, cy)
        dtype = np.int16 if len(geoms) < np.iinfo(np.int16).max else np.int32
        table = np.where(free, owner[run_of], _AMBIGUOUS).astype(dtype)
        return _GridIndex(
            geoms=geoms,
            bounds=bounds,
            x0=x0,
            y0=y0,
            scale=scale,
            width=width,
            height=height,
            table=table,
        )

    def locate(self, x: np.ndarray, y: np.ndarray, valid: np.ndarray) -> np.ndarray:
        with np.errstate(invalid="ignore"):
            fi = np.floor((x - self.x0) * self.scale)
            fj = np.floor((y - self.y0) * self.scale)
            inside = valid & (fi >= 0) & (fi < self.width) & (fj >= 0) & (fj < self.height)
        cell = np.where(inside, fj * self.width + fi, 0.0).astype(np.int64)
        out = np.where(inside, self.table[cell], -1).astype(np.int32)
        amb = np.flatnonzero(out == _AMBIGUOUS)
        if amb.size:
            out[amb] = _first_covering(self.geoms, self.bounds, x[amb], y[amb])
        return out


def _rings(geom: Any) -> list[Any]:
    out = []
    for part in shapely.get_parts(geom):
        out.append(part.exterior)
        out.extend(part.interiors)
    return out
