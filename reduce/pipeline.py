"""The pipeline: one scan, then every candidate level from the finest partial.

This module wires the stages together for one recipe:

    source -> finest partial (one scan, or the partial cache)
           -> per level: roll-up -> top-k -> min-count -> finalize -> normalize -> sort
           -> encode (digits) -> sizes -> budget search -> payload + manifest

and exposes the library API used by the command line and by Python sessions:
:func:`fit` (choose a level under a budget), :func:`ladder` (measure candidates exactly),
and :func:`run` (fit and publish). Every intermediate result is cached per level within a
:class:`Reducer`, so a search that visits the same roll-up twice computes it once.
"""

from __future__ import annotations

import shutil
import weakref
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import polars as pl

from reduce import aggregate, cache, encode, levels, normalize, prune
from reduce import budget as bsearch
from reduce.aggregate import Partial, Spilled
from reduce.errors import BudgetError, RecipeError
from reduce.keys import HEX, coarsen, hidden_below, is_hidden
from reduce.normalize import NormalizeReport
from reduce.publish import manifest_path, resolve_output, sha256
from reduce.recipe import Budget, Recipe, TimeBin, load_recipe, parse_time_bin
from reduce.sizes import (
    BROTLI_AUTO_MAX,
    MEASURES,
    Measure,
    Sizes,
    fits_on,
    measure_all,
    parse_size,
    quick_look,
)
from reduce.source import OpenSource, open_source

Progress = Callable[[str], None]

# The distinct keys of a level counted from spilled rows are kept (per part) up to this many
# rows, about 160 MB for hex x time x category, so that coarser levels the search counts next
# come from them instead of another pass over the spilled rows.
KEEP_KEY_ROWS = 5_000_000


@dataclass
class LevelRows:
    """Finalized, normalized, sorted rows of one level (before encoding)."""

    frame: pl.DataFrame
    suppressed_rows: int
    suppressed_cells: int
    report: NormalizeReport


@dataclass
class FitResult:
    """What :func:`fit` and :func:`ladder` return."""

    recipe: Recipe
    level: dict[str, Any] | None  # None when nothing fits
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


class Reducer:
    """All levels of one recipe, computed lazily from one finest partial."""

    def __init__(self, recipe: Recipe, *, use_cache: bool = True,
                 progress: Progress | None = None) -> None:
        self.recipe = recipe
        self.use_cache = use_cache
        self.progress = progress or (lambda _msg: None)
        self.source: OpenSource | None = None
        self.partial_from_cache = False
        self._partial: Partial | None = None
        self._finest: Partial | Spilled | None = None
        self._rollups: dict[tuple[Any, Any], Partial] = {}
        self._rows: dict[tuple[Any, ...], LevelRows] = {}
        self._payloads: dict[tuple[Any, ...], bytes] = {}
        self._den: pl.DataFrame | None = None
        self._hex_geoms: dict[int, dict[str, Any]] = {}
        self._ranks: dict[tuple[Any, Any], pl.Series] = {}
        self._row_counts: dict[tuple[Any, ...], int] = {}
        self._histograms: dict[tuple[Any, Any], pl.DataFrame] = {}
        # distinct keys per part of levels counted from spilled rows, when small enough
        self._keysets: dict[tuple[Any, Any], list[pl.DataFrame]] = {}
        self._region_geoms: dict[tuple[float, int], dict[str, Any]] = {}
        self._split: dict[int | None, pl.Series | None] = {}
        self._visibles: dict[tuple[Any, Any], Partial] = {}
        self._boundaries: Any = None
        self._key: str | None = None
        self._store: levels.Store | None = None
        n = recipe.normalize
        if n is not None and n.denominators is not None:
            self._den = normalize.load_denominators(n.denominators)

    # -- the finest partial -----------------------------------------------------------------
    def finest(self) -> Partial | Spilled:
        """The finest partial: from the cache, or one scan of the source (kept on disk when
        the source is large and sparse at the finest level: see ``aggregate.Spilled``)."""
        if self._finest is None:
            key = self.entry()
            p = cache.load(key) if self.use_cache else None
            if p is not None:
                self.partial_from_cache = True
                self.progress("using the cached finest partial")
            else:
                def spill() -> Path:  # made only if the source has to spill
                    d = (cache.spill_dir(key) if self.use_cache else None) \
                        or cache.temp_spill_dir()
                    weakref.finalize(self, shutil.rmtree, d, True)
                    return d

                p = aggregate.scan_partial(self.recipe, self.source, progress=self.progress,
                                           spill_dir=spill)
                if self.use_cache:
                    p = cache.store(key, p, recipe=self.recipe.scan_hash) or p
                    entry = cache.cache_dir() / key
                    if self._store is not None and self._store.folder is None \
                            and entry.is_dir():
                        self._store.folder = entry  # measurements go with the new entry
            prune.check_rest_label(self.recipe, p.frame() if isinstance(p, Spilled) else p)
            self._finest = p
        return self._finest

    def entry(self) -> str:
        """The cache key of this recipe over the source as it is now (opens the source:
        schema checks and fingerprint, no scan)."""
        if self._key is None:
            self.progress("checking the source")
            self.source = open_source(self.recipe)
            self._key = cache.cache_key(self.recipe, self.source.fingerprint)
        return self._key

    @property
    def store(self) -> levels.Store:
        """The measured levels kept with the cache entry (empty without the cache)."""
        if self._store is None:
            key = self.entry()
            folder = cache.cache_dir() / key if self.use_cache else None
            self._store = levels.Store(folder if folder is not None and folder.is_dir()
                                       else None, _store_name(self.recipe))
            if self._store.records:
                self.partial_from_cache = True
        return self._store

    def record(self, level: Mapping[str, Any]) -> levels.Record:
        """What a level measured: from the store, or from the level built now."""
        rec = self.store.get(level)
        if rec is not None:
            return rec
        data = self.payload(level)
        lr = self.rows(level)
        acc = self.finest().accounting
        rec = levels.Record(
            level=dict(level), rows=lr.frame.height, elements=encode.elements(lr.frame),
            raw=len(data), sha256=sha256(data),
            accounting={**self.accounting(level), "invalid_by_reason": acc.invalid_by_reason,
                        "suppressed_cells": lr.suppressed_cells},
            suppressed_cells=lr.suppressed_cells,
            denominators=(lr.report.as_dict() if self.recipe.normalize is not None
                          and self.recipe.normalize.rate_measures else None))
        self.store.put(rec)
        return self.store.get(level) or rec

    def remember(self, c: bsearch.Candidate, *, on: Measure | None = None,
                 limit: int | None = None) -> None:
        """Keep what a measured candidate showed (exact lengths; a certain lower bound where
        an exact compression stopped early over ``limit``)."""
        if c.estimated or c.raw is None:
            return
        rec = self.record(c.level)
        more = levels.Record(level=rec.level, rows=rec.rows, elements=rec.elements,
                             raw=rec.raw, sha256=rec.sha256, gzip=c.gzip, brotli=c.brotli)
        if c.note.startswith(">") and on in ("gzip", "brotli") and limit is not None:
            setattr(more, f"{on}_floor", limit + 1)
        self.store.put(rec.merge(more))

    def partial(self) -> Partial:
        """The finest partial in memory (merged from its files when it was spilled)."""
        if self._partial is None:
            f = self.finest()
            self._partial = (f if isinstance(f, Partial) else
                             aggregate.rollup_spilled(self.recipe, f, hex_res=None,
                                                      time_bin=None))
        return self._partial

    # -- levels -----------------------------------------------------------------------------
    def _rollup(self, hex_res: int | None, time_text: str | None) -> Partial:
        """The partial at (hex, time), rolled up from the smallest finer partial at hand.

        Roll-ups go straight to the level asked for: an intermediate level (say the finest
        hex at the coarser time bin) is nearly as large as the finest partial when events
        are sparse, so building it costs a second pass over that size and holds a second
        copy in memory (measured at 20M rows: 10.7 s and 6.8 GB peak through intermediates,
        6.8 s and 3.7 GB direct).
        """
        k = (hex_res, time_text)
        if k in self._rollups:
            return self._rollups[k]
        finest = self.finest()
        if isinstance(finest, Partial):
            self._rollups.setdefault((finest.hex_res, _text(finest.time_bin)), finest)
        tb = parse_time_bin(time_text) if time_text else None
        sources = [(p.table.height, i, p) for i, ((h, t), p) in enumerate(self._rollups.items())
                   if _finer_or_equal(h, t, hex_res, tb)]
        if not sources:
            assert isinstance(finest, Spilled)
            out = aggregate.rollup_spilled(self.recipe, finest, hex_res=hex_res, time_bin=tb)
            self._rollups[k] = out
            return out
        src = min(sources, key=lambda x: x[:2])[2]
        out = aggregate.rollup(self.recipe, src, hex_res=hex_res, time_bin=tb)
        self._rollups[k] = out
        return out

    def _visible(self, hex_res: int | None, time_text: str | None) -> Partial:
        """The roll-up at (hex, time) grouped by its keys alone (see ``aggregate.visible``),
        kept: the ranks of top-k are aligned with its rows."""
        k = (hex_res, time_text)
        if k not in self._visibles:
            self._visibles[k] = aggregate.visible(self.recipe, self._rollup(hex_res, time_text))
        return self._visibles[k]

    def rows(self, level: Mapping[str, Any]) -> LevelRows:
        """Rows of a level (digits do not matter here)."""
        r = self.recipe
        k = (level.get("hex"), level.get("time"), level.get("top"))
        if k not in self._rows:
            p = self._visible(level.get("hex"), level.get("time"))
            if r.top is not None:
                rk = (level.get("hex"), level.get("time"))
                if rk not in self._ranks:
                    self._ranks[rk] = prune.rank_rows(r, p)
                p = prune.top_k(r, p, int(level["top"]), self._ranks[rk])
            p, sup_rows, sup_cells = prune.suppress(r, p)
            final = aggregate.finalize(r, p)
            final, report = normalize.apply(r, final, den=self._den, hex_res=level.get("hex"))
            final = encode.sort_rows(r, final)
            self._rows[k] = LevelRows(final, sup_rows, sup_cells, report)
        return self._rows[k]

    def built_rows(self, level: Mapping[str, Any]) -> LevelRows | None:
        """A level's rows if they were built in this session (None when it came from the
        store of measured levels)."""
        return self._rows.get((level.get("hex"), level.get("time"), level.get("top")))

    def row_count(self, level: Mapping[str, Any]) -> int:
        """Rows of a level's payload, from its roll-up alone when that is enough.

        With top-k ranked within every non-category key, each group keeps ``min(n, k)`` of
        its ``n`` categories plus one remainder row when ``n > k``, so the count needs no
        ranking, relabelling or encoding. Otherwise (``within`` narrower than the keys, or
        ``min_count``, which can drop any row) the level's rows are computed in full.
        """
        k = (level.get("hex"), level.get("time"), level.get("top"))
        if k not in self._row_counts:
            stored = self.store.count(level)
            self._row_counts[k] = stored if stored is not None else self._count_rows(level)
            self.store.put_count(level, self._row_counts[k])
        return self._row_counts[k]

    def _count_rows(self, level: Mapping[str, Any]) -> int:
        k = (level.get("hex"), level.get("time"), level.get("top"))
        r = self.recipe
        if k in self._rows or r.min_count is not None:
            return self.rows(level).frame.height
        cats = set(r.categories)
        outer = [c for c in self.finest().keys if c not in cats]
        hist = self._category_histogram(level.get("hex"), level.get("time"), outer)
        n, groups = hist.get_column("n"), hist.get_column("groups")
        if r.top is None:
            return int((n * groups).sum())
        top = int(level["top"])
        if not outer or set(prune.within_columns(r, r.top.within)) == set(outer):
            return int(((n.clip(upper_bound=top) + (n > top).cast(pl.Int64)) * groups).sum())
        return self.rows(level).frame.height

    def _category_histogram(self, h: int | None, t: str | None,
                            outer: list[str]) -> pl.DataFrame:
        """How many groups of the outer (non-category) keys hold ``n`` categories, for each
        ``n``, at (hex, time): enough to count the rows of every top-k. Taken from the roll-up
        at hand, or, straight from spilled rows, part by part from their distinct keys (one
        part's groups in memory at a time; never spanning two parts by construction)."""
        key = (h, t)
        if key in self._histograms:
            return self._histograms[key]
        finest = self.finest()

        cats = [c for c in finest.keys if c not in outer]
        visible_keys = [*outer, *cats]

        def hist(table: pl.DataFrame) -> pl.DataFrame:
            lf = table.lazy()
            if any(is_hidden(c) for c in table.columns):
                # Rows differing only in hidden cells are one payload row.
                lf = lf.select(visible_keys).unique()
            per = (lf.group_by(outer).agg(pl.len().alias("n")) if outer
                   else lf.select(pl.len().alias("n")))
            return (per.group_by("n").agg(pl.len().cast(pl.Int64).alias("groups"))
                    .collect(engine="streaming").with_columns(pl.col("n").cast(pl.Int64)))

        if isinstance(finest, Partial) or key in self._rollups or self._finer_at_hand(h, t):
            out = hist(self._rollup(h, t).table)
        else:
            tb = parse_time_bin(t) if t else None
            at_hand = [(sum(p.height for p in ks), kh, kt) for (kh, kt), ks
                       in self._keysets.items() if _finer_or_equal(kh, kt, h, tb)]
            if at_hand:  # coarsen the distinct keys of a finer level counted before
                _, kh, kt = min(at_hand, key=lambda x: x[0])
                mapping = coarsen(self.recipe, hex_res=h, time_bin=tb, from_hex=kh,
                                  from_time=parse_time_bin(kt) if kt else None)
                group = [*finest.keys, *hidden_below(self.recipe, h)]
                tables: Any = (ks.lazy().with_columns(mapping).select(group).unique()
                               .collect(engine="streaming") for ks in self._keysets[(kh, kt)])
            else:
                tables = aggregate.rollup_spilled_parts(self.recipe, finest, hex_res=h,
                                                        time_bin=tb, keys_only=True)
            # The parts split rows by their exact cell at the coarsest hex level; a cell of a
            # finer level that straddles a coarsest cell's edge has rows in two parts. Those
            # cells' keys are gathered from every part and counted once.
            if h not in self._split:
                self._split[h] = aggregate.split_cells(self.recipe, finest, h)
            split = self._split[h]
            parts: list[pl.DataFrame] = []
            straddling: list[pl.DataFrame] = []
            kept: list[pl.DataFrame] | None = []
            kept_rows = 0
            for table in tables:
                if split is not None and len(split):
                    across = table.get_column(HEX).is_in(split.implode())
                    straddling.append(table.filter(across).select(visible_keys).unique())
                    parts.append(hist(table.filter(~across)))
                else:
                    parts.append(hist(table))
                kept_rows += table.height
                if kept is not None:
                    kept = kept + [table] if kept_rows <= KEEP_KEY_ROWS else None
                del table
            if straddling:
                parts.append(hist(pl.concat(straddling).unique()))
            if kept is not None:
                self._keysets[key] = kept
            both = pl.concat(parts)
            if outer:
                out = both.group_by("n").agg(pl.col("groups").sum())
            else:  # the categories of all parts make up one group
                out = pl.DataFrame({"n": [int((both["n"] * both["groups"]).sum())],
                                    "groups": [1]})
        self._histograms[key] = out
        return out

    def _finer_at_hand(self, hex_res: int | None, time_text: str | None) -> bool:
        tb = parse_time_bin(time_text) if time_text else None
        return any(_finer_or_equal(h, t, hex_res, tb) for h, t in self._rollups)

    def accounting(self, level: Mapping[str, Any]) -> dict[str, int]:
        rec = self.store.get(level)
        if rec is not None and rec.accounting and self.built_rows(level) is None:
            keys = ("input_rows", "filtered_rows", "invalid_rows", "unassigned_rows",
                    "suppressed_rows", "represented_rows")
            return {k: rec.accounting[k] for k in keys if k in rec.accounting}
        acc = self.finest().accounting
        lr = self.rows(level)
        r = self.recipe
        uses_boundaries = bool((r.region and r.region.boundaries)
                               or (r.flow and r.flow.boundaries))
        return encode.accounting_block(
            input_rows=acc.input_rows, filtered_rows=acc.filtered_rows,
            invalid_rows=acc.invalid_rows, suppressed_rows=lr.suppressed_rows,
            represented_rows=encode.represented(lr.frame),
            unassigned_rows=acc.unassigned_rows if uses_boundaries else None)

    def payload(self, level: Mapping[str, Any]) -> bytes:
        k = bsearch.level_key(level)
        if k not in self._payloads:
            kept = self.store.payload(level)
            if kept is not None:
                self._payloads[k] = kept
                return kept
            r = self.recipe
            lr = self.rows(level)
            meta: dict[str, Any] = {}
            if r.time:
                meta["time_zone"] = r.time.zone
            if r.top:
                meta["rest"] = r.top.rest
            if r.normalize and r.normalize.rate_measures:
                meta["per"] = r.normalize.per
            geometry = self._geometry(level) if r.output.layout == "geojson" else None
            self._payloads[k] = encode.encode(r, lr.frame, level=level,
                                              accounting=self.accounting(level),
                                              digits=int(level["digits"]), meta=meta,
                                              geometry=geometry)
        return self._payloads[k]

    def _geometry(self, level: Mapping[str, Any]) -> Callable[[pl.DataFrame], list[Any]]:
        """A function giving each payload row its GeoJSON geometry at this level."""
        from reduce import geojson

        r = self.recipe
        coords = int(level.get("coords", r.output.coordinate_digits[0]))
        if r.hex:
            cells: dict[str, Any] = self._hex_geoms.setdefault(coords, {})

            def hexes(plain: pl.DataFrame) -> list[Any]:
                out = []
                for c in plain.get_column("hex").to_list():
                    g = cells.get(c)
                    if g is None:
                        g = cells[c] = geojson.hex_polygon(c, coords)
                    out.append(g)
                return out

            return hexes
        assert r.region is not None and r.region.boundaries is not None
        tol = float(level.get("simplify", 0.0))
        key = (tol, coords)
        if key not in self._region_geoms:
            from reduce import geo, topology

            assert r.region.id_property is not None
            b = self._boundaries or geo.load_boundaries(r.region.boundaries,
                                                        r.region.id_property)
            self._boundaries = b
            shapes = topology.simplify_shared(b, tol) if tol > 0 else b.geoms
            shapes = topology.quantize(shapes, coords)
            self._region_geoms[key] = {i: geojson.polygon_geometry(g, coords)
                                       for i, g in zip(b.ids, shapes)}
        by_id = self._region_geoms[key]
        col = r.region.column
        return lambda plain: [by_id.get(v) for v in plain.get_column(col).to_list()]

    def candidate(self, level: Mapping[str, Any], *, exact: bool, on: Measure | None = None,
                  limit: int | None = None, brotli: bool | None = None) -> bsearch.Candidate:
        """Encode a level and measure it: every measure (``exact``), or only whether it fits
        ``limit`` on ``on`` (compression stops once the output is over the limit). A level
        measured before (the store kept with the cache entry) is not measured again when what
        was kept settles the question."""
        c = self._from_store(level, exact=exact, on=on, limit=limit, brotli=brotli)
        if c is not None:
            return c
        c = self._measure(level, exact=exact, on=on, limit=limit, brotli=brotli)
        self.remember(c, on=on, limit=limit)
        return c

    def _from_store(self, level: Mapping[str, Any], *, exact: bool, on: Measure | None,
                    limit: int | None, brotli: bool | None) -> bsearch.Candidate | None:
        rec = self.store.get(level)
        if rec is None:
            return None
        want_brotli = on == "brotli" or (brotli is True) or (
            brotli is None and rec.raw <= BROTLI_AUTO_MAX)
        c = bsearch.Candidate(level=dict(level), rows=rec.rows, elements=rec.elements,
                              raw=rec.raw, gzip=rec.gzip, brotli=rec.brotli)
        if exact or on is None or limit is None:
            if rec.gzip is None or (want_brotli and rec.brotli is None):
                return None
            if on is not None and limit is not None:
                c.fits = (rec.size(on) or 0) <= limit
                c.floor = rec.size(on)
            return c
        verdict = rec.verdict(on, limit)
        if verdict is None:
            return None
        c.fits = verdict
        c.floor = rec.floor(on)
        if rec.size(on) is None:
            c.note = f"> {limit} {on} (measured before)"
        return c

    def _measure(self, level: Mapping[str, Any], *, exact: bool, on: Measure | None,
                 limit: int | None, brotli: bool | None) -> bsearch.Candidate:
        data = self.payload(level)
        rec = self.record(level)
        c = bsearch.Candidate(level=dict(level), rows=rec.rows, elements=rec.elements,
                              raw=len(data))
        if exact or on is None or limit is None:
            s = measure_all(data, brotli=True if on == "brotli" else brotli)
            c.gzip, c.brotli = s.gzip, s.brotli
            if on is not None and limit is not None:
                c.fits = s.on(on) <= limit
                c.floor = s.on(on)
        else:
            look = quick_look(data, on, limit)
            c.floor = look.floor
            if look.fits is not None:
                c.fits = look.fits
                c.note = QUICK_NOTE
                return c
            ok, size = fits_on(data, on, limit)
            c.fits = ok
            if on != "raw":
                setattr(c, on, size)
            if size is None:
                c.note = f"> {limit} {on} (stopped early)"
            else:
                c.floor = size
        return c

    def forget(self, level: Mapping[str, Any]) -> None:
        """Drop a level's rows and bytes (a level over the budget is not needed again)."""
        self._payloads.pop(bsearch.level_key(level), None)
        self._rows.pop((level.get("hex"), level.get("time"), level.get("top")), None)

    def estimate(self, level: Mapping[str, Any], on: Measure, per_row: float,
                 limit: int) -> bsearch.Candidate:
        """A candidate judged from its row count alone (see :meth:`row_count`): ``per_row``
        bytes (the least seen on measured levels) times its rows; used only to skip levels
        far over the budget."""
        rows = self.row_count(level)
        c = bsearch.Candidate(level=dict(level), rows=rows, elements=rows, raw=None)
        c.fits = False
        c.estimated = True
        c.note = f"~{int(per_row * rows):,} {on} bytes estimated from rows: over {limit:,}"
        return c


def _text(b: TimeBin | None) -> str | None:
    return b.text if b else None


def _finer_or_equal(h: int | None, t: str | None, hex_res: int | None,
                    tb: TimeBin | None) -> bool:
    """Whether a partial at (h, t) can be rolled up to (hex_res, tb)."""
    if h is not None and hex_res is not None and h < hex_res:
        return False
    if t is not None and tb is not None:
        tt = parse_time_bin(t)
        return tt == tb or tb.nests(tt)
    return True


def _store_name(recipe: Recipe) -> str:
    """The name of a recipe's store of measured levels: everything that shapes its payloads
    besides the scan (whose entry holds the store) and the budget, including the size and
    modification time of its denominators file."""
    n = recipe.normalize
    den = n.denominators.path if n is not None and n.denominators is not None else None
    return levels.store_hash(recipe.document, f"{recipe.file.parent}\0{cache.file_stamp(den)}")


def _as_recipe(recipe: Recipe | str | Path, overrides: Mapping[str, str] | None) -> Recipe:
    if isinstance(recipe, Recipe):
        if overrides:
            return load_recipe(recipe.file, overrides=overrides)
        return recipe
    return load_recipe(recipe, overrides=overrides)


def _with_budget(recipe: Recipe, max_: str | int | None, on: str | None,
                 order: Sequence[str] | None) -> Recipe:
    """Apply budget overrides given as arguments (validated like the file)."""
    if max_ is None and on is None and order is None:
        return recipe
    over: dict[str, str] = {}
    if max_ is not None:
        try:
            over["budget.max"] = str(parse_size(max_))
        except ValueError as e:
            raise RecipeError(f"--budget: {e}") from None
    elif recipe.budget is None:
        raise RecipeError(f"{recipe.file.name}: budget.max: --on and --order need a budget; "
                          "add --budget or a [budget] table")
    if on is not None:
        if on not in MEASURES:
            raise RecipeError(f"--on: {on!r} is not a measure; use raw, gzip or brotli")
        over["budget.on"] = f'"{on}"'
    if order is not None:
        over["budget.order"] = "[" + ", ".join(f'"{a}"' for a in order) + "]"
    return load_recipe(recipe.file, overrides={**_overrides_of(recipe), **over})


def _overrides_of(recipe: Recipe) -> dict[str, str]:
    return dict(recipe.overrides)


def fit(recipe: Recipe | str | Path, *, budget: str | int | None = None,
        on: str | None = None, order: Sequence[str] | None = None,
        overrides: Mapping[str, str] | None = None, use_cache: bool = True,
        exact: bool = False, every_level: bool = False, progress: Progress | None = None,
        reducer: Reducer | None = None) -> FitResult:
    """Choose the finest level that fits the budget; measure every candidate evaluated.

    With no budget (none in the recipe, none given), the finest level is chosen. ``exact``
    measures raw, gzip and brotli bytes of every candidate (as ``reduce ladder`` shows);
    otherwise only the budget's measure is computed, stopping early once over the limit.
    ``every_level`` evaluates every combination of levels instead of searching.
    """
    r = _with_budget(_as_recipe(recipe, overrides), budget, on, order)
    red = reducer if reducer is not None and _same_levels(reducer.recipe, r) else Reducer(
        r, use_cache=use_cache, progress=progress)
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

    def evaluate(level: dict[str, Any], *, force_exact: bool = False) -> bsearch.Candidate:
        k = bsearch.level_key(level)
        c = cands.get(k)
        if c is not None and not (force_exact and (c.estimated or c.gzip is None
                                                   or (c.brotli is None and b is not None
                                                       and b.on == "brotli"))):
            return c
        if use_estimates and not force_exact and b is not None:
            per_row = [x.floor / x.rows for x in cands.values()
                       if not x.estimated and x.rows and x.floor is not None]
            if per_row:
                red.progress(f"counting rows of {bsearch.describe_level(level)}")
                rows = red.row_count(level)
                if rows * min(per_row) > margin * b.max:  # type: ignore[operator]
                    c = red.estimate(level, b.on, min(per_row), b.max)  # type: ignore[type-var]
                    cands[k] = c
                    red.forget(level)
                    return c
        red.progress(f"measuring {bsearch.describe_level(level)}")
        c = red.candidate(level, exact=exact or force_exact,
                          on=b.on if b else None, limit=b.max if b else None)
        cands[k] = c
        if c.fits is False and not every_level:
            red.forget(level)  # bounded memory: over-budget levels are never published
        return c

    chosen_level: dict[str, Any] | None
    if every_level:
        for lv in bsearch.all_levels(ladder_axes):
            evaluate(lv)
    if b is None:
        chosen_level = r.finest_level()
        evaluate(chosen_level, force_exact=True)
    else:
        res = bsearch.search(ladder_axes, b.order, lambda lv: bool(evaluate(lv).fits))
        chosen_level = res.chosen
        if chosen_level is None:
            evaluate(res.coarsest, force_exact=True)
    chosen = None
    if chosen_level is not None:
        chosen = evaluate(chosen_level, force_exact=True)
        if b is not None and not chosen.fits:
            # A quick judgement was wrong (never seen in practice): measure everything.
            return fit(r, exact=True, every_level=every_level, progress=progress,
                       reducer=red)
        if b is not None:
            chosen_level = _confirm_neighbours(ladder_axes, chosen_level, cands, evaluate,
                                               b.on, b.max)
            chosen = evaluate(chosen_level, force_exact=True)
        chosen.chosen = True
    candidates = list(cands.values())
    if chosen_level is not None and red.use_cache:
        red.record(chosen_level)
        red.store.keep_payload(chosen_level, red.payload(chosen_level))
    red.store.save()
    frontier = bsearch.frontier_frame(candidates, axes)
    result = FitResult(recipe=r, level=chosen_level, candidates=candidates, frontier=frontier,
                       chosen=chosen, budget=b,
                       payload=red.payload(chosen_level) if chosen_level else None,
                       rows=red.built_rows(chosen_level) if chosen_level else None,
                       record=red.record(chosen_level) if chosen_level else None,
                       source=red.source, partial_from_cache=red.partial_from_cache,
                       accounting=red.accounting(chosen_level) if chosen_level else {},
                       reducer=red)
    return result


# The note of a verdict taken from a fast compression (an estimate, marked so in manifests).
QUICK_NOTE = "judged by a fast compression"

# A one-step-finer neighbour of the chosen level judged only by cheap evidence, and within
# this fraction of the budget, is measured exactly before the choice stands.
NEIGHBOUR_MARGIN = 0.10


def _confirm_neighbours(ladder: Mapping[str, Sequence[Any]], chosen: dict[str, Any],
                        cands: Mapping[tuple[Any, ...], bsearch.Candidate],
                        evaluate: Callable[..., bsearch.Candidate], on: Measure,
                        limit: int) -> dict[str, Any]:
    """Measure exactly every one-step-finer neighbour of ``chosen`` whose verdict came from a
    fast compression or a row count and whose size could be within 10% of the budget; move
    to one that fits (and check its neighbours in turn)."""
    current = dict(chosen)
    moved = True
    while moved:
        moved = False
        for axis, lv in ladder.items():
            i = list(lv).index(current[axis])
            if i == 0:
                continue
            finer = {**current, axis: lv[i - 1]}
            c = cands.get(bsearch.level_key(finer))
            if c is None or c.size(on) is not None:
                continue  # not evaluated, or its length on the budget's measure is exact
            if c.floor is not None and c.floor > (1 + NEIGHBOUR_MARGIN) * limit:
                continue
            if evaluate(finer, force_exact=True).fits:
                current = finer
                moved = True
                break
    return current


def _same_levels(a: Recipe, b: Recipe) -> bool:
    """True when two recipes differ at most in their budget (levels can be shared)."""
    def strip(r: Recipe) -> Recipe:
        return replace(r, budget=None, content_hash="", overrides=())

    return strip(a) == strip(b)


def ladder(recipe: Recipe | str | Path, **kw: Any) -> FitResult:
    """Like :func:`fit`, measuring raw, gzip and brotli bytes of every candidate."""
    kw.setdefault("exact", True)
    return fit(recipe, **kw)


def smallest_message(result: FitResult) -> str:
    """The one-line 'nothing fits' message for a result without a chosen level."""
    b = result.budget
    assert b is not None
    coarsest = {a: lv[-1] for a, lv in result.recipe.ladder().items()}
    smallest = next(c for c in result.candidates
                    if bsearch.level_key(c.level) == bsearch.level_key(coarsest))
    return bsearch.nothing_fits_message(_recipe_label(result.recipe), b.max, b.on, smallest,
                                       list(result.recipe.ladder()))


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
    ext = {"columns": ".json", "rows": ".json", "csv": ".csv",
           "geojson": ".geojson"}[recipe.output.layout]
    if out_dir is not None:
        name = recipe.output.path.name if recipe.output.path else f"{recipe.name}{ext}"
        return resolve_output(Path(out_dir), name)
    if recipe.output.path is not None:
        p = recipe.output.path
        return resolve_output(p.parent, p.name)
    return resolve_output(Path("out"), f"{recipe.name}{ext}")


def build_manifest(result: FitResult, path: Path) -> dict[str, Any]:
    r = result.recipe
    assert result.payload is not None and result.chosen is not None
    data = result.payload
    c = result.chosen
    if c.gzip is None or (c.brotli is None and len(data) <= BROTLI_AUTO_MAX):
        s = measure_all(data)  # the chosen level is always measured exactly
        c.gzip, c.brotli = s.gzip, s.brotli
    sizes = Sizes(raw=len(data), gzip=int(c.gzip), brotli=c.brotli)
    red = result.reducer
    assert result.level is not None and red is not None
    rec = red.record(result.level)
    src = result.source
    m: dict[str, Any] = {
        "format": "reduce.manifest/1",
        "payload": path.name,
        "layout": r.output.layout,
        "sha256": sha256(data),
        "bytes": sizes.as_dict(),
        "rows": result.chosen.rows,
        "elements": result.chosen.elements,
        "recipe": {"name": r.name, "file": r.file.name, "sha256": r.content_hash},
        "level": dict(result.level),
        "budget": ({"max": result.budget.max, "on": result.budget.on,
                    "order": list(result.budget.order),
                    "fits": sizes.on(result.budget.on) <= result.budget.max}
                   if result.budget else None),
        **({"notes": [f"brotli not measured: the payload is over {BROTLI_AUTO_MAX:,} raw bytes "
                      "(brotli at quality 11 is slow); use a brotli budget to measure it"]}
           if sizes.brotli is None else {}),
        "frontier": [
            {"level": c.level, "rows": c.rows, "raw": c.raw, "gzip": c.gzip,
             "brotli": c.brotli, "fits": c.fits, "chosen": c.chosen,
             **({"estimated": True} if c.estimated or c.note == QUICK_NOTE else {})}
            for c in result.candidates],
        "accounting": {**result.accounting,
                       "invalid_by_reason": rec.accounting.get("invalid_by_reason", {}),
                       "suppressed_cells": rec.suppressed_cells},
        "source": {"fingerprint": src.fingerprint if src else None,
                   "files": len(src.files) if src else None,
                   "format": src.format if src else None},
    }
    if r.normalize is not None and r.normalize.rate_measures:
        m["denominators"] = rec.denominators
    return m


def run(recipe: Recipe | str | Path, *, out_dir: Path | None = None,
        budget: str | int | None = None, on: str | None = None,
        overrides: Mapping[str, str] | None = None, write_anyway: bool = False,
        use_cache: bool = True, progress: Progress | None = None) -> RunResult:
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
        coarsest = {a: lv[-1] for a, lv in result.recipe.ladder().items()}
        red = result.reducer
        assert red is not None
        forced = next(c for c in result.candidates
                      if bsearch.level_key(c.level) == bsearch.level_key(coarsest))
        forced.chosen = True
        result = replace(result, level=coarsest, chosen=forced, payload=red.payload(coarsest),
                         rows=red.rows(coarsest), accounting=red.accounting(coarsest))
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
