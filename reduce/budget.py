"""The byte-budget optimiser: which level of the ladder to publish.

This module owns the search. A recipe's ladder has one list of levels per axis (hex
resolutions, time bins, top-k values, decimal digits), finest first, and ``budget.order``
says which axis gives up detail first. The chosen level is the *lexicographically finest*
level that fits: the axis that gives up detail last keeps the finest level for which some
level of the other axes fits; given that, the next axis keeps its finest fitting level; and
so on down to the axis that gives up detail first.

Search: start from the coarsest level of every axis (if that does not fit, nothing does);
then, for each axis from last-to-give-up to first, bisect over its levels with the axes not
yet fixed held at their coarsest. Bisection assumes a payload never grows when one axis gets
coarser (true of row counts; byte sizes follow them in practice); the chosen level is always
checked to fit, and its one-step-finer neighbour on the first-to-give-up axis was evaluated
and did not fit. Sizes are not always monotone, so the search ends with a local check:
while a level one step finer on any axis fits, it moves there. With a ladder of
5 × 4 × 4 × 3 levels this evaluates about 10-14 candidates instead of 240.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import polars as pl

from reduce.sizes import format_size

# The search is generic over any axes (levels.Level is the pipeline's typed level; the search
# and its tests also run on plain mappings of abstract axes).
Level = dict[str, Any]


@dataclass
class Candidate:
    """One evaluated level: its size on every measured axis and whether it fits."""

    level: Mapping[str, Any]
    rows: int
    elements: int
    raw: int | None  # None when the level was judged from its row count (estimated)
    gzip: int | None = None
    brotli: int | None = None
    fits: bool | None = None
    chosen: bool = False
    note: str = ""
    estimated: bool = False
    # Its rows estimated from a sample of its cells (not counted): see Measurer.sampled.
    rows_estimated: bool = False
    # A lower bound of the size on the budget's measure (the exact size when measured, or
    # what a fast compression implies): its bytes per row bound the rows-only estimates.
    floor: int | None = None
    # The best guess of that size when it was not measured exactly (a fast compression's
    # length, or rows times bytes per row): decides which close calls are measured again.
    guess: int | None = None

    def size(self, on: str) -> int | None:
        return getattr(self, on)  # type: ignore[no-any-return]


@dataclass
class SearchResult:
    chosen: Level | None
    coarsest: Level
    evaluated: list[Level] = field(default_factory=list)


def level_key(level: Mapping[str, Any]) -> tuple[tuple[str, Any], ...]:
    return tuple(sorted(level.items()))


def search(
    ladder: Mapping[str, Sequence[Any]], order: Sequence[str], fits: Callable[[Level], bool]
) -> SearchResult:
    """Find the lexicographically finest level that fits (see the module docstring).

    ``fits`` is called at most once per distinct level.
    """
    seen: dict[tuple[tuple[str, Any], ...], bool] = {}
    evaluated: list[Level] = []

    def test(level: Level) -> bool:
        k = level_key(level)
        if k not in seen:
            seen[k] = fits(dict(level))
            evaluated.append(dict(level))
        return seen[k]

    current = {a: levels[-1] for a, levels in ladder.items()}
    coarsest = dict(current)
    if not test(current):
        return SearchResult(None, coarsest, evaluated)
    priority = list(reversed([a for a in order if a in ladder]))
    priority += [a for a in ladder if a not in priority]
    for axis in priority:
        levels = list(ladder[axis])
        lo, hi = 0, len(levels) - 1  # levels[hi] fits (current)
        while lo < hi:
            mid = (lo + hi) // 2
            trial = {**current, axis: levels[mid]}
            if test(trial):
                hi = mid
            else:
                lo = mid + 1
        current[axis] = levels[hi]
    # Compressed sizes are not always monotone (keeping one more category can shrink a
    # brotli stream by a few bytes). Finish with a local check: while a level one step finer
    # on some axis fits, take it, so no single axis can be made finer within the budget.
    improved = True
    while improved:
        improved = False
        for axis in priority:
            levels = list(ladder[axis])
            i = levels.index(current[axis])
            if i > 0 and test({**current, axis: levels[i - 1]}):
                current[axis] = levels[i - 1]
                improved = True
                break
    return SearchResult(current, coarsest, evaluated)


def all_levels(ladder: Mapping[str, Sequence[Any]]) -> list[Level]:
    """Every combination of levels, finest first (for ``reduce ladder --all``)."""
    out: list[dict[str, Any]] = [{}]
    for axis, levels in ladder.items():
        out = [{**lv, axis: x} for lv in out for x in levels]
    return out


def frontier_frame(cands: Sequence[Candidate], axes: Sequence[str]) -> pl.DataFrame:
    """The evaluated candidates as a table: one column per axis, then sizes and verdicts."""
    data: dict[str, list[Any]] = {a: [str(c.level.get(a)) for c in cands] for a in axes}
    data["rows"] = [c.rows for c in cands]
    data["elements"] = [c.elements for c in cands]
    for m in ("raw", "gzip", "brotli"):
        data[m] = [c.size(m) for c in cands]
    data["fits"] = [c.fits for c in cands]
    data["chosen"] = [c.chosen for c in cands]
    schema = {a: pl.String for a in axes} | {
        "rows": pl.Int64,
        "elements": pl.Int64,
        "raw": pl.Int64,
        "gzip": pl.Int64,
        "brotli": pl.Int64,
        "fits": pl.Boolean,
        "chosen": pl.Boolean,
    }
    return pl.DataFrame(data, schema=schema)


def describe_level(level: Mapping[str, Any]) -> str:
    return ", ".join(f"{a}={v}" for a, v in level.items())


def nothing_fits_message(
    recipe_label: str, limit: int, on: str, smallest: Candidate, axes: Sequence[str]
) -> str:
    size = smallest.size(on)
    hints = ["raise budget.max (or --budget)"]
    if "hex" in axes:
        hints.append("add a coarser hex level")
    if "time" in axes:
        hints.append("add a wider time bin")
    if "top" in axes:
        hints.append("lower prune.top.k")
    return (
        f"{recipe_label}: no level fits the budget of {format_size(limit)} {on}: the "
        f"smallest payload is {format_size(size or 0)} ({size} bytes {on}) at "
        f"{describe_level(smallest.level)}; {', '.join(hints)}"
    )
