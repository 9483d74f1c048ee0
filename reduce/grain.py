"""The scan's grain: hex resolutions the budget cannot afford, judged on the source's first
rows, so a run that keeps no partial does not index its events at them.

The scan finds every point's cell at every resolution of the hex ladder, and at the finest
resolution the events are usually so sparse that the partial is as large as the source (the
bench's 20M rows: 19.9M groups at resolution 9, written to disk). When a run keeps nothing
for later (``--no-cache``) and has a budget, the finest resolutions are worth scanning only
if some level at them could fit. That is judged before the scan, on the source's first
:func:`reduce.aggregate.probe_rows` input rows (the slice the scan probes anyway):

- A level's rows on a slice of the events are a lower bound of its rows on all of them (every
  group of the slice is a group of the whole, with at least as many categories), and the
  level at the coarsest time bin, the smallest k and the fewest digits is the smallest of its
  resolution. Its rows on the slice are counted (no encoding), and priced at the bytes per
  row of the coarsest level's payload on the slice, compressed at the fast setting and
  scaled by the usual fast/exact ratio (:data:`reduce.measure.SAMPLE_RATIO`): finer levels
  carry about as many bytes per row or more (measured on the bench table's first 1,000,000
  rows, fast gzip: 5.24 at hex 5 and 6, 5.20 at 7, 5.36 at 8, 5.72 at 9).
- A resolution whose estimate is over :data:`MARGIN` times the budget is over at every level
  (finer bins and larger k only add rows); the finest resolution that is not, and every
  coarser one, are scanned. The coarsest resolution is always scanned.

Resolutions judged this way are never scanned in that run, and every level at them is an
estimated verdict ("over"), marked in the manifest like the search's other estimates; the
published level and its bytes are those of a run that scanned every resolution, since hex
levels are exact cells computed at each resolution directly. Runs that keep the partial (the
cache, for re-fits at other budgets), measure exactly (``reduce ladder --exact``) or visit
every level are never judged so; neither are recipes with ``min_count`` (suppression can
remove rows that more events would keep) or hex flows.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any

from reduce import aggregate
from reduce import budget as bsearch
from reduce.levels import Level
from reduce.recipe import Budget, Recipe
from reduce.source import OpenSource

if TYPE_CHECKING:
    from reduce.measure import Measurer

# A resolution is not scanned when the smallest of its levels is estimated over this many
# times the budget on the source's first rows (the margin the search's row estimates use).
MARGIN = 1.5


@dataclass(frozen=True)
class Skipped:
    """A hex resolution judged over the budget before the scan, from ``rows`` input rows."""

    res: int
    rows: int  # rows of its smallest level on the slice: a lower bound of its levels' rows
    guess: int  # estimated bytes of that level on the slice, on the budget's measure
    slice_rows: int


def eligible(recipe: Recipe, *, use_cache: bool, exact: bool, every_level: bool) -> bool:
    """Whether a run may skip hex resolutions (see the module docstring)."""
    from reduce import cluster

    return (
        not use_cache
        and not exact
        and not every_level
        and recipe.budget is not None
        and recipe.hex is not None
        and len(recipe.hex.levels) > 1
        and recipe.min_count is None
        and recipe.flow is None
        and cluster.current() is None
    )


def judge(recipe: Recipe, src: OpenSource, b: Budget, progress: Any = None) -> list[Skipped]:
    """The finest hex resolutions of ``recipe`` that its budget cannot afford, judged on the
    source's first rows; empty when the source is no larger than that slice (or is not
    parquet), or when the finest resolution may fit."""
    from reduce.measure import SAMPLE_RATIO, Measurer
    from reduce.sizes import fast_length

    assert recipe.hex is not None
    n = aggregate.probe_rows()
    if src.format != "parquet" or src.count_rows() <= n:
        return []
    if progress:
        progress(f"judging hex resolutions on the first {n:,} rows")
    part = replace(src, frame=src.rows_frame(0, n))
    p = aggregate.scan_partial(recipe, part, whole=False, spill_dir=None)
    if not isinstance(p, aggregate.Partial) or not p.table.height:
        return []
    m: Measurer = Measurer(recipe, use_cache=False, source=part)
    m.use_partial(p)
    smallest = Level.of({a: lv[-1] for a, lv in recipe.ladder().items()})
    base = m.row_count(smallest)
    if not base:
        return []
    per_row = fast_length(m.payload(smallest), b.on) * SAMPLE_RATIO[b.on] / base
    out: list[Skipped] = []
    for res in recipe.hex.levels[:-1]:
        rows = m.row_count(smallest.with_("hex", res))
        guess = int(rows * per_row)
        if guess <= MARGIN * b.max:
            break
        out.append(Skipped(res=res, rows=rows, guess=guess, slice_rows=n))
    return out


def scanned(recipe: Recipe, skipped: list[Skipped]) -> Recipe:
    """``recipe`` with the skipped (finest) hex resolutions left out of its ladder."""
    assert recipe.hex is not None
    gone = {s.res for s in skipped}
    levels = tuple(r for r in recipe.hex.levels if r not in gone)
    return replace(recipe, hex=replace(recipe.hex, levels=levels))


def candidate(skip: Skipped, level: Level, b: Budget) -> bsearch.Candidate:
    """The verdict on a level at a skipped resolution: over, estimated, rows a lower bound."""
    c = bsearch.Candidate(level=level, rows=skip.rows, elements=skip.rows, raw=None)
    c.fits = False
    c.estimated = True
    c.rows_estimated = True
    c.guess = skip.guess
    c.note = (
        f"~{skip.guess:,} {b.on} bytes or more estimated from the first {skip.slice_rows:,} "
        f"rows at hex {skip.res}: over {b.max:,} (hex {skip.res} was not scanned)"
    )
    return c


def note(skipped: list[Skipped], b: Budget) -> str:
    """The manifest's note on the resolutions not scanned."""
    res = ", ".join(str(s.res) for s in skipped)
    return (
        f"hex {res} not scanned: their smallest levels were estimated over {MARGIN} times "
        f"the budget ({b.max:,} {b.on} bytes) on the first {skipped[0].slice_rows:,} rows; "
        "a run with the cache or reduce ladder --exact scans every resolution"
    )
