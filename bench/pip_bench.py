"""Point-in-polygon throughput: ``reduce.maps.boundaries.assign`` against 50 detailed polygons.

    python bench/pip_bench.py [--points 5M] [--repeat 3] [--polygons 50] [--vertices 3000]
                              [--compare] [--json FILE]

Builds the polygons deterministically: a Voronoi tiling of ``--polygons`` seeds clipped to a
disc of radius 5 degrees, every edge densified with ``shapely.segmentize`` so each polygon
has about ``--vertices`` vertices (a few thousand). They are written as a GeoJSON file in a
temporary folder and read back with ``load_boundaries``, as a recipe would. The points are
uniform over the disc's bounding box (about a fifth fall outside every polygon).

Prints the one-off cost of the lookup grid (the first call on fresh boundaries) and the
median of ``--repeat`` timed calls of ``assign`` on all points, in points per second of
wall-clock time and per CPU-second. ``--compare`` also times two exact shapely methods (a
bounding-box prefilter with ``intersects_xy`` per prepared polygon, on all points, and an
``STRtree`` query on a sample) and checks that ``assign`` gives the same answers.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import shapely

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from reduce.maps.boundaries import Boundaries, assign, load_boundaries

CENTRE = (10.0, 45.0)
RADIUS = 5.0


def parse_count(text: str) -> int:
    """``5M``, ``500k``, ``2_000_000`` or a plain integer."""
    m = re.fullmatch(r"\s*([\d_]+(?:\.\d+)?)\s*([kKmM]?)\s*", text)
    if not m:
        raise argparse.ArgumentTypeError(f"{text!r}: use e.g. 5M, 500k or 2000000")
    scale = {"": 1, "k": 1_000, "m": 1_000_000}[m.group(2).lower()]
    return int(float(m.group(1).replace("_", "")) * scale)


def build_polygons(n: int, vertices: int, seed: int = 20240611) -> list[Any]:
    """A Voronoi tiling of ``n`` seeds clipped to a disc, densified to ~``vertices`` each."""
    rng = np.random.default_rng(seed)
    r = RADIUS * np.sqrt(rng.uniform(0.0, 1.0, n))
    a = rng.uniform(0.0, 2 * np.pi, n)
    seeds = shapely.multipoints(
        np.column_stack([CENTRE[0] + r * np.cos(a), CENTRE[1] + r * np.sin(a)])
    )
    disc = shapely.Point(*CENTRE).buffer(RADIUS, quad_segs=64)
    cells = shapely.get_parts(shapely.voronoi_polygons(seeds, extend_to=disc.buffer(1.0)))
    polygons = shapely.intersection(cells, disc)
    # One step for all: the mean perimeter over the wanted vertex count.
    step = float(np.mean(shapely.length(polygons))) / vertices
    return list(shapely.segmentize(polygons, step))


def write_geojson(polygons: list[Any], path: Path) -> None:
    features = [
        {
            "type": "Feature",
            "properties": {"id": f"R{i:02d}"},
            "geometry": json.loads(shapely.to_geojson(p)),
        }
        for i, p in enumerate(polygons)
    ]
    path.write_text(json.dumps({"type": "FeatureCollection", "features": features}))


def exact_bbox(b: Boundaries, lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    """Exact reference: first covering polygon via bounding boxes and ``intersects_xy``."""
    out = np.full(lat.size, -1, dtype=np.int32)
    bounds = shapely.bounds(np.asarray(b.geoms, dtype=object))
    for k, g in enumerate(b.geoms):
        shapely.prepare(g)
        xmin, ymin, xmax, ymax = bounds[k]
        sel = np.flatnonzero(
            (out < 0) & (lon >= xmin) & (lon <= xmax) & (lat >= ymin) & (lat <= ymax)
        )
        out[sel[shapely.intersects_xy(g, lon[sel], lat[sel])]] = k
    return out


def exact_strtree(b: Boundaries, lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    tree = shapely.STRtree(np.asarray(b.geoms, dtype=object))
    i, j = tree.query(shapely.points(lon, lat), predicate="intersects")
    out = np.full(lat.size, np.iinfo(np.int32).max, dtype=np.int64)
    np.minimum.at(out, i, j)
    out[out == np.iinfo(np.int32).max] = -1
    return out.astype(np.int32)


def measure(
    points: int, repeat: int, polygons: int, vertices: int, compare: bool
) -> dict[str, Any]:
    geoms = build_polygons(polygons, vertices)
    counts = shapely.get_num_coordinates(np.asarray(geoms, dtype=object))
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench-regions.geojson"
        write_geojson(geoms, path)
        b = load_boundaries(path, "id")
    rng = np.random.default_rng(7)
    lon = rng.uniform(CENTRE[0] - RADIUS * 1.02, CENTRE[0] + RADIUS * 1.02, points)
    lat = rng.uniform(CENTRE[1] - RADIUS * 1.02, CENTRE[1] + RADIUS * 1.02, points)
    t = time.perf_counter()
    first = assign(lat[:1], lon[:1], b)  # builds the lookup grid
    build = time.perf_counter() - t
    times, cpu = [], []
    got = first
    for _ in range(repeat):
        t, c = time.perf_counter(), time.process_time()
        got = assign(lat, lon, b)
        times.append(time.perf_counter() - t)
        cpu.append(time.process_time() - c)
    med = statistics.median(times)
    res: dict[str, Any] = {
        "points": points,
        "polygons": len(b.ids),
        "vertices_min": int(counts.min()),
        "vertices_max": int(counts.max()),
        "vertices_total": int(counts.sum()),
        "cores": len(os.sched_getaffinity(0))
        if hasattr(os, "sched_getaffinity")
        else os.cpu_count(),
        "grid_build_seconds": build,
        "seconds": times,
        "median_seconds": med,
        "points_per_second": points / med,
        "points_per_cpu_second": points / statistics.median(cpu),
        "outside_share": float(np.mean(got < 0)),
    }
    if compare:
        t = time.perf_counter()
        ref = exact_bbox(b, lat, lon)
        res["bbox_intersects_xy_points_per_second"] = points / (time.perf_counter() - t)
        res["agrees_with_bbox_intersects_xy"] = bool(np.array_equal(ref, got))
        m = min(points, 200_000)
        t = time.perf_counter()
        ref2 = exact_strtree(b, lat[:m], lon[:m])
        res["strtree_points_per_second"] = m / (time.perf_counter() - t)
        res["agrees_with_strtree"] = bool(np.array_equal(ref2, got[:m]))
    return res


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--points", type=parse_count, default=parse_count("5M"))
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--polygons", type=int, default=50)
    ap.add_argument("--vertices", type=int, default=3000, help="about this many per polygon")
    ap.add_argument("--compare", action="store_true", help="also time exact shapely methods")
    ap.add_argument("--json", type=Path, default=None, help="write the figures here")
    a = ap.parse_args(argv)
    r = measure(a.points, a.repeat, a.polygons, a.vertices, a.compare)
    print(
        f"{r['polygons']} polygons, {r['vertices_min']:,}-{r['vertices_max']:,} vertices "
        f"each ({r['vertices_total']:,} in all); {r['points']:,} points; "
        f"{r['cores']} cores"
    )
    print(f"lookup grid built in {r['grid_build_seconds']:.3f} s (once per boundaries)")
    print(
        f"assign: median of {len(r['seconds'])} = {r['median_seconds']:.3f} s = "
        f"{r['points_per_second']:,.0f} points/s "
        f"({r['points_per_cpu_second']:,.0f} per CPU-second); "
        f"{r['outside_share']:.1%} outside every polygon"
    )
    if a.compare:
        print(
            f"exact bbox + intersects_xy: {r['bbox_intersects_xy_points_per_second']:,.0f} "
            f"points/s (same answers: {r['agrees_with_bbox_intersects_xy']})"
        )
        print(
            f"exact STRtree query: {r['strtree_points_per_second']:,.0f} points/s "
            f"(same answers: {r['agrees_with_strtree']})"
        )
    if a.json:
        a.json.write_text(json.dumps(r, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
