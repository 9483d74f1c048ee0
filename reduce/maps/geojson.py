"""The GeoJSON layout (RFC 7946): geometries for hex cells and region polygons, and the bytes.

This module owns how ``reduce`` writes GeoJSON:

- positions are ``[longitude, latitude]`` (RFC 7946 §3.1.1), rounded to the level's digits,
  with ``-0.0`` written as ``0.0`` and consecutive positions that rounding made equal
  written once; a ring that rounding collapses below three distinct positions is dropped
  (a polygon whose exterior is dropped is dropped with its holes);
- rings are closed, exteriors counter-clockwise and holes clockwise (RFC 7946 §3.1.6),
  checked on the rounded positions;
- a hex cell whose boundary crosses the antimeridian is cut on ±180 into a MultiPolygon
  whose parts each stay within [-180, 180] (RFC 7946 §3.1.9); a cell around a pole becomes
  one polygon running along ±180 up to the pole;
- a FeatureCollection is one Feature per row, in the given order, with members in a fixed
  order (``type``, ``geometry``, ``properties``; the collection's ``type``, ``features``,
  then any foreign members such as our ``reduce`` block, RFC 7946 §6.1), encoded with
  orjson, so the same inputs give the same bytes. Property values are plain JSON: NaN and
  infinities become null (RFC 8259 has no NaN), NumPy scalars become Python numbers.

Edges are straight lines in the longitude/latitude plane, as RFC 7946 §3.1.1 prescribes.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import h3
import numpy as np
import orjson
import shapely

from reduce.contract import MAX_SAFE_INTEGER

__all__ = ["feature_collection", "hex_polygon", "polygon_geometry", "ring_area"]

MAX_SAFE_INT = MAX_SAFE_INTEGER  # reduce.contract


def _check_digits(digits: int) -> None:
    if isinstance(digits, bool) or not isinstance(digits, int) or not 0 <= digits <= 15:
        raise ValueError(f"digits must be an integer from 0 to 15, not {digits!r}")


def ring_area(coords: Any) -> float:
    """Signed area of a ring of ``[x, y]`` positions (shoelace): > 0 counter-clockwise."""
    a = np.asarray(coords, dtype=np.float64)
    if len(a) < 3:
        return 0.0
    x, y = a[:, 0], a[:, 1]
    return 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


def _round_ring(coords: np.ndarray, digits: int, ccw: bool) -> list[list[float]] | None:
    """Rounded, deduplicated, closed ring with the wanted winding, or None if collapsed."""
    a = np.round(np.asarray(coords, dtype=np.float64), digits) + 0.0  # -0.0 -> 0.0
    if len(a) and np.array_equal(a[0], a[-1]):
        a = a[:-1]
    if len(a):
        keep = np.ones(len(a), dtype=bool)
        keep[1:] = np.any(a[1:] != a[:-1], axis=1)
        a = a[keep]
        while len(a) > 1 and np.array_equal(a[0], a[-1]):
            a = a[:-1]
    if len(a) < 3:
        return None
    area = ring_area(a)
    if area == 0.0:
        return None
    if (area > 0) != ccw:
        a = a[::-1]
    out: list[list[float]] = a.tolist()
    out.append(list(out[0]))
    return out


# ----------------------------------------------------------------------------------- hex cells


def hex_polygon(cell: str, digits: int) -> dict[str, Any]:
    """GeoJSON geometry of an H3 cell: a Polygon, or a MultiPolygon cut on the antimeridian.

    The boundary comes from ``h3.cell_to_boundary``; positions are ``[lon, lat]`` rounded to
    ``digits`` decimals; the exterior is counter-clockwise and closed.
    """
    _check_digits(digits)
    if not isinstance(cell, str) or not h3.is_valid_cell(cell):
        raise ValueError(f"{cell!r} is not an H3 cell; pass a 15-character hex string")
    boundary = np.asarray(h3.cell_to_boundary(cell), dtype=np.float64)
    lon, lat = boundary[:, 1], boundary[:, 0]
    pieces = _cut_antimeridian(lon, lat, north=h3.cell_to_latlng(cell)[0] > 0)
    rings = [r for r in (_round_ring(p, digits, ccw=True) for p in pieces) if r is not None]
    if len(pieces) == 1:
        return {"type": "Polygon", "coordinates": rings[:1]}
    return {"type": "MultiPolygon", "coordinates": [[r] for r in rings]}


def _cut_antimeridian(lon: np.ndarray, lat: np.ndarray, *, north: bool) -> list[np.ndarray]:
    """Rings (open, ``[lon, lat]``) of a cell boundary cut on ±180.

    An edge whose longitudes differ by more than 180° is taken to cross the antimeridian
    (cells are far smaller than a hemisphere); the crossing latitude is interpolated
    linearly in the plane where the edge does not wrap. Walking the ring from just after a
    crossing gives one piece per crossing, each running between two points on ±180. With
    two crossings each piece is closed along its meridian. With one crossing the ring goes
    around a pole: the piece is closed through the pole, along both ±180 meridians.
    """
    n = len(lon)
    nxt = np.roll(np.arange(n), -1)
    d = lon[nxt] - lon
    crossing = np.abs(d) > 180.0
    if not crossing.any():
        return [np.column_stack([lon, lat])]
    first = int(np.flatnonzero(crossing)[0])
    pieces: list[list[tuple[float, float]]] = []
    current: list[tuple[float, float]] = []
    for step in range(n):
        i = (first + step) % n
        j = int(nxt[i])
        if crossing[i]:
            exit_x, entry_x, y = _crossing(lon, lat, i, j, float(d[i]))
            if current:
                current.append((exit_x, y))
                pieces.append(current)
            current = [(entry_x, y)]
        current.append((float(lon[j]), float(lat[j])))
    # The walk ended at vertex ``first``: the exit point of edge ``first`` closes the
    # last piece.
    exit_x, _, y = _crossing(lon, lat, first, int(nxt[first]), float(d[first]))
    current.append((exit_x, y))
    pieces.append(current)
    if len(pieces) == 1:
        piece = pieces[0]
        pole = 90.0 if north else -90.0
        piece = [*piece, (piece[-1][0], pole), (piece[0][0], pole)]
        return [np.asarray(piece, dtype=np.float64)]
    return [np.asarray(p, dtype=np.float64) for p in pieces]


def _crossing(
    lon: np.ndarray, lat: np.ndarray, i: int, j: int, d: float
) -> tuple[float, float, float]:
    """Where edge i -> j meets the antimeridian: (exit lon, entry lon, latitude)."""
    if d < 0:  # eastward across +180: lon[j] + 360 in the plane where the edge is straight
        exit_x, entry_x, target = 180.0, -180.0, lon[j] + 360.0
    else:  # westward across -180
        exit_x, entry_x, target = -180.0, 180.0, lon[j] - 360.0
    t = (exit_x - lon[i]) / (target - lon[i])
    return exit_x, entry_x, float(lat[i] + t * (lat[j] - lat[i]))


# ---------------------------------------------------------------------------- region polygons


def polygon_geometry(geom: Any, digits: int) -> dict[str, Any]:
    """GeoJSON geometry of a shapely Polygon or MultiPolygon, oriented and rounded.

    Exteriors counter-clockwise, holes clockwise (RFC 7946 §3.1.6); positions rounded to
    ``digits`` decimals with duplicate consecutive positions removed. The geometry type is
    kept (a MultiPolygon of one part stays a MultiPolygon).
    """
    _check_digits(digits)
    kind = shapely.get_type_id(geom)
    if kind not in (3, 6):  # Polygon, MultiPolygon
        raise ValueError(
            f"polygon_geometry takes a Polygon or MultiPolygon, "
            f"not {getattr(geom, 'geom_type', type(geom).__name__)}"
        )
    polygons = []
    for part in shapely.get_parts(geom):
        if part.is_empty:
            continue
        shell = _round_ring(np.asarray(part.exterior.coords)[:, :2], digits, ccw=True)
        if shell is None:
            continue
        holes = [
            _round_ring(np.asarray(h.coords)[:, :2], digits, ccw=False) for h in part.interiors
        ]
        polygons.append([shell, *(h for h in holes if h is not None)])
    if kind == 3:
        return {"type": "Polygon", "coordinates": polygons[0] if polygons else []}
    return {"type": "MultiPolygon", "coordinates": polygons}


# --------------------------------------------------------------------------- the collection


def _plain(name: str, value: Any) -> Any:
    """A property value as plain JSON: NaN/inf -> None, NumPy scalars -> Python."""
    if value is None or isinstance(value, (str, bool)):
        return value
    if isinstance(value, np.generic):
        value = value.item()
        if isinstance(value, bool):
            return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, int):
        if abs(value) > MAX_SAFE_INT:
            raise ValueError(
                f"property {name!r} holds {value}, beyond ±2^53, which a browser "
                "cannot represent exactly; scale it down or write it as text"
            )
        return value
    return value


def feature_collection(
    geometries: list[dict[str, Any]],
    properties: dict[str, list[Any]],
    *,
    extra: dict[str, Any] | None = None,
) -> bytes:
    """An RFC 7946 FeatureCollection as orjson bytes: one Feature per geometry, in order.

    ``properties`` maps each property name to one value per geometry (its order is the
    order of the members inside each Feature's ``properties``). ``extra`` members go after
    ``features`` at the top level (foreign members, RFC 7946 §6.1).
    """
    n = len(geometries)
    columns: list[tuple[str, Sequence[Any]]] = []
    for name, values in properties.items():
        values = list(values)
        if len(values) != n:
            raise ValueError(f"property {name!r} has {len(values)} values for {n} geometries")
        columns.append((name, [_plain(name, v) for v in values]))
    features = [
        {
            "type": "Feature",
            "geometry": geometry,
            "properties": {name: values[i] for name, values in columns},
        }
        for i, geometry in enumerate(geometries)
    ]
    doc: dict[str, Any] = {"type": "FeatureCollection", "features": features}
    for key, value in (extra or {}).items():
        if key in doc:
            raise ValueError(f"extra member {key!r} would replace the FeatureCollection's own")
        doc[key] = _finite(value)
    return orjson.dumps(doc)


def _finite(value: Any) -> Any:
    """A foreign member as plain JSON: NaN and infinities become null, NumPy scalars
    Python values (geometries come from this module and hold finite numbers)."""
    if isinstance(value, Mapping):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value
