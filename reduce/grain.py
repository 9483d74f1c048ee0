"""The scan's grain: hex resolutions and time bins the budget cannot afford, judged on the
source's first rows, so a run that keeps no partial does not compute its events' keys at
them.

The scan finds every point's cell at every resolution of the hex ladder, and at the finest
level the events are usually so sparse that the partial is as large as the source (the
bench's 20M rows: 19.9M groups at resolution 9 and 1 hour, written to disk). When a run
keeps nothing for later (``--no-cache``) and has a budget, the finest resolutions and bins
are worth scanning only if some level at them could fit. That is judged before the scan, on
the source's first :func:`reduce.aggregate.probe_rows` input rows (the slice the scan probes
anyway):

- A level's rows on a slice of the events are a lower bound of its rows on all of them (every
  group of the slice is a group of the whole, with at least as many categories). For each
  hex resolution, the level with every other axis at its coarsest (time bin, k, digits) is
  the smallest of that resolution; likewise for each time bin with the coarsest hex
  resolution. Its rows on the slice are counted (no encoding; the slice is indexed at the
  finest resolution only, its finest cells' parents standing for the coarser cells, which
  differ only near cell edges: at hex 8 on the bench table's first 1,000,000 rows, 892,985
  rows against 893,055 with exact cells) and priced at the bytes per
  row of the coarsest level's payload on the slice, compressed at the fast setting and
  scaled by the usual fast/exact ratio (:data:`reduce.measure.SAMPLE_RATIO`): finer levels
  carry about as many bytes per row or more (measured on the bench table's first 1,000,000
  rows, fast gzip: 5.24 at hex 5 and 6, 5.20 at 7, 5.36 at 8, 5.72 at 9).
- A resolution (bin) whose estimate is over :data:`MARGIN` times the budget is over at every
  level (finer bins, finer cells and larger k only add rows); the finest one that is not,
  and every coarser one, are scanned. The coarsest is always scanned.

What is judged this way is not scanned in that run, and every level at it is an estimated
verdict ("over"), marked in the manifest like the search's other estimates; the published
level and its bytes are those of a run that scanned everything, since each hex level is
computed at its own resolution and each time bin from the event times. Runs that keep the
partial (the cache, for re-fits at other budgets), measure exactly (``reduce ladder
--exact``) or visit every level are never judged so; neither are recipes with ``min_count``
(suppression can remove rows that more events would keep) or hex flows.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any

import polars_h3 as plh3

from reduce import aggregate
from reduce import budget as bsearch
from reduce.keys import HEX, hidden_hex
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
    """A hex resolution or time bin judged over the budget before the scan, on the first
    ``slice_rows`` input rows."""

    axis: str  # "hex" or "time"
    value: Any  # the resolution, or the time bin's text
    rows: int  # rows of its smallest level on the slice: a lower bound of its levels' rows
    guess: int  # estimated bytes of that level on the slice, on the budget's measure
    slice_rows: int

    @property
    def label(self) -> str:
        return f"{self.axis} {self.value}"


def eligible(recipe: Recipe, *, use_cache: bool, exact: bool, every_level: bool) -> bool:
    """Whether a run may leave hex resolutions or time bins out of its scan (see the module
    docstring)."""
    from reduce import cluster

    return (
        not use_cache
        and not exact
        and not every_level
        and recipe.budget is not None
        and recipe.hex is not None
        and recipe.min_count is None
        and recipe.flow is None
        and cluster.current() is None
    )


def judge(recipe: Recipe, src: OpenSource, b: Budget, progress: Any = None) -> list[Skipped]:
    """The finest hex resolutions and time bins of ``recipe`` that its budget cannot afford,
    judged on the source's first rows; empty when the source is no larger than that slice
    (or is not parquet), or when the finest of each may fit."""
    from reduce.measure import SAMPLE_RATIO, Measurer
    from reduce.sizes import fast_length

    ladder = recipe.ladder()
    axes = [a for a in ("hex", "time") if len(ladder.get(a, ())) > 1]
    n = aggregate.probe_rows()
    if not axes or src.format != "parquet" or src.count_rows() <= n:
        return []
    if progress:
        progress(f"judging the finest levels on the first {n:,} rows")
    part = replace(src, frame=src.rows_frame(0, n))
    # The slice is indexed at the finest resolution only, its coarser cells taken as the
    # finest cells' parents: the counts steer (a parent differs from a point's exact cell
    # only near the cell's edge), and the scan that follows computes exact cells.
    assert recipe.hex is not None
    finest_only = replace(recipe, hex=replace(recipe.hex, levels=recipe.hex.levels[:1]))
    p = aggregate.scan_partial(finest_only, part, whole=False, spill_dir=None)
    if not isinstance(p, aggregate.Partial) or not p.table.height:
        return []
    p = replace(
        p,
        table=p.table.with_columns(
            plh3.cell_to_parent(HEX, r).alias(hidden_hex(r)) for r in recipe.hex.levels[1:]
        ),
    )
    m: Measurer = Measurer(recipe, use_cache=False, source=part)
    m.use_partial(p)
    smallest = Level.of({a: lv[-1] for a, lv in ladder.items()})
    base = m.row_count(smallest)
    if not base:
        return []
    per_row = fast_length(m.payload(smallest), b.on) * SAMPLE_RATIO[b.on] / base
    out: list[Skipped] = []
    for axis in axes:
        # Along one axis, the other axes at their coarsest: the smallest levels of each value.
        for value in ladder[axis][:-1]:
            rows = m.row_count(smallest.with_(axis, value))
            guess = int(rows * per_row)
            if guess <= MARGIN * b.max:
                break
            out.append(Skipped(axis, value, rows=rows, guess=guess, slice_rows=n))
    return out


def scanned(recipe: Recipe, skipped: list[Skipped]) -> Recipe:
    """``recipe`` with the skipped (finest) hex resolutions and time bins left out of its
    ladder."""
    gone_hex = {s.value for s in skipped if s.axis == "hex"}
    gone_time = {s.value for s in skipped if s.axis == "time"}
    out = recipe
    if gone_hex and recipe.hex is not None:
        levels = tuple(r for r in recipe.hex.levels if r not in gone_hex)
        out = replace(out, hex=replace(recipe.hex, levels=levels))
    if gone_time and recipe.time is not None:
        bins = tuple(t for t in recipe.time.levels if t.text not in gone_time)
        out = replace(out, time=replace(recipe.time, levels=bins))
    return out


def describe(skipped: list[Skipped]) -> str:
    """``hex 9, 8 and time 1h``: what was (or was not) scanned, axis by axis."""
    parts = []
    for axis in ("hex", "time"):
        values = [str(s.value) for s in skipped if s.axis == axis]
        if values:
            parts.append(f"{axis} {', '.join(values)}")
    return " and ".join(parts)


def candidate(skip: Skipped, level: Level, b: Budget) -> bsearch.Candidate:
    """The verdict on a level at a skipped resolution or bin: over, estimated, its rows a
    lower bound."""
    c = bsearch.Candidate(level=level, rows=skip.rows, elements=skip.rows, raw=None)
    c.fits = False
    c.estimated = True
    c.rows_estimated = True
    c.guess = skip.guess
    c.note = (
        f"~{skip.guess:,} {b.on} bytes or more estimated from the first {skip.slice_rows:,} "
        f"rows at {skip.label}: over {b.max:,} ({skip.label} was not scanned)"
    )
    return c


def note(skipped: list[Skipped], b: Budget) -> str:
    """The manifest's note on what was not scanned."""
    return (
        f"{describe(skipped)} not scanned: their smallest levels were estimated over {MARGIN} "
        f"times the budget ({b.max:,} {b.on} bytes) on the first {skipped[0].slice_rows:,} "
        "rows; a run with the cache or reduce ladder --exact scans every level"
    )
