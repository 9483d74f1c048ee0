"""The pipeline: one scan, then every candidate level from the finest partial.

This module wires the stages together for one recipe:

    source -> finest partial (one scan, or the partial cache)
           -> per level: roll-up -> top-k -> min-count -> finalize -> normalize -> sort
           -> encode (digits) -> sizes -> budget search -> payload + manifest

and exposes the library API used by the command line and by Python sessions:
:func:`fit` (choose a level under a budget), :func:`ladder` (measure candidates exactly),
and :func:`run` (fit and publish). The middle is split by what each part owns:
:mod:`reduce.levels` (the Level type, the store of measured levels), :mod:`reduce.tables`
(roll-ups, rows and row counts of levels), :mod:`reduce.measure` (bytes and sizes of
candidates), :mod:`reduce.budget` (the search) and :mod:`reduce.manifest`. A
:class:`Reducer` keeps every intermediate result per level, so a search that visits the same
roll-up twice computes it once, and what it measured goes into the store for re-fits.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import polars as pl

from reduce import budget as bsearch
from reduce import grain, levels
from reduce.errors import BudgetError, RecipeError
from reduce.levels import Level
from reduce.manifest import build_manifest
from reduce.measure import QUICK_NOTE, Measurer
from reduce.publish import manifest_path, resolve_output
from reduce.recipe import Budget, Recipe, load_recipe, with_budget
from reduce.sizes import (
    BROTLI_AUTO_MAX,
    MEASURES,
    Measure,
    parse_size,
)
from reduce.source import OpenSource, open_source
from reduce.tables import LevelRows, Progress


@dataclass
class FitResult:
    """What :func:`fit` and :func:`ladder` return."""

    recipe: Recipe
    level: Level | None  # None when nothing fits
    payload: bytes | None
    candidates: list[bsearch.Candidate]
    frontier: pl.DataFrame
    chosen: bsearch.Candidate | None
    budget: Budget | None
    rows: LevelRows | None = None
    source: OpenSource | None = None
    partial_from_cache: bool = False
    accounting: dict[str, int] = field(default_factory=dict)
    reducer: Reducer | None = field(default=None, repr=False)
    record: levels.Record | None = None  # what the chosen level measured
    notes: tuple[str, ...] = ()  # for the manifest's notes (e.g. hex levels not scanned)


class Reducer(Measurer):
    """All levels of one recipe, computed lazily from one finest partial: the level tables
    (:mod:`reduce.tables`: roll-ups, rows, row counts) measured as candidates
    (:mod:`reduce.measure`: bytes, sizes, the store of measured levels)."""


def _as_recipe(recipe: Recipe | str | Path, overrides: Mapping[str, str] | None) -> Recipe:
    if isinstance(recipe, Recipe):
        if overrides:
            return load_recipe(recipe.file, overrides=overrides)
        return recipe
    return load_recipe(recipe, overrides=overrides)


def _with_budget(
    recipe: Recipe, max_: str | int | None, on: str | None, order: Sequence[str] | None
) -> Recipe:
    """Apply budget overrides given as arguments (typed, validated like the file)."""
    if max_ is None and on is None and order is None:
        return recipe
    size: int | None = None
    if max_ is not None:
        try:
            size = parse_size(max_)
        except ValueError as e:
            raise RecipeError(f"--budget: {e}") from None
    elif recipe.budget is None:
        raise RecipeError(
            f"{recipe.file.name}: budget.max: --on and --order need a budget; "
            "add --budget or a [budget] table"
        )
    if on is not None and on not in MEASURES:
        raise RecipeError(f"--on: {on!r} is not a measure; use raw, gzip or brotli")
    return with_budget(recipe, max=size, on=on, order=order)


def fit(
    recipe: Recipe | str | Path,
    *,
    budget: str | int | None = None,
    on: str | None = None,
    order: Sequence[str] | None = None,
    overrides: Mapping[str, str] | None = None,
    use_cache: bool = True,
    exact: bool = False,
    every_level: bool = False,
    progress: Progress | None = None,
    reducer: Reducer | None = None,
) -> FitResult:
    """Choose the finest level that fits the budget; measure every candidate evaluated.

    With no budget (none in the recipe, none given), the finest level is chosen. ``exact``
    measures raw, gzip and brotli bytes of every candidate (as ``reduce ladder`` shows);
    otherwise only the budget's measure is computed, stopping early once over the limit.
    ``every_level`` evaluates every combination of levels instead of searching.
    """
    r = _with_budget(_as_recipe(recipe, overrides), budget, on, order)
    # Hex resolutions and time bins the budget cannot afford, judged on the first rows, are not
    # scanned by a run that keeps no partial (see reduce.grain); their levels are estimated
    # over. Every other run scans every resolution of the ladder.
    skipped: dict[tuple[str, Any], grain.Skipped] = {}
    if reducer is not None and _same_levels(reducer.recipe, r):
        red = reducer
    elif r.budget is not None and grain.eligible(
        r, use_cache=use_cache, exact=exact, every_level=every_level
    ):
        say = progress or (lambda _msg: None)
        say("checking the source")
        src = open_source(r)  # schema checks, no scan; the Reducer below keeps it
        judged = grain.judge(r, src, r.budget, say)
        skipped = {(s.axis, s.value): s for s in judged}
        kept = grain.scanned(r, judged)
        if skipped:
            say(
                f"not scanning {grain.describe(judged)}: they cannot fit the budget (the "
                f"first rows show); scanning "
                + " and ".join(
                    f"{a} {', '.join(map(str, lv))}"
                    for a, lv in kept.ladder().items()
                    if a in ("hex", "time")
                )
            )
        red = Reducer(kept, use_cache=use_cache, progress=progress, source=src)
    else:
        red = Reducer(r, use_cache=use_cache, progress=progress)
    ladder_axes = r.ladder()
    axes = list(ladder_axes)
    b = r.budget
    cands: dict[tuple[Any, ...], bsearch.Candidate] = {}
    # Levels far over the budget are judged without ranking or encoding them: their row count
    # (from the roll-up) times the fewest bytes per row seen on a measured level (a lower
    # bound of each: see Candidate.floor), if over 1.5 times the budget. Finer levels carry
    # at least as many bytes per row in practice, so the estimate errs low; never used when
    # measuring exactly (reduce ladder) and never for the chosen level.
    margin = 1.5
    use_estimates = not exact and b is not None
    # Rows grow as any axis gets finer (a group with n categories keeps min(n, k) + [n > k]
    # rows; finer cells and bins split groups), so a level counted before bounds from below
    # every level at least as fine on every axis: such a level far over the budget by that
    # bound alone is not counted at all. (Exact hex cells do not nest, so a finer level can
    # in rare cases hold a few rows fewer; the bound only steers, with the 1.5 margin.)
    position = {a: {v: i for i, v in enumerate(lv)} for a, lv in ladder_axes.items()}
    counted: list[tuple[Level, int]] = []
    # An earlier run over fewer of these files (files added since, none changed): its row
    # counts are lower bounds of today's, and a level it measured well over the budget is
    # judged over without counting or sampling it (see measure.Earlier).
    earlier = red.earlier if use_estimates else None
    if earlier is not None:
        red.progress(
            f"using the measurements of an earlier run over {earlier.files:,} of these "
            f"{earlier.total:,} files"
        )
        counted.extend(
            (lv, n)
            for lv, n in earlier.counted()
            if set(lv) == set(axes) and all(lv[a] in position[a] for a in axes)
        )

    def rows_at_least(level: Level) -> int:
        return max(
            (
                n
                for lv, n in counted
                if all(position[a][lv[a]] >= position[a][level[a]] for a in axes)
            ),
            default=0,
        )

    # Brotli at quality 11 is by far the slowest measure (about 1 s for 800 KB against 0.16 s
    # for gzip 9): a run measures the chosen level's brotli bytes only when the budget is on
    # brotli (pre-compressed output measures them as it writes the .br file). Measuring
    # exactly (reduce ladder --exact) measures them for every payload up to BROTLI_AUTO_MAX.
    chosen_brotli: bool | None = None if exact else (b is not None and b.on == "brotli")

    def settled(c: bsearch.Candidate, force_exact: bool, verify: bool) -> bool:
        """Whether a candidate evaluated before answers as asked: ``force_exact``, every
        measure exact (brotli as :data:`chosen_brotli` says); ``verify``, the budget's
        measure exact (or an exact compression stopped over the limit); otherwise any
        verdict."""
        if force_exact:
            want_brotli = (
                chosen_brotli
                if chosen_brotli is not None
                else (b is not None and b.on == "brotli")
                or (c.raw is not None and c.raw <= BROTLI_AUTO_MAX)
            )
            return not c.estimated and c.gzip is not None and not (c.brotli is None and want_brotli)
        if verify and b is not None:
            return not c.estimated and (c.size(b.on) is not None or c.note.startswith(">"))
        return True

    def evaluate(
        level: Mapping[str, Any],
        *,
        force_exact: bool = False,
        verify: bool = False,
    ) -> bsearch.Candidate:
        level = Level.of(level)
        k = bsearch.level_key(level)
        c = cands.get(k)
        if c is not None and settled(c, force_exact, verify):
            return c
        skip = next((s for (a, v), s in skipped.items() if level.get(a) == v), None)
        if skip is not None:
            assert b is not None
            # Never the search's target nor a close neighbour: its estimate is over MARGIN
            # times the budget, and the levels scanned hold the answer.
            c = grain.candidate(skip, level, b)
            cands[k] = c
            return c
        if use_estimates and not (force_exact or verify) and b is not None:
            per_row = [
                x.floor / x.rows
                for x in cands.values()
                if not x.estimated and x.rows and x.floor is not None
            ]
            if per_row:
                bound = rows_at_least(level)
                if bound * min(per_row) > margin * b.max:
                    c = red.estimate(level, b.on, min(per_row), b.max, rows=bound)
                    cands[k] = c
                    return c
            judged = red.judged_earlier(level, b.on, b.max, rows=rows_at_least(level))
            if judged is not None:
                cands[k] = judged
                return judged
            if red.known_count(level) is None:
                # A level whose rows are known to be many (its cells, or a coarser level
                # counted before) is judged by a sample of its cells alone, its rows
                # estimated from the sample: counting them would cost a pass over the
                # partial (spilled rows at scale) for evidence that only steers.
                sampled = red.sampled(
                    level, b.on, b.max, count=False, at_least=rows_at_least(level)
                )
                if sampled is not None:
                    cands[k] = sampled
                    return sampled
            close_sample = red.known_count(level) is None and "rows" in (
                red.store.sample(level) or {}
            )
            if not close_sample:  # a close sample's level is measured next: no count first
                if red.known_count(level) is None:
                    red.progress(f"counting rows of {bsearch.describe_level(level)}")
                rows = red.row_count(level)
                counted.append((level, rows))
                if per_row and rows * min(per_row) > margin * b.max:
                    c = red.estimate(level, b.on, min(per_row), b.max)
                    cands[k] = c
                    red.forget(level)
                    return c
                # A sample of the level's cells: far enough from the limit, its estimate is
                # the verdict (steering only: the chosen level is measured exactly below).
                sampled = red.sampled(level, b.on, b.max)
                if sampled is not None:
                    cands[k] = sampled
                    return sampled
        red.progress(f"measuring {bsearch.describe_level(level)}")
        c = red.candidate(
            level,
            exact=exact or force_exact,
            on=b.on if b else None,
            limit=b.max if b else None,
            brotli=chosen_brotli,
            quick=not verify,
            defer=use_estimates and not (force_exact or verify),
        )
        cands[k] = c
        counted.append((level, c.rows))
        if c.fits is False and not every_level and not (b and _doubtful_over(c, b.on, b.max)):
            # Bounded memory: over-budget levels are never published (a doubtful verdict's
            # level is kept, its payload about the budget's size: it is measured exactly).
            red.forget(level)
        return c

    chosen_level: Level | None = None
    if every_level:
        for lv in bsearch.all_levels(ladder_axes):
            evaluate(lv)
    if b is None:
        chosen_level = Level.of(r.finest_level())
        evaluate(chosen_level, force_exact=True)
    else:
        # Search on the evidence at hand, then measure the level found exactly. An estimate
        # that was wrong (a sample said it fits; the exact bytes do not) makes that level's
        # verdict exact, and the search runs again on it: every round turns one estimated
        # verdict into an exact one, so this ends.
        for _ in range(len(bsearch.all_levels(ladder_axes)) + 1):
            res = bsearch.search(ladder_axes, b.order, lambda lv: bool(evaluate(lv).fits))
            target = Level.of(res.chosen if res.chosen is not None else res.coarsest)
            if res.chosen is None:  # the smallest payload is measured exactly for the message
                if not evaluate(target, force_exact=True).fits:
                    break
                continue  # an estimate said over; it fits: search again
            # Exactly on the budget's measure, side by side with the finer neighbours that
            # will be checked exactly if it fits; then every measure exactly.
            doubtful = [c.level for c in cands.values() if _doubtful_over(c, b.on, b.max)]
            red.prefetch(
                [target, *_close_neighbours(ladder_axes, target, cands, b.on, b.max), *doubtful],
                b.on,
            )
            if evaluate(target, verify=True).fits and evaluate(target, force_exact=True).fits:
                # Verdicts of "over" that steered the search on evidence that could still fit
                # (a close fast compression judged by its guess, an estimate within 10% of
                # the budget) are measured exactly, wherever they are on the ladder: one that
                # fits after all changes the search, which runs again.
                if any([evaluate(lv, verify=True).fits for lv in doubtful]):
                    continue
                chosen_level = target
                break
        else:  # pragma: no cover - every round makes one verdict exact
            return fit(r, exact=True, every_level=every_level, progress=progress, reducer=red)
    chosen = None
    if chosen_level is not None:
        chosen = evaluate(chosen_level, force_exact=True)
        if b is not None:
            chosen_level = _confirm_neighbours(
                ladder_axes, chosen_level, cands, evaluate, b.on, b.max
            )
            chosen = evaluate(chosen_level, force_exact=True)
        chosen.chosen = True
    candidates = list(cands.values())
    if chosen_level is not None and red.use_cache:
        red.record(chosen_level)
        red.store.keep_payload(chosen_level, red.payload(chosen_level))
    red.store.save()
    frontier = bsearch.frontier_frame(candidates, axes)
    result = FitResult(
        recipe=r,
        level=chosen_level,
        candidates=candidates,
        frontier=frontier,
        chosen=chosen,
        budget=b,
        payload=red.payload(chosen_level) if chosen_level else None,
        rows=red.built_rows(chosen_level) if chosen_level else None,
        record=red.record(chosen_level) if chosen_level else None,
        source=red.source,
        partial_from_cache=red.partial_from_cache,
        accounting=red.accounting(chosen_level) if chosen_level else {},
        reducer=red,
        notes=(grain.note(list(skipped.values()), b),) if skipped and b is not None else (),
    )
    return result


# A one-step-finer neighbour of the chosen level judged only by cheap evidence, and within
# this fraction of the budget, is measured exactly before the choice stands.
NEIGHBOUR_MARGIN = 0.10


def _confirm_neighbours(
    ladder: Mapping[str, Sequence[Any]],
    chosen: Level,
    cands: Mapping[tuple[Any, ...], bsearch.Candidate],
    evaluate: Callable[..., bsearch.Candidate],
    on: Measure,
    limit: int,
) -> Level:
    """Measure exactly every one-step-finer neighbour of ``chosen`` whose verdict came from a
    fast compression or a row count and whose size could be within 10% of the budget; move
    to one that fits (and check its neighbours in turn)."""
    current = chosen
    moved = True
    while moved:
        moved = False
        for finer in _close_neighbours(ladder, current, cands, on, limit, evaluate):
            if evaluate(finer, verify=True).fits:
                current = finer
                moved = True
                break
    return current


def _could_still_fit(c: bsearch.Candidate, on: Measure, limit: int) -> bool:
    """Whether ``c`` was judged by cheap evidence that leaves room to fit: a fast
    compression whose certain lower bound is within the budget, or a sample's or a row
    count's guess within :data:`NEIGHBOUR_MARGIN` of it (or unknown). False for a verdict
    from an exact compression (or one stopped early over the limit)."""
    if c.size(on) is not None or c.note.startswith(">"):
        return False
    if c.note == QUICK_NOTE:
        return c.floor is None or c.floor <= limit
    return c.guess is None or c.guess <= (1 + NEIGHBOUR_MARGIN) * limit


def _doubtful_over(c: bsearch.Candidate, on: Measure, limit: int) -> bool:
    """Whether ``c`` was judged over the budget by evidence that could still fit."""
    return c.fits is False and _could_still_fit(c, on, limit)


def _close_neighbours(
    ladder: Mapping[str, Sequence[Any]],
    level: Level,
    cands: Mapping[tuple[Any, ...], bsearch.Candidate],
    on: Measure,
    limit: int,
    evaluate: Callable[..., bsearch.Candidate] | None = None,
) -> list[Level]:
    """The one-step-finer neighbours of ``level`` judged only by cheap evidence that could
    still fit: a fast compression whose certain lower bound is within the budget, or a sample
    or row count whose best guess is within 10% of it (or unknown). Those are measured exactly
    before a choice stands."""
    out = []
    for axis, lv in ladder.items():
        i = list(lv).index(level[axis])
        if i == 0:
            continue
        finer = level.with_(axis, lv[i - 1])
        c = cands.get(bsearch.level_key(finer))
        if c is None and evaluate is not None:
            # A neighbour of a level moved to after the search: new evidence, judged here.
            c = evaluate(finer)
            if c.fits or c.estimated or c.note == QUICK_NOTE:
                out.append(finer)
            continue
        if c is not None and _could_still_fit(c, on, limit):
            out.append(finer)
    return out


def _same_levels(a: Recipe, b: Recipe) -> bool:
    """True when two recipes differ at most in their budget (levels can be shared)."""

    def strip(r: Recipe) -> Recipe:
        return replace(r, budget=None, content_hash="", overrides=())

    return strip(a) == strip(b)


def ladder(recipe: Recipe | str | Path, *, exact: bool = True, **kw: Any) -> FitResult:
    """Like :func:`fit`, measuring raw, gzip and brotli bytes of every candidate
    (``exact=False``: as :func:`fit` does, estimates steering and the chosen level exact;
    what ``reduce ladder`` shows without ``--exact``)."""
    return fit(recipe, exact=exact, **kw)


def smallest_message(result: FitResult) -> str:
    """The one-line 'nothing fits' message for a result without a chosen level."""
    b = result.budget
    assert b is not None
    coarsest = Level.of({a: lv[-1] for a, lv in result.recipe.ladder().items()})
    smallest = next(
        c for c in result.candidates if bsearch.level_key(c.level) == bsearch.level_key(coarsest)
    )
    return bsearch.nothing_fits_message(
        _recipe_label(result.recipe), b.max, b.on, smallest, list(result.recipe.ladder())
    )


def _recipe_label(recipe: Recipe) -> str:
    from reduce.errors import shown_path

    return shown_path(recipe.file)


@dataclass
class RunResult:
    fit: FitResult
    path: Path | None  # None when nothing was written
    manifest: dict[str, Any] | None
    over_budget: bool = False


def output_path(recipe: Recipe, out_dir: Path | None) -> Path:
    """Where a recipe's payload goes: ``--out DIR`` wins over ``output.path``."""
    from reduce.recipe import LAYOUT_EXTENSIONS

    ext = LAYOUT_EXTENSIONS[recipe.output.layout][0]
    if out_dir is not None:
        name = recipe.output.path.name if recipe.output.path else f"{recipe.name}{ext}"
        return resolve_output(Path(out_dir), name)
    if recipe.output.path is not None:
        p = recipe.output.path
        return resolve_output(p.parent, p.name)
    return resolve_output(Path("out"), f"{recipe.name}{ext}")


def run(
    recipe: Recipe | str | Path,
    *,
    out_dir: Path | None = None,
    budget: str | int | None = None,
    on: str | None = None,
    overrides: Mapping[str, str] | None = None,
    write_anyway: bool = False,
    use_cache: bool = True,
    progress: Progress | None = None,
) -> RunResult:
    """Fit a recipe and publish its payload and manifest (see :func:`fit`).

    Raises :class:`~reduce.errors.BudgetError` when nothing fits, after writing the smallest
    payload only if ``write_anyway``.
    """
    r = _as_recipe(recipe, overrides)
    path = output_path(r, out_dir)
    from reduce.publish import check_target
    from reduce.siblings import publish_run

    check_target(path, create=False)  # fail before the scan, not after it
    result = fit(r, budget=budget, on=on, use_cache=use_cache, progress=progress)
    if result.level is None:
        msg = smallest_message(result)
        if not write_anyway:
            raise BudgetError(msg)
        coarsest = Level.of({a: lv[-1] for a, lv in result.recipe.ladder().items()})
        red = result.reducer
        assert red is not None
        forced = next(
            c
            for c in result.candidates
            if bsearch.level_key(c.level) == bsearch.level_key(coarsest)
        )
        forced.chosen = True
        result = replace(
            result,
            level=coarsest,
            chosen=forced,
            payload=red.payload(coarsest),
            rows=red.rows(coarsest),
            accounting=red.accounting(coarsest),
        )
        manifest = build_manifest(result, path)
        publish_run(r, path, result.payload or b"", manifest)
        return RunResult(result, path, manifest, over_budget=True)
    manifest = build_manifest(result, path)
    assert result.payload is not None
    publish_run(r, path, result.payload, manifest)
    red = result.reducer
    if red is not None:
        red.store.save()
    return RunResult(result, path, manifest)


__all__ = ["FitResult", "Reducer", "RunResult", "fit", "ladder", "manifest_path", "run"]
