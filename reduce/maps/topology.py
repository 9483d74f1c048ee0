"""Geometry under the budget: shrinking a tiling of region polygons without tearing it.

This module owns the geometry side of a region payload: simplifying a tiling so that
neighbours keep one shared border (:func:`simplify_shared`, with :func:`default_tolerance`),
rounding coordinates so that shared borders still match and polygons stay valid
(:func:`quantize`), and counting the coordinate bytes a GeoJSON payload spends
(:func:`geometry_bytes`). Tolerances and grid sizes are in degrees, the units of RFC 7946
positions.

Simplifying every polygon on its own moves each side of a shared border differently and
leaves slivers of gap and overlap between neighbours. Here the tiling is first cut into
*arcs*: every stretch of border with the same owners (a border between two neighbours, or
a stretch of coast owned by one polygon), ending at *nodes*, where three or more polygons
meet or the owners change. Each arc is simplified once (Douglas-Peucker, ends fixed) and
every polygon is rebuilt from its arcs, so both neighbours get the very same border.

Douglas-Peucker on separate arcs can still make two arcs cross, or collapse a ring. After
each pass the arcs are checked (each simple, meeting others only at shared nodes, closed
arcs keeping an area) and so are the rebuilt polygons (valid, no two overlapping); the
arcs at fault are simplified again with a quarter of their tolerance, and after a few
rounds kept as they were. The result is always valid when the input tiling is.

Input polygons should share border vertices where they touch. A vertex of one polygon
lying exactly on an edge of another (a T-junction) is added to that edge first. Where
borders cross without sharing vertices (a border computed twice, differing in the last
bits), all polygons are first snap-rounded to 1e-9 degrees (:func:`quantize`), which merges
such borders; borders that miss each other by more are separate arcs, left as they are
wherever simplifying them would make them cross.
"""

from __future__ import annotations

import itertools
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson
import shapely

from reduce.maps.boundaries import Boundaries
from reduce.maps.geojson import polygon_geometry

__all__ = [
    "Topology",
    "arcs_of",
    "default_tolerance",
    "geometry_bytes",
    "quantize",
    "simplify_shared",
]

# A pass that finds faults divides the tolerance of the arcs at fault by this; arcs that
# are still at fault after _ROUNDS passes are kept unsimplified.
_SHRINK = 4.0
_ROUNDS = 6
# Inputs whose borders cross without sharing vertices are first snap-rounded to this many
# decimals of a degree (about 0.1 mm).
_SNAP_DIGITS = 9


# ------------------------------------------------------------------------------ the arc model


@dataclass(frozen=True, eq=False)
class Topology:
    """A tiling cut into arcs.

    ``vertices`` holds every distinct vertex (sorted by x, then y); an arc is a sequence of
    vertex ids from node to node (a closed arc starts and ends at the same vertex).
    ``rings[i]`` is ``(polygon, part, hole, [(arc, forward), ...])`` with ``hole`` = -1 for
    an exterior: following the arcs (reversed where ``forward`` is false) walks the ring.
    ``owners[a]`` lists the polygons whose boundary uses arc ``a``.
    """

    vertices: np.ndarray
    arcs: tuple[np.ndarray, ...]
    rings: tuple[tuple[int, int, int, tuple[tuple[int, bool], ...]], ...]
    owners: tuple[tuple[int, ...], ...]
    multi: tuple[bool, ...]

    def arc_lines(self) -> np.ndarray:
        ids = np.concatenate(self.arcs)
        which = np.repeat(np.arange(len(self.arcs)), [len(a) for a in self.arcs])
        lines: np.ndarray = shapely.linestrings(self.vertices[ids], indices=which)
        return lines


def _open_ring(coords: np.ndarray) -> np.ndarray:
    """Ring positions without the closing one and without repeated consecutive ones."""
    c = np.asarray(coords, dtype=np.float64)[:, :2]
    c = c[:-1] if len(c) > 1 and np.array_equal(c[0], c[-1]) else c
    keep = np.ones(len(c), dtype=bool)
    keep[1:] = np.any(c[1:] != c[:-1], axis=1)
    c = c[keep]
    while len(c) > 1 and np.array_equal(c[0], c[-1]):
        c = c[:-1]
    return c


def _rings_of(geoms: Sequence[Any]) -> list[tuple[int, int, int, np.ndarray]]:
    rings = []
    for k, geom in enumerate(geoms):
        for p, part in enumerate(shapely.get_parts(geom)):
            rings.append((k, p, -1, _open_ring(np.asarray(part.exterior.coords))))
            for h, hole in enumerate(part.interiors):
                rings.append((k, p, h, _open_ring(np.asarray(hole.coords))))
    return rings


def _add_t_junctions(
    rings: list[tuple[int, int, int, np.ndarray]],
) -> list[tuple[int, int, int, np.ndarray]]:
    """Insert into each ring the vertices (of any ring) that lie exactly on its edges."""
    coords = [r[3] for r in rings]
    a = np.concatenate(coords)
    b = np.concatenate([np.roll(c, -1, axis=0) for c in coords])
    ring_of = np.repeat(np.arange(len(rings)), [len(c) for c in coords])
    index_in_ring = np.concatenate([np.arange(len(c)) for c in coords])
    vertices = np.unique(a, axis=0)
    segments = shapely.linestrings(np.stack([a, b], axis=1))
    # Exact point-on-segment tests (GEOS robust predicates), after a bounding-box search.
    vi, si = shapely.STRtree(segments).query(shapely.points(vertices), predicate="intersects")
    v = vertices[vi]
    inner = ~(np.all(v == a[si], axis=1) | np.all(v == b[si], axis=1))
    if not inner.any():
        return rings
    vi, si, v = vi[inner], si[inner], v[inner]
    d = b[si] - a[si]
    t = np.einsum("ij,ij->i", v - a[si], d) / np.einsum("ij,ij->i", d, d)
    out = []
    for r, (k, p, h, c) in enumerate(rings):
        mine = ring_of[si] == r
        if mine.any():
            pos = np.concatenate(
                [
                    np.arange(len(c), dtype=np.float64),
                    index_in_ring[si[mine]] + np.clip(t[mine], 1e-12, 1 - 1e-12),
                ]
            )
            c = np.vstack([c, v[mine]])[np.argsort(pos, kind="stable")]
        out.append((k, p, h, c))
    return out


def arcs_of(geoms: Sequence[Any]) -> Topology:
    """Cut polygons that tile (share border vertices) into shared arcs; see the module doc."""
    rings = _add_t_junctions(_rings_of(geoms))
    coords = np.concatenate([r[3] for r in rings])
    vertices, vid = np.unique(coords, axis=0, return_inverse=True)
    vid = vid.ravel()
    nv = len(vertices)
    bounds = np.cumsum([0] + [len(r[3]) for r in rings])
    ring_ids = [vid[bounds[i] : bounds[i + 1]] for i in range(len(rings))]
    # Undirected edges and the polygons owning each.
    u = np.concatenate(ring_ids)
    v = np.concatenate([np.roll(w, -1) for w in ring_ids])
    owner = np.concatenate([np.full(len(w), rings[i][0]) for i, w in enumerate(ring_ids)])
    lo, hi = np.minimum(u, v), np.maximum(u, v)
    key = lo.astype(np.int64) * nv + hi
    pairs = np.unique(np.column_stack([key, owner]), axis=0)
    edges, first = np.unique(pairs[:, 0], return_index=True)
    groups = np.split(pairs[:, 1], first[1:])
    signature: dict[tuple[int, ...], int] = {}
    sig = np.asarray([signature.setdefault(tuple(g.tolist()), len(signature)) for g in groups])
    ea, eb = edges // nv, edges % nv
    # A node: not exactly two distinct edges meet there, or the two have other owners.
    degree = np.bincount(ea, minlength=nv) + np.bincount(eb, minlength=nv)
    smin = np.full(nv, np.iinfo(np.int64).max)
    smax = np.full(nv, -1)
    for ends in (ea, eb):
        np.minimum.at(smin, ends, sig)
        np.maximum.at(smax, ends, sig)
    node = (degree != 2) | (smin != smax)
    for w in ring_ids:  # a ring with no node (an island, a lake) gets one at its least vertex
        if not node[w].any():
            node[w.min()] = True
    arc_index: dict[tuple[int, ...], int] = {}
    arcs: list[np.ndarray] = []
    arc_owners: list[set[int]] = []
    ring_arcs = []
    for (k, p, h, _), w in zip(rings, ring_ids, strict=True):
        start = int(np.flatnonzero(node[w])[0])
        w = np.roll(w, -start)
        cuts = np.flatnonzero(node[w]).tolist() + [len(w)]
        walk = np.append(w, w[0])
        used = []
        for a, b in itertools.pairwise(cuts):
            seq = tuple(walk[a : b + 1].tolist())
            rev = seq[::-1]
            canon = min(seq, rev)
            i = arc_index.get(canon)
            if i is None:
                i = arc_index[canon] = len(arcs)
                arcs.append(np.asarray(canon, dtype=np.int64))
                arc_owners.append(set())
            arc_owners[i].add(k)
            used.append((i, seq == canon))
        ring_arcs.append((k, p, h, tuple(used)))
    multi = tuple(shapely.get_type_id(g) == 6 for g in geoms)
    return Topology(
        vertices=vertices,
        arcs=tuple(arcs),
        rings=tuple(ring_arcs),
        owners=tuple(tuple(sorted(o)) for o in arc_owners),
        multi=multi,
    )


# ----------------------------------------------------------------------------- simplification


def simplify_shared(b: Boundaries, tolerance: float) -> tuple[Any, ...]:
    """Topology-preserving Douglas-Peucker simplification of a tiling, in ``b`` order.

    ``tolerance`` is in degrees. Each shared arc is simplified once with
    ``shapely.simplify(arc, tolerance, preserve_topology=False)`` (ends fixed), so
    neighbours keep identical borders; arcs whose simplification would cross another arc,
    collapse a ring or make a polygon invalid get a smaller tolerance (see the module doc).
    Every returned polygon is valid; the types (Polygon, MultiPolygon) are kept.
    """
    if not tolerance >= 0:
        raise ValueError(f"tolerance must be a number >= 0 degrees, not {tolerance!r}")
    topo = arcs_of(b.geoms)
    original = topo.arc_lines()
    closed = np.asarray([a[0] == a[-1] for a in topo.arcs], dtype=bool)
    known = _arc_faults(original, closed, known=set())[1]
    if known:
        # Borders cross without sharing vertices: typically neighbours whose common border
        # was computed twice and differs in the last bits. Snap-round everything onto a
        # grid far below any map's precision, which makes such borders one, and start over.
        snapped = quantize(b.geoms, _SNAP_DIGITS)
        if not any(g.is_empty for g in snapped):
            topo = arcs_of(snapped)
            original = topo.arc_lines()
            closed = np.asarray([a[0] == a[-1] for a in topo.arcs], dtype=bool)
            known = _arc_faults(original, closed, known=set())[1]
    # Faults still there (e.g. polygons that really overlap) are not ours to fix.
    tol = np.full(len(topo.arcs), float(tolerance))
    round_ = 0
    while True:
        lines = np.where(
            tol > 0, shapely.simplify(original, tol, preserve_topology=False), original
        )
        bad, _ = _arc_faults(lines, closed, known)
        if not bad:
            built, bad = _rebuild(topo, lines)
            if not bad:
                return built
        fix = np.fromiter(sorted(bad), dtype=np.int64)
        fix = fix[tol[fix] > 0]
        if fix.size == 0:  # only faults the input already has: nothing left to undo
            return _rebuild(topo, lines)[0]
        # Arcs at fault get a quarter of their tolerance; after _ROUNDS rounds they are
        # kept as they were, so every further round reverts at least one arc: this ends.
        tol[fix] = 0.0 if round_ >= _ROUNDS else tol[fix] / _SHRINK
        round_ += 1


def _arc_faults(
    lines: np.ndarray, closed: np.ndarray, known: set[tuple[int, int]]
) -> tuple[set[int], set[tuple[int, int]]]:
    """Arcs at fault, and the pairs of arcs that meet anywhere but at their shared ends."""
    bad: set[int] = set()
    counts = shapely.get_num_coordinates(lines)
    for i in np.flatnonzero(closed & (counts < 4)).tolist():
        bad.add(i)
    for i in np.flatnonzero(closed & (counts >= 4)).tolist():
        if shapely.area(shapely.polygons(shapely.get_coordinates(lines[i]))) == 0.0:
            bad.add(i)
    bad.update(np.flatnonzero(~shapely.is_simple(lines)).tolist())
    tree = shapely.STRtree(lines)
    left, right = tree.query(lines, predicate="intersects")
    keep = left < right
    left, right = left[keep], right[keep]
    crossing: set[tuple[int, int]] = set()
    if left.size:
        meet = shapely.intersection(lines[left], lines[right])
        starts = shapely.get_coordinates(shapely.get_point(lines, 0))
        ends = shapely.get_coordinates(shapely.get_point(lines, -1))
        for i, j, m in zip(left.tolist(), right.tolist(), meet, strict=True):
            allowed = {tuple(starts[i]), tuple(ends[i])} & {tuple(starts[j]), tuple(ends[j])}
            if shapely.get_type_id(m) in (0, 4):  # Point, MultiPoint
                at = {tuple(c) for c in shapely.get_coordinates(m).tolist()}
                if at <= allowed:
                    continue
            crossing.add((i, j))
    for i, j in crossing - known:
        bad.update((i, j))
    return bad, crossing


def _ring_coords(lines_coords: list[np.ndarray], used: Iterable[tuple[int, bool]]) -> np.ndarray:
    parts = []
    for arc, forward in used:
        c = lines_coords[arc]
        parts.append(c[:-1] if forward else c[::-1][:-1])
    ring = np.concatenate(parts)
    return np.vstack([ring, ring[:1]])


def _rebuild(topo: Topology, lines: np.ndarray) -> tuple[tuple[Any, ...], set[int]]:
    """Polygons from arcs, and the arcs of any polygon that is invalid or overlaps another."""
    coords = [shapely.get_coordinates(g) for g in lines]
    n = len(topo.multi)
    shells: dict[tuple[int, int], np.ndarray] = {}
    holes: dict[tuple[int, int], list[np.ndarray]] = {}
    arcs_of_polygon: list[set[int]] = [set() for _ in range(n)]
    for k, p, h, used in topo.rings:
        arcs_of_polygon[k].update(a for a, _ in used)
        ring = _ring_coords(coords, used)
        if h < 0:
            shells[(k, p)] = ring
        else:
            holes.setdefault((k, p), []).append(ring)
    bad: set[int] = set()
    parts: list[list[Any]] = [[] for _ in range(n)]
    for (k, p), shell in sorted(shells.items()):
        try:
            poly = shapely.Polygon(shell, holes.get((k, p), []))
        except (ValueError, shapely.errors.GEOSException):
            bad.update(arcs_of_polygon[k])
            continue
        parts[k].append(poly)
    built = []
    for k in range(n):
        geom = (
            shapely.MultiPolygon(parts[k])
            if topo.multi[k]
            else (parts[k][0] if parts[k] else shapely.Polygon())
        )
        if geom.is_empty or not shapely.is_valid(geom):
            bad.update(arcs_of_polygon[k])
        built.append(geom)
    arr = np.asarray(built, dtype=object)
    left, right = shapely.STRtree(arr).query(arr)
    keep = left < right
    for i, j in zip(left[keep].tolist(), right[keep].tolist(), strict=True):
        if shapely.relate_pattern(arr[i], arr[j], "T********"):
            bad.update(arcs_of_polygon[i] | arcs_of_polygon[j])
    return tuple(built), bad


def default_tolerance(b: Boundaries) -> float:
    """A tolerance in degrees: one 1,000th of the larger side of the tiling's bounding box.

    That is about one pixel when the whole tiling is drawn 1,000 pixels across (a common
    map width: common practice), so the simplification is invisible at the size a page
    shows the whole map. On the demo provinces it changes the total area by well under 1%.
    """
    bounds = shapely.total_bounds(np.asarray(b.geoms, dtype=object))
    return float(max(bounds[2] - bounds[0], bounds[3] - bounds[1]) / 1000.0)


# ---------------------------------------------------------------------------------- rounding


def quantize(geoms: Sequence[Any], digits: int) -> tuple[Any, ...]:
    """Round every coordinate to ``digits`` decimals, keeping shared borders and validity.

    All boundaries are snap-rounded together onto the grid of spacing ``10**-digits``
    (``shapely.union_all(..., grid_size=...)``, GEOS snap-rounding: segments passing near a
    grid vertex are bent through it, so no two borders cross), the rounded linework is
    polygonized, and each face goes to the input polygon it overlaps most; a polygon is the
    coverage union of its faces. Neighbours therefore share the very same rounded border.
    A polygon too small for the grid comes back empty. Types are kept where possible (a
    Polygon split by rounding becomes a MultiPolygon).
    """
    if isinstance(digits, bool) or not isinstance(digits, int) or not 0 <= digits <= 15:
        raise ValueError(f"digits must be an integer from 0 to 15, not {digits!r}")
    arr = np.asarray(list(geoms), dtype=object)
    if arr.size == 0:
        return ()
    grid = 10.0**-digits
    noded = shapely.union_all(shapely.boundary(arr), grid_size=grid)
    faces = shapely.get_parts(shapely.polygonize(shapely.get_parts(noded)))
    owner = np.full(len(faces), -1)
    if len(faces):
        f_idx, g_idx = shapely.STRtree(arr).query(faces, predicate="intersects")
        overlap = shapely.area(shapely.intersection(faces[f_idx], arr[g_idx]))
        best = np.zeros(len(faces))
        for f, g, a in zip(f_idx.tolist(), g_idx.tolist(), overlap.tolist(), strict=True):
            if a > best[f] or (a == best[f] and a > 0 and g < owner[f]):
                best[f], owner[f] = a, g
        owner[best <= 0.5 * shapely.area(faces)] = -1  # holes and the outside
    out = []
    for k, geom in enumerate(arr):
        mine = faces[owner == k]
        if len(mine) == 0:
            out.append(
                shapely.MultiPolygon() if shapely.get_type_id(geom) == 6 else shapely.Polygon()
            )
            continue
        merged = shapely.coverage_union_all(mine) if len(mine) > 1 else mine[0]
        if not shapely.is_valid(merged):  # a ring pinched to a point: split it into parts
            merged = shapely.union_all(mine, grid_size=grid)
        if shapely.get_type_id(geom) == 6 and shapely.get_type_id(merged) == 3:
            merged = shapely.MultiPolygon([merged])
        out.append(merged)
    return tuple(out)


# ------------------------------------------------------------------------------------- bytes


def geometry_bytes(geoms: Iterable[Any], digits: int) -> int:
    """Bytes of the geometries' ``coordinates`` as the GeoJSON layout writes them.

    Each geometry goes through :func:`reduce.maps.geojson.polygon_geometry` (rounded to
    ``digits``, oriented, duplicates removed) and its coordinates array is encoded with
    orjson, as in a payload.
    """
    return sum(len(orjson.dumps(polygon_geometry(g, digits)["coordinates"])) for g in geoms)
