"""The scan's exact coarser cells, without indexing every point at every resolution.

Every hex level counts a point in the cell that contains it at that resolution (see
:mod:`reduce.keys`). Indexing each point again at each coarser resolution of the ladder cost
the scan four fifths of its time on a five-resolution ladder, so the scan indexes each point
once, at the finest resolution, and finds its coarser cells by geometry:

- An H3 cell that lies on one icosahedron face is a hexagon whose edges are straight in that
  face's gnomonic projection, that is arcs of great circles on the sphere (from memory of the
  H3 documentation on its projection; the tests check the consequence below against
  ``h3.latlng_to_cell`` on points placed on cell edges, vertices, face edges, pentagons, the
  antimeridian and the poles). A point is in such a cell exactly when it lies on the cell's
  side of each of the six edges' great circles: six dot products of unit vectors.
- The cell containing a point is almost always the parent of its finest cell; the test above
  confirms it (with a margin of a thousandth of the cell's inner radius, far above rounding
  error). Points it does not confirm (near the parent's edge, in a neighbour of the parent,
  or in a cell that is a pentagon, spans two faces or is not in the table) are indexed
  directly with ``latlng_to_cell`` at that resolution, as before.

The table of parents (centre-free: the six edge normals and the margin per cell) is built
from the cells of a slice of the source's first rows; a cell missing from it only costs a
direct indexing. The result is the same cell ``latlng_to_cell`` gives for every point, so the
partial is identical with or without this module (the tests compare them).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import polars as pl
import polars_h3 as plh3

# Sources with fewer input rows index every point at every resolution (the tables cost more
# than they save there). Tests lower it to exercise the tables on small sources.
FAST_MIN_ROWS = 250_000
# Rows at the start of the source whose finest cells' parents are tabled.
TABLE_ROWS = 200_000
# A point confirmed in a cell lies at least this fraction of the cell's inner radius inside
# every edge (rounding errors of the test and of the indexer are ~1e-12 of it).
MARGIN = 1e-3

_X, _Y, _Z = "__cells_x", "__cells_y", "__cells_z"


def _unit(lat_deg: np.ndarray, lon_deg: np.ndarray) -> np.ndarray:
    la, lo = np.radians(lat_deg), np.radians(lon_deg)
    c = np.cos(la)
    return np.stack([c * np.cos(lo), c * np.sin(lo), np.sin(la)], axis=-1)


def table(fine: pl.Series, res: int) -> pl.DataFrame:
    """For the resolution-``res`` parents of the cells ``fine``: each parent's six inward
    edge normals (unit vectors) and the margin a point's dot products must exceed. Parents
    that are pentagons, lie on more than one icosahedron face or do not have six vertices
    are left out (their points are indexed directly)."""
    parents = (
        pl.DataFrame({"p": fine})
        .select(plh3.cell_to_parent("p", res).alias("p"))
        .drop_nulls()
        .unique()
        .sort("p")
    )
    g = parents.select(
        "p",
        plh3.cell_to_lat("p").alias("lat"),
        plh3.cell_to_lng("p").alias("lng"),
        plh3.cell_to_boundary("p").alias("b"),
        plh3.get_icosahedron_faces("p").list.len().alias("faces"),
        plh3.is_pentagon("p").alias("pentagon"),
    ).filter((pl.col("faces") == 1) & ~pl.col("pentagon") & (pl.col("b").list.len() == 6))
    cols: dict[str, object] = {"p": g.get_column("p")}
    n = g.height
    if n:
        centre = _unit(g.get_column("lat").to_numpy(), g.get_column("lng").to_numpy())
        ll = np.asarray(g.get_column("b").explode().explode().to_numpy(), dtype=np.float64)
        ll = ll.reshape(n, 6, 2)
        v = _unit(ll[..., 0], ll[..., 1])
        normal = np.cross(v, np.roll(v, -1, axis=1))
        normal /= np.linalg.norm(normal, axis=2, keepdims=True)
        side = np.einsum("nk,nvk->nv", centre, normal)
        normal *= np.sign(side)[..., None]  # pointing into the cell
        inner = np.abs(side).min(axis=1)  # sine of the centre's distance to the nearest edge
        cols["m"] = MARGIN * inner
        for i in range(6):
            for k, axis in enumerate("xyz"):
                cols[f"n{i}{axis}"] = normal[:, i, k]
    else:
        cols["m"] = pl.Series([], dtype=pl.Float64)
        for i in range(6):
            for axis in "xyz":
                cols[f"n{i}{axis}"] = pl.Series([], dtype=pl.Float64)
    return pl.DataFrame(cols, schema_overrides={"p": pl.UInt64})


def tables(fine: pl.Series, resolutions: Sequence[int]) -> dict[int, pl.DataFrame]:
    """:func:`table` for each resolution (coarser than the cells ``fine``)."""
    fine = fine.drop_nulls()
    return {r: table(fine, r) for r in resolutions}


def sample_cells(frame: pl.LazyFrame, lat: str, lon: str, res: int) -> pl.Series:
    """The distinct resolution-``res`` cells of the valid points among ``frame``'s rows."""
    la, lo = pl.col(lat).cast(pl.Float64), pl.col(lon).cast(pl.Float64)
    ok = la.is_not_null() & lo.is_not_null() & (la.abs() <= 90.0) & (lo.abs() <= 180.0)
    return (
        frame.select(la.alias("lat"), lo.alias("lon"))
        .filter(ok)
        .select(plh3.latlng_to_cell("lat", "lon", res).alias("c"))
        .unique()
        .collect()
        .get_column("c")
    )


def with_coarse(
    rows: pl.LazyFrame,
    *,
    fine: str,
    lat: str,
    lon: str,
    tables: Mapping[int, pl.DataFrame],
    names: Mapping[int, str],
) -> pl.LazyFrame:
    """``rows`` with a column ``names[r]`` per resolution ``r`` of ``tables``: the cell at
    ``r`` containing the point (``lat``, ``lon``: Float64 degrees), as ``latlng_to_cell``
    gives it; null where ``fine`` (the point's finest cell) is null. The row order is not
    kept. ``lat``/``lon`` stay; the helper columns are dropped."""
    la, lo = pl.col(lat).radians(), pl.col(lon).radians()
    out = rows.with_columns(
        (la.cos() * lo.cos()).alias(_X), (la.cos() * lo.sin()).alias(_Y), la.sin().alias(_Z)
    )
    helpers = [_X, _Y, _Z]
    for r, t in tables.items():
        pre = f"__cells{r}_"
        parent = f"{pre}p"
        right = t.rename({c: f"{pre}{c}" for c in t.columns}).lazy()
        out = out.with_columns(plh3.cell_to_parent(pl.col(fine), r).alias(parent)).join(
            right, on=parent, how="left"
        )
        inside = pl.all_horizontal(
            [
                pl.col(_X) * pl.col(f"{pre}n{i}x")
                + pl.col(_Y) * pl.col(f"{pre}n{i}y")
                + pl.col(_Z) * pl.col(f"{pre}n{i}z")
                > pl.col(f"{pre}m")
                for i in range(6)
            ]
        ).fill_null(False)
        direct = plh3.latlng_to_cell(
            pl.when(~inside & pl.col(fine).is_not_null()).then(pl.col(lat)), pl.col(lon), r
        )
        out = out.with_columns(
            pl.when(inside).then(pl.col(parent)).otherwise(direct).alias(names[r])
        ).drop([parent, *[f"{pre}{c}" for c in t.columns if c != "p"]])
    return out.drop(helpers)
