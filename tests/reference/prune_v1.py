"""Reference copy (kept for tests only: the current module must give identical results). Pruning: top-k categories with a remainder row, and minimum-count suppression.

This module owns both ways a payload gives up rows:

- **top-k**: within each group (``prune.top.within``, default every non-category key), the
  categories are ranked by a measure (descending, ties broken by the category label so the
  result is deterministic); categories outside the top k are relabelled to the ``rest`` label
  and merged into one remainder row per group. Relabelling happens on the *partial*, so every
  measure of the remainder row is exact (its distinct count is the size of the union of the
  folded categories' values) and every group's total is conserved.
- **minimum count**: cells whose count (or distinct-contributor count, as disclosure control
  usually asks: common practice) is below the threshold are suppressed and their rows counted
  in ``suppressed_rows``, or, with ``fold = true``, first folded into their group's remainder
  row; a remainder row still below the threshold is suppressed too.
"""

from __future__ import annotations

import polars as pl

from reduce.aggregate import N, Partial, finalize, regroup, relabel, take
from reduce.errors import SourceError
from reduce.keys import HEX, TIME
from reduce.recipe import Recipe

_AXIS_COL = {"time": TIME, "hex": HEX}


def within_columns(recipe: Recipe, within: tuple[str, ...]) -> list[str]:
    """Map ``within`` axis names to the partial's key column names."""
    cols = []
    for a in within:
        if a == "region":
            assert recipe.region is not None
            cols.append(recipe.region.column)
        else:
            cols.append(_AXIS_COL[a])
    return cols


def _relabel(recipe: Recipe, p: Partial, fold: pl.DataFrame, on: list[str]) -> Partial:
    """Relabel the categories of the rows of ``p`` that match ``fold`` (on ``on``) to rest."""
    assert recipe.top is not None
    rest = recipe.top.rest
    marker = fold.select(on).unique().with_columns(pl.lit(True).alias("__fold"))
    hit = (
        p.table.select(on)
        .join(marker, on=on, how="left", nulls_equal=True, maintain_order="left")
        .get_column("__fold")
        .fill_null(False)
    )
    mapped = p.table.with_columns(
        [pl.when(hit).then(pl.lit(rest)).otherwise(pl.col(c)).alias(c) for c in recipe.categories]
    )
    return relabel(recipe, p, mapped)


def check_rest_label(recipe: Recipe, p: Partial | pl.LazyFrame) -> None:
    """The rest label must not also be a real category (the two would merge silently).

    ``p`` is a partial, or the lazy rows of one kept on disk (only its category columns are
    read)."""
    if recipe.top is None:
        return
    rest = recipe.top.rest
    clash = pl.all_horizontal([pl.col(c) == rest for c in recipe.categories])
    rows = p.lazy() if isinstance(p, pl.LazyFrame) else p.table.lazy()
    if rows.filter(clash).select(pl.len()).collect(engine="streaming").item():
        raise SourceError(
            f"{recipe.file.name}: prune.top.rest: the label {rest!r} is also a "
            f"value of column {recipe.categories[0]!r} in the data; choose "
            "another rest label"
        )


def rank_rows(recipe: Recipe, p: Partial) -> pl.Series:
    """Each row's category rank within its group (0 = first), aligned with ``p.table``.

    The rank does not depend on k, so one ranking serves every k of the ladder.
    """
    top = recipe.top
    assert top is not None
    within = within_columns(recipe, top.within)
    cats = list(recipe.categories)
    ranked_keys = [*within, *cats]
    rank_src = p if list(p.keys) == ranked_keys else regroup(recipe, p, [], ranked_keys)
    scores = (
        finalize(recipe, rank_src, only=[top.by])
        .select([*ranked_keys, pl.col(top.by).alias("__by")])
        .with_row_index("__row")
    )
    order = scores.sort(["__by", *cats], descending=[True] + [False] * len(cats), nulls_last=True)
    ranked = order.with_columns(
        (pl.int_range(pl.len()).over(within) if within else pl.int_range(pl.len()))
        .cast(pl.UInt32)
        .alias("__rank")
    ).drop("__by")
    if rank_src is p:
        # Scatter the ranks back to the table's row order.
        out = pl.zeros(p.table.height, dtype=pl.UInt32, eager=True).alias("__rank")
        return out.scatter(ranked.get_column("__row"), ranked.get_column("__rank"))
    ranked = ranked.drop("__row")
    # Every row of a (within, category) group shares that category's rank.
    return (
        p.table.select(ranked_keys)
        .join(ranked, on=ranked_keys, how="left", nulls_equal=True, maintain_order="left")
        .get_column("__rank")
    )


def top_k(recipe: Recipe, p: Partial, k: int, ranks: pl.Series | None = None) -> Partial:
    """Keep the top ``k`` categories per group; fold the rest into one row per group."""
    assert recipe.top is not None
    ranks = rank_rows(recipe, p) if ranks is None else ranks
    fold = ranks >= k
    if not fold.any():
        return p
    rest = recipe.top.rest
    mapped = p.table.with_columns(
        [pl.when(fold).then(pl.lit(rest)).otherwise(pl.col(c)).alias(c) for c in recipe.categories]
    )
    return relabel(recipe, p, mapped)


def suppress(recipe: Recipe, p: Partial) -> tuple[Partial, int, int]:
    """Apply ``prune.min_count``; returns the partial, suppressed rows and suppressed cells."""
    mc = recipe.min_count
    if mc is None or not p.table.height:
        return p, 0, 0
    col = mc.by or N
    only = [mc.by] if mc.by else []
    small = finalize(recipe, p, only=only).get_column(col) < mc.threshold
    if not small.any():
        return p, 0, 0
    if mc.fold and recipe.top is not None:
        keys = list(p.keys)
        p = _relabel(recipe, p, p.table.filter(small).select(keys), keys)
        small = finalize(recipe, p, only=only).get_column(col) < mc.threshold
        if not small.any():
            return p, 0, 0
    rows = int(p.table.get_column(N).filter(small).sum())
    return take(p, ~small), rows, int(small.sum())
