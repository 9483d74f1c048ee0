"""Pruning: top-k categories with a remainder row, and minimum-count suppression.

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

from dataclasses import replace

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


def label_codes(s: pl.Series) -> pl.Series:
    """A text category column as UInt32 codes in label order (code-point order, as polars
    sorts strings; a null stays null), so that ordering rows by codes orders them as by the
    labels, with integer comparisons only. A column of codes in label order already (an
    ``Enum`` of sorted labels: see ``aggregate.with_label_codes``) gives its codes; any
    other column is returned as it is."""
    if isinstance(s.dtype, pl.Enum) and s.dtype.categories.is_sorted():
        return s.to_physical()
    if s.dtype != pl.String:
        return s
    labels = s.drop_nulls().unique().sort()
    return s.cast(pl.Enum(labels.to_list())).to_physical()


def _order_key(by: pl.Series, codes: list[pl.Series]) -> pl.Series | None:
    """One UInt64 per row ordering rows as (``by`` descending, then each code ascending),
    or None when the values do not pack into 63 bits (a float or null ``by``, a null code):
    then the columns are sorted as they are."""
    if not by.dtype.is_integer() or by.null_count() or not by.len():
        return None
    if any(not c.dtype.is_integer() or c.null_count() for c in codes):
        return None
    hi = int(by.max())  # type: ignore[arg-type]
    span = hi - int(by.min()) + 1  # type: ignore[arg-type]
    lows = [int(c.min()) for c in codes]  # type: ignore[arg-type]
    widths = [int(c.max()) - lo + 1 for c, lo in zip(codes, lows)]  # type: ignore[arg-type]
    total = span
    for w in widths:
        total *= w
    if total >= 2**63:
        return None
    key = (pl.lit(hi, dtype=pl.Int64) - pl.lit(by).cast(pl.Int64)).cast(pl.UInt64)
    for c, lo, w in zip(codes, lows, widths):
        key = key * w + (pl.lit(c).cast(pl.Int64) - lo).cast(pl.UInt64)
    return pl.select(key.alias("__order")).to_series()


def rank_rows(recipe: Recipe, p: Partial) -> pl.Series:
    """Each row's category rank within its group (0 = first), aligned with ``p.table``.

    Within a group, categories are ordered by ``prune.top.by`` descending, ties broken by the
    category labels (nulls last). The rows are sorted once by the group's columns and that
    order (packed into one integer key when it fits); a row's rank is its position after its
    group's first row. The rank does not depend on k, so one ranking serves every k of the
    ladder.
    """
    top = recipe.top
    assert top is not None
    within = within_columns(recipe, top.within)
    cats = list(recipe.categories)
    ranked_keys = [*within, *cats]
    rank_src = p if list(p.keys) == ranked_keys else regroup(recipe, p, [], ranked_keys)
    scores = finalize(recipe, rank_src, only=[top.by])
    by = scores.get_column(top.by)
    codes = [label_codes(scores.get_column(c)).alias(f"__code{i}") for i, c in enumerate(cats)]
    packed = _order_key(by, codes)
    frame = pl.DataFrame(
        [
            *(scores.get_column(c) for c in within),
            *([packed] if packed is not None else [by.alias("__by"), *codes]),
        ]
    )
    order = ["__order"] if packed is not None else ["__by", *(c.name for c in codes)]
    ranked = frame.with_row_index("__row").sort(
        [*within, *order],
        descending=[False] * len(within) + [packed is None] + [False] * (len(order) - 1),
        nulls_last=packed is None,  # (a packed key has no nulls; it sorts twice as fast)
    )
    idx = pl.int_range(pl.len(), dtype=pl.UInt32)
    if within:
        first = pl.any_horizontal([pl.col(c).ne_missing(pl.col(c).shift(1)) for c in within])
        rank = idx - pl.when(first | (idx == 0)).then(idx).forward_fill()
    else:
        rank = idx
    ranked = ranked.select("__row", *within, rank.alias("__rank"))
    # Scatter the ranks back to the order of the ranked rows.
    out = pl.zeros(rank_src.table.height, dtype=pl.UInt32, eager=True).alias("__rank")
    out = out.scatter(ranked.get_column("__row"), ranked.get_column("__rank"))
    if rank_src is p:
        return out
    # Every row of a (within, category) group shares that category's rank.
    ranks = scores.select(ranked_keys).with_columns(out)
    return (
        p.table.select(ranked_keys)
        .join(ranks, on=ranked_keys, how="left", nulls_equal=True, maintain_order="left")
        .get_column("__rank")
    )


def top_k(recipe: Recipe, p: Partial, k: int, ranks: pl.Series | None = None) -> Partial:
    """Keep the top ``k`` categories per group; fold the rest into one row per group.

    Only the rows that change are regrouped (those outside the top k, and any row already
    labelled rest): every other row stays one group of its own, since its keys are unique in
    the partial and no folded row can take them (a folded row's categories become the rest
    label, which no category equals: see :func:`check_rest_label`)."""
    assert recipe.top is not None
    ranks = rank_rows(recipe, p) if ranks is None else ranks
    fold = ranks >= k
    if not fold.any():
        return p
    rest = recipe.top.rest
    cats = recipe.categories
    if p.pairs:  # distinct pairs are renumbered with every row: relabel the whole table
        mapped = p.table.with_columns(
            [pl.when(fold).then(pl.lit(rest)).otherwise(pl.col(c)).alias(c) for c in cats]
        )
        return relabel(recipe, p, mapped)
    moved = (
        fold
        | pl.select(
            pl.all_horizontal([pl.lit(p.table.get_column(c)) == rest for c in cats])
        ).to_series()
    ).fill_null(fold)
    changed = p.table.filter(moved).with_columns(
        [pl.lit(rest, dtype=p.table.schema[c]).alias(c) for c in cats]
    )
    merged = relabel(recipe, replace(p, table=p.table.filter(moved)), changed)
    kept = p.table.filter(~moved)
    return replace(merged, table=pl.concat([kept, merged.table.select(kept.columns)]))


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
