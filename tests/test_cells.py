"""The scan's coarser cells from tables of parents (reduce.cells) are the cells the indexer
gives, point for point.

Outside source: ``h3`` (h3-py 4.x, bindings of the H3 C library): ``latlng_to_cell`` is the
reference for every point at every resolution; ``cell_to_boundary``, ``cell_to_parent``,
``get_pentagons``, ``get_icosahedron_faces`` and ``grid_disk`` place the test points where a
geometric test could go wrong: on cell edges and vertices (within a nanodegree), around
pentagons, in cells spanning two icosahedron faces, on the antimeridian and at the poles.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import h3
import numpy as np
import polars as pl
import polars_h3 as plh3
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import reduce
from reduce import aggregate, cells
from reduce.source import open_source
from tests._builders import write_case

OFFSETS = (0.0, 1e-9, -1e-9, 1e-7, -1e-7, 1e-5, -1e-5, 1e-3, -1e-3)  # degrees


def _coarse(points: pl.DataFrame, fine: int, coarse: list[int], table_points: int | None = None):
    """``with_coarse`` over the points, with tables built from the first ``table_points``."""
    frame = points.with_columns(
        plh3.latlng_to_cell("lat", "lon", fine).alias("fine")
    ).with_row_index("i")
    head = frame if table_points is None else frame.head(table_points)
    tabs = cells.tables(head.get_column("fine"), coarse)
    out = cells.with_coarse(
        frame.lazy(),
        fine="fine",
        lat="lat",
        lon="lon",
        tables=tabs,
        names={r: f"c{r}" for r in coarse},
    )
    return out.collect().sort("i"), tabs


def _check(points: pl.DataFrame, fine: int, coarse: list[int], **kw: int) -> dict[int, int]:
    """Assert every point's cell equals the indexer's (polars-h3, which the scan used for
    every resolution before) and h3's; return per resolution how many points were confirmed
    by a table (their parent is tabled and is their cell).

    polars-h3 computes with h3o, a Rust port of the H3 library, not with the C library the
    ``h3`` bindings wrap; on a point that lies on a cell edge to within rounding (the zero
    offsets below) the two may pick either cell. Such points are compared with polars-h3
    only, and there are few of them (asserted)."""
    got, tabs = _coarse(points, fine, coarse, **kw)
    rows = points.select("lat", "lon").rows()
    tabled: dict[int, int] = {}
    for r in coarse:
        direct = points.select(plh3.latlng_to_cell("lat", "lon", r)).to_series().to_list()
        want = [h3.str_to_int(h3.latlng_to_cell(la, lo, r)) for la, lo in rows]
        have = got.get_column(f"c{r}").to_list()
        bad = [(rows[i], have[i], direct[i]) for i in range(len(rows)) if have[i] != direct[i]]
        assert not bad, f"res {r}: {len(bad)} points differ from polars-h3, e.g. {bad[:3]}"
        ties = sum(d != w for d, w in zip(direct, want))
        assert ties <= 0.01 * len(rows) + 1, f"res {r}: h3 and polars-h3 differ on {ties}"
        keys = set(tabs[r].get_column("p").to_list())
        parents = got.select(plh3.cell_to_parent("fine", r)).to_series().to_list()
        tabled[r] = sum(p in keys and p == w for p, w in zip(parents, want))
    return tabled


def _around(cell: str, rng: np.random.Generator, spread: float) -> tuple[list[float], list[float]]:
    """Points on and around each vertex and edge midpoint of ``cell``."""
    lat: list[float] = []
    lon: list[float] = []
    b = h3.cell_to_boundary(cell)
    for (a1, o1), (a2, o2) in zip(b, [*b[1:], b[0]]):
        if abs(o1 - o2) > 180:  # an edge across the antimeridian: its vertices only
            marks = [(a1, o1)]
        else:
            marks = [(a1, o1), ((a1 + a2) / 2, (o1 + o2) / 2)]
        for la, lo in marks:
            for d in OFFSETS:
                lat.append(la + d)
                lon.append(lo - d)
            lat += list(la + rng.uniform(-spread, spread, 8))
            lon += list(lo + rng.uniform(-spread, spread, 8))
    return lat, lon


def _frame(lat: list[float], lon: list[float]) -> pl.DataFrame:
    la = np.clip(np.asarray(lat, dtype=np.float64), -90.0, 90.0)
    lo = (np.asarray(lon, dtype=np.float64) + 180.0) % 360.0 - 180.0
    return pl.DataFrame({"lat": la, "lon": lo})


def test_points_on_cell_edges_and_vertices_get_h3s_cell() -> None:
    rng = np.random.default_rng(11)
    lat: list[float] = []
    lon: list[float] = []
    for r in (5, 7):
        for _ in range(25):
            c = h3.latlng_to_cell(float(rng.uniform(-70, 70)), float(rng.uniform(-180, 180)), r)
            a, b = _around(c, rng, 0.01 if r == 5 else 0.002)
            lat += a
            lon += b
    tabled = _check(_frame(lat, lon), 9, [8, 7, 5])
    # The tables did confirm most points (else this would test direct indexing only).
    assert all(n > 0.3 * len(lat) for n in tabled.values()), tabled


def test_points_around_pentagons_and_multi_face_cells_get_h3s_cell() -> None:
    rng = np.random.default_rng(12)
    lat: list[float] = []
    lon: list[float] = []
    for r in (3, 5):
        for p in h3.get_pentagons(r):
            for c in h3.grid_disk(p, 1):  # the pentagon and its neighbours
                a, b = _around(c, rng, 0.05 if r == 3 else 0.01)
                lat += a
                lon += b
                clat, clon = h3.cell_to_latlng(c)
                lat += list(clat + rng.uniform(-0.3, 0.3, 10))
                lon += list(clon + rng.uniform(-0.3, 0.3, 10))
    # Cells on two or more icosahedron faces, found among the neighbours of pentagons.
    multi = [
        c
        for p in h3.get_pentagons(4)
        for c in h3.grid_disk(p, 3)
        if len(h3.get_icosahedron_faces(c)) > 1
    ]
    assert multi
    for c in multi[:40]:
        a, b = _around(c, rng, 0.02)
        lat += a
        lon += b
    _check(_frame(lat, lon), 7, [6, 5, 4, 3])


def test_antimeridian_and_poles_get_h3s_cell() -> None:
    rng = np.random.default_rng(13)
    m = 3000
    lat = list(rng.uniform(-80, 80, m)) + list(rng.uniform(89.9, 90.0, m))
    lat += list(rng.uniform(-90.0, -89.9, m))
    lon = list(rng.uniform(179.99, 180.0, m) * rng.choice([-1.0, 1.0], m))
    lon += list(rng.uniform(-180, 180, 2 * m))
    lat += [90.0, -90.0, 0.0, 0.0]
    lon += [0.0, 0.0, 180.0, -180.0]
    _check(_frame(lat, lon), 9, [8, 6, 4, 2, 0])


def test_parents_missing_from_the_tables_are_indexed_directly() -> None:
    rng = np.random.default_rng(14)
    pts = _frame(list(rng.uniform(-60, 60, 4000)), list(rng.uniform(-180, 180, 4000)))
    # Tables from the first 100 points only: most points' parents are not in them.
    tabled = _check(pts, 8, [6, 4], table_points=100)
    assert tabled[6] < 200


def test_tables_leave_out_pentagons_and_cells_on_several_faces() -> None:
    fine = [c for p in h3.get_pentagons(3) for c in h3.cell_to_children(p, 5)]
    fine += [
        c
        for p in h3.get_pentagons(4)
        for c0 in h3.grid_disk(p, 3)
        if len(h3.get_icosahedron_faces(c0)) > 1
        for c in h3.cell_to_children(c0, 5)
    ]
    fine += h3.cell_to_children(h3.latlng_to_cell(10.0, 20.0, 3), 5)  # an ordinary cell
    series = pl.Series([h3.str_to_int(c) for c in fine], dtype=pl.UInt64)
    t = cells.table(series, 3)
    kept = [h3.int_to_str(p) for p in t.get_column("p").to_list()]
    parents = {h3.cell_to_parent(c, 3) for c in fine}
    assert kept, "some parents are single-face hexagons"
    assert len(kept) < len(parents)
    assert not [c for c in kept if h3.is_pentagon(c) or len(h3.get_icosahedron_faces(c)) > 1]


def test_a_null_finest_cell_gives_null_coarser_cells() -> None:
    frame = pl.DataFrame(
        {"lat": [10.0, 10.0, None], "lon": [20.0, 20.0, 20.0], "fine": [None, 0, None]},
        schema={"lat": pl.Float64, "lon": pl.Float64, "fine": pl.UInt64},
    ).with_columns(
        pl.when(pl.int_range(pl.len()) == 1)
        .then(plh3.latlng_to_cell("lat", "lon", 9))
        .otherwise(pl.col("fine"))
        .alias("fine")
    )
    tabs = cells.tables(frame.get_column("fine"), [7])
    out = (
        cells.with_coarse(
            frame.lazy().with_row_index("i"),
            fine="fine",
            lat="lat",
            lon="lon",
            tables=tabs,
            names={7: "c7"},
        )
        .collect()
        .sort("i")
    )
    assert out.get_column("c7").to_list() == [
        None,
        h3.str_to_int(h3.latlng_to_cell(10, 20, 7)),
        None,
    ]


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(st.floats(-90, 90, allow_nan=False), st.floats(-180, 180, allow_nan=False)),
        min_size=1,
        max_size=300,
    ),
    st.integers(1, 12),
    st.data(),
)
def test_random_points_get_h3s_cell_at_every_coarser_resolution(
    pts: list[tuple[float, float]], fine: int, data: st.DataObject
) -> None:
    coarse = data.draw(
        st.lists(st.integers(0, fine - 1), min_size=1, max_size=4, unique=True), label="coarse"
    )
    # Clustered copies of the points too, so cells hold many points and tables get used.
    rng = np.random.default_rng(len(pts))
    la = np.asarray([p[0] for p in pts])
    lo = np.asarray([p[1] for p in pts])
    spread = 10.0 ** -rng.uniform(1, 5, la.size)
    lat = np.concatenate([la, la + rng.uniform(-1, 1, la.size) * spread])
    lon = np.concatenate([lo, lo + rng.uniform(-1, 1, lo.size) * spread])
    _check(_frame(list(lat), list(lon)), fine, coarse)


def _points(n: int, seed: int) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    centres = rng.uniform([-60, -180], [60, 180], (30, 2))
    pick = rng.integers(0, 30, n)
    return pl.DataFrame(
        {
            "lat": centres[pick, 0] + rng.normal(0, 0.5, n),
            "lon": centres[pick, 1] + rng.normal(0, 0.5, n),
            "kind": rng.choice(["a", "b", "c"], n),
            "x": rng.integers(0, 100, n),
        }
    )


def test_the_scan_uses_the_tables_on_large_sources_and_gets_the_same_partial(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = write_case(
        tmp_path,
        _points(20_000, 3),
        source={"lat": "lat", "lon": "lon"},
        group={"hex": {"levels": [8, 6, 4]}, "category": {"column": "kind"}},
        measures={"n": "count", "sx": {"sum": "x"}},
    )
    recipe = reduce.load_recipe(path)

    def partial() -> pl.DataFrame:
        p = aggregate.scan_partial(recipe, open_source(recipe))
        assert isinstance(p, aggregate.Partial)
        return p.table.sort(p.table.columns)

    calls: list[int] = []
    real = cells.with_coarse

    def spy(*a: object, **kw: object) -> pl.LazyFrame:
        calls.append(1)
        return real(*a, **kw)  # type: ignore[arg-type]

    monkeypatch.setattr(cells, "with_coarse", spy)
    monkeypatch.setattr(aggregate, "_TABLES", {})
    monkeypatch.setattr(cells, "FAST_MIN_ROWS", 10**12)
    indexed = partial()
    assert not calls
    monkeypatch.setattr(cells, "FAST_MIN_ROWS", 0)
    monkeypatch.setattr(cells, "TABLE_ROWS", 5_000)
    tabled = partial()
    assert calls
    assert tabled.equals(indexed)
    assert [c for c in indexed.columns if c.startswith("__hex")] == ["__hex6", "__hex4"]


def test_the_files_of_a_source_share_one_set_of_tables(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from reduce.pipeline import Reducer

    pts = _points(12_000, 4)
    (tmp_path / "ev").mkdir()
    for i in range(3):
        pts.slice(i * 4000, 4000).write_parquet(tmp_path / "ev" / f"part-{i}.parquet")
    path = write_case(
        tmp_path,
        None,
        source={"path": "ev/*.parquet", "lat": "lat", "lon": "lon"},
        group={"hex": {"levels": [8, 6, 4]}, "category": {"column": "kind"}},
        measures={"n": "count", "sx": {"sum": "x"}},
    )
    recipe = reduce.load_recipe(path)
    built: list[int] = []
    real = cells.tables

    def spy(fine: pl.Series, resolutions: list[int]) -> dict[int, pl.DataFrame]:
        built.append(1)
        return real(fine, resolutions)

    monkeypatch.setattr(cells, "tables", spy)
    monkeypatch.setattr(aggregate, "_TABLES", {})

    scans: list[int] = []
    scan = aggregate.scan_partial

    def counted(*a: Any, **kw: Any) -> Any:
        scans.append(1)
        return scan(*a, **kw)

    monkeypatch.setattr(aggregate, "scan_partial", counted)

    def finest(cache_dir: str) -> pl.DataFrame:
        # With the cache, the source is scanned file by file (one partial per file).
        monkeypatch.setenv("REDUCE_CACHE_DIR", str(tmp_path / cache_dir))
        p = Reducer(recipe).finest()
        assert isinstance(p, aggregate.Partial)
        return p.table.sort(p.table.columns)

    monkeypatch.setattr(cells, "FAST_MIN_ROWS", 10**12)
    indexed = finest("c1")
    assert not built
    monkeypatch.setattr(cells, "FAST_MIN_ROWS", 0)
    monkeypatch.setattr(cells, "TABLE_ROWS", 1_000)  # from the first file's first rows
    scans.clear()
    tabled = finest("c2")
    assert len(scans) == 3 and built == [1]  # three files scanned, one set of tables
    assert tabled.equals(indexed)
