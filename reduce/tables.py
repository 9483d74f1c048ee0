"""The level tables of one recipe: its finest partial, and every level's roll-up, rows and
row count, computed lazily from that one partial and kept while a search needs them.

    source -> finest partial (one scan, or the partial cache)
           -> per level: roll-up -> top-k -> min-count -> finalize -> normalize -> sort

Roll-ups go straight to the level asked for from the smallest finer partial at hand; a
level's rows are its payload's rows before encoding; a level's row count is read off the
distinct keys of its roll-up (or of spilled rows, part by part) without ranking or encoding.
Measuring levels (bytes, the store of measured levels) is :mod:`reduce.measure`'s.
"""

from __future__ import annotations

import shutil
import weakref
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import polars as pl

from reduce import aggregate, cache, encode, normalize, prune
from reduce.aggregate import Partial, Spilled
from reduce.keys import HEX, TIME, coarsen, hidden_below, hidden_hex, is_hidden
from reduce.normalize import NormalizeReport
from reduce.recipe import Recipe, TimeBin, parse_time_bin
from reduce.source import OpenSource, open_source

Progress = Callable[[str], None]

# The distinct keys of a level counted from spilled rows are kept (per part) up to this many
# rows, about 160 MB for hex x time x category, so that coarser levels the search counts next
# come from them instead of another pass over the spilled rows.
KEEP_KEY_ROWS = 5_000_000

# Parts of a source file's spilled rows: fixed, so that the parts of every file line up when
# their partials merge (part i of the source is part i of each file; see
# ``aggregate.merge_spilled``), whatever files a night adds.
FILE_PARTS = 16


# Samples of levels (see LevelTables.sample_rows): levels under SAMPLE_MIN_LEVEL_ROWS rows are
# measured in full; a sample aims at SAMPLE_ROWS rows, keeps at least SAMPLE_MIN_KEYS distinct
# cells (or time bins), and takes at least 1 in SAMPLE_MAX_EVERY of them. On the bench's 1M
# rows, samples of 1 in 8 and 1 in 32 cells, scaled by rows, came within 0.90-1.07 of the full
# level's fast compression at 7 levels (1.20 once, at 1 in 32 of hex 5, which has few cells).
SAMPLE_MIN_LEVEL_ROWS = 100_000
SAMPLE_ROWS = 40_000
SAMPLE_MIN_KEYS = 200
SAMPLE_MAX_EVERY = 64
# Sampled cells: (key mod a prime) mod every, a fixed function of the cell id (or bin start),
# so a sample is the same in every run and on every machine.
_SAMPLE_PRIME = 1_000_003


def sample_expr(col: str, every: int) -> pl.Expr:
    """True for the rows of the sampled cells (or time bins) of 1 in ``every``."""
    key = pl.col(col).cast(pl.Int64, wrap_numerical=True).cast(pl.UInt64, wrap_numerical=True)
    return (key % _SAMPLE_PRIME) % every == 0


def sample_mask(table: pl.DataFrame, col: str, every: int) -> pl.Series:
    """Which rows of ``table`` belong to the sampled cells (or time bins) of 1 in ``every``."""
    return table.select(sample_expr(col, every)).to_series()


@dataclass
class LevelRows:
    """Finalized, normalized, sorted rows of one level (before encoding)."""

    frame: pl.DataFrame
    suppressed_rows: int
    suppressed_cells: int
    report: NormalizeReport


class LevelTables:
    """The finest partial of one recipe and the levels computed from it (see the module
    docstring)."""

    def __init__(
        self,
        recipe: Recipe,
        *,
        use_cache: bool = True,
        progress: Progress | None = None,
        source: OpenSource | None = None,
    ) -> None:
        self.recipe = recipe
        self.use_cache = use_cache
        self.progress = progress or (lambda _msg: None)
        # the source opened already (for this recipe's columns), else opened by entry()
        self.source: OpenSource | None = source
        self.partial_from_cache = False
        self._key: str | None = None
        self._file_keys: list[str] = []
        self._files: dict[str, int] | None = None  # see files
        self._rows_in_source: int | None = None
        self._partial: Partial | None = None
        self._finest: Partial | Spilled | None = None
        self._rollups: dict[tuple[Any, Any], Partial] = {}
        self._visibles: dict[tuple[Any, Any], Partial] = {}
        self._rows: dict[tuple[Any, ...], LevelRows] = {}
        self._den: pl.DataFrame | None = None
        self._ranks: dict[Any, pl.Series] = {}
        self._row_counts: dict[tuple[Any, ...], int] = {}
        self._histograms: dict[tuple[Any, Any], pl.DataFrame] = {}
        # distinct keys per part of levels counted from spilled rows, when small enough
        self._keysets: dict[tuple[Any, Any], list[pl.DataFrame]] = {}
        self._split: dict[int | None, pl.Series | None] = {}
        self._sample_partials: dict[tuple[Any, Any, int], Partial] = {}
        self._sample_ranks: dict[Any, pl.Series] = {}
        # Distinct cells per resolution (time bins per bin without hex): see _key_values.
        self._cells: dict[Any, pl.Series] = {}
        n = recipe.normalize
        if n is not None and n.denominators is not None:
            self._den = normalize.load_denominators(n.denominators)

    # -- hooks for what is kept beyond this object (see reduce.measure) ---------------------
    def _known_count(self, level: Mapping[str, Any]) -> int | None:
        """A level's row count known from before (None here: nothing is kept)."""
        return None

    def _note_count(self, level: Mapping[str, Any], rows: int) -> None:
        """A level's row count was counted."""

    def _entry_stored(self, entry: Path) -> None:
        """The finest partial was stored in the cache entry ``entry``."""

    def _before_store(self) -> None:
        """The merged entry of this file set is about to be stored, which removes the
        entries of the recipe over other file sets (and what they hold)."""

    # -- the finest partial -----------------------------------------------------------------
    def finest(self) -> Partial | Spilled:
        """The finest partial: from the cache, or one scan of the source (kept on disk when
        the source is large and sparse at the finest level: see ``aggregate.Spilled``).

        With the cache (or a cluster), the partial is merged from one partial per source
        file, each cached apart: a run scans only the files that are new or changed."""
        from reduce import cluster

        if self._finest is None and (self.use_cache or cluster.current() is not None):
            p = self._finest_by_file()
            prune.check_rest_label(self.recipe, p.frame() if isinstance(p, Spilled) else p)
            self._finest = p
        if self._finest is None:
            key = self.entry()
            loaded = cache.load(key) if self.use_cache else None
            if loaded is not None:
                p = loaded
                self.partial_from_cache = True
                self.progress("using the cached finest partial")
            else:

                def spill() -> Path:  # made only if the source has to spill
                    d = (cache.spill_dir(key) if self.use_cache else None) or cache.temp_spill_dir()
                    weakref.finalize(self, shutil.rmtree, d, True)
                    return d

                assert self.source is not None
                try:
                    p = aggregate.scan_partial(
                        self.recipe, self.source, progress=self.progress, spill_dir=spill
                    )
                except pl.exceptions.PolarsError as e:  # e.g. a malformed NDJSON line
                    raise (self.source.read_error(e) or e) from None
                self.source.check_unchanged()  # replaced mid-scan: neither used nor cached
                n = len(self.source.files)
                self._files = {"total": n, "scanned": n, "reused": 0}
                if self.use_cache:
                    self._before_store()
                    p = (
                        cache.store(key, p, recipe=self.recipe.scan_hash, files=self._file_keys)
                        or p
                    )
                    entry = cache.cache_dir() / key
                    if entry.is_dir():
                        self._entry_stored(entry)
            prune.check_rest_label(self.recipe, p.frame() if isinstance(p, Spilled) else p)
            self._finest = p
        if isinstance(self._finest, Partial):  # (a no-op once its categories are codes)
            self._finest = aggregate.with_label_codes(self.recipe, self._finest)
        return self._finest

    def use_partial(self, p: Partial) -> None:
        """Take ``p`` as the finest partial instead of scanning (a slice of the source judged
        before the scan: see :mod:`reduce.grain`)."""
        self._finest = p

    def entry(self) -> str:
        """The cache key of this recipe over the source as it is now (opens the source:
        schema checks and fingerprint, no scan): the key of the merged partial of its files,
        from each file's key (path, size, modification time, content hash)."""
        if self._key is None:
            if self.source is None:
                self.progress("checking the source")
                self.source = open_source(self.recipe)
            schema = str(self.source.frame.collect_schema())
            self._file_keys = [cache.file_key(self.recipe, s, schema) for s in self.source.states]
            self._key = cache.files_key(self.recipe, self._file_keys)
        return self._key

    @property
    def files(self) -> dict[str, int] | None:
        """Source files: how many, how many this run scanned, how many partials it reused
        (all of them when the store of measured levels answered without the partial)."""
        if self._files is None and self.source is not None:
            n = len(self.source.files)
            return {"total": n, "scanned": 0, "reused": n}
        return self._files

    def _finest_by_file(self) -> Partial | Spilled:
        """The finest partial merged from per-file partials: those cached are reused, the
        others scanned (here, or on the cluster's workers) and cached; entries of files no
        longer in the source are removed."""
        from reduce import cluster

        key = self.entry()
        src = self.source
        assert src is not None
        n = len(src.files)
        if self.use_cache:
            merged = cache.load(key)
            if merged is not None:
                self.partial_from_cache = True
                self._files = {"total": n, "scanned": 0, "reused": n}
                self.progress("using the cached finest partial")
                return merged
        tag = f"{self.recipe.scan_hash}:file"
        got: dict[int, Partial | Spilled] = {}
        if self.use_cache:
            for i, fk in enumerate(self._file_keys):
                p = cache.load(fk)
                if p is not None:
                    got[i] = p
        todo = [i for i in range(n) if i not in got]
        address = cluster.current()
        if todo and address is not None:
            self.progress(f"scanning {len(todo):,} of {n:,} files on the cluster {address}")
            scanned = cluster.scan_files(
                address,
                self.recipe,
                [src.states[i] for i in todo],
                progress=self.progress,
                spill=[self._spill_plan(i) for i in todo],
                spill_dir=lambda k: self._spill_folder(todo[k]),
            )
            for i, p in zip(todo, scanned):
                got[i] = self._keep_file(i, p, tag)
        else:
            for k, i in enumerate(todo, start=1):
                self.progress(
                    f"scanning file {k:,} of {len(todo):,} ({n - len(todo):,} of "
                    f"{n:,} reused): {src.files[i].name}"
                )
                spilled = any(isinstance(p, Spilled) for p in got.values())
                got[i] = self._scan_file(i, tag, always_spill=spilled)
        if any(isinstance(p, Spilled) for p in got.values()):
            # Spilled rows and in-memory groups do not merge: spill the other files too.
            for i in [i for i, p in got.items() if isinstance(p, Partial)]:
                if self.use_cache:
                    cache.remove(self._file_keys[i])
                if i not in todo:
                    todo.append(i)
                got[i] = self._scan_file(i, tag, always_spill=True)
        src.check_unchanged()  # a file replaced meanwhile: neither used nor cached
        self._files = {"total": n, "scanned": len(todo), "reused": n - len(todo)}
        self.partial_from_cache = not todo
        parts = [got[i] for i in range(n)]
        acc = parts[0].accounting
        for p in parts[1:]:
            acc = aggregate.add_accounting(acc, p.accounting)
        aggregate.check_merged(self.recipe, _label(src), acc)
        out: Partial | Spilled
        entry: Path | None = None
        scan_hash, file_keys = self.recipe.scan_hash, self._file_keys
        if self.use_cache:
            self._before_store()
        if n == 1:  # the file's partial is the source's: one entry, under the merged key
            out = parts[0]
            if self.use_cache:
                out = cache.store(key, out, recipe=scan_hash, files=file_keys) or out
                entry = cache.cache_dir() / key
        elif all(isinstance(p, Partial) for p in parts):
            self.progress(f"merging the partials of {n:,} files")
            out = aggregate.merge_all(self.recipe, [p for p in parts if isinstance(p, Partial)])
            if self.use_cache:
                out = cache.store(key, out, recipe=scan_hash, files=file_keys) or out
                entry = cache.cache_dir() / key
        else:
            out = aggregate.merge_spilled([p for p in parts if isinstance(p, Spilled)])
            if self.use_cache:
                entry = cache.mark_files(key, file_keys, recipe=scan_hash)
        if self.use_cache:
            cache.drop_except(tag, set(self._file_keys))
            if entry is not None and entry.is_dir():
                self._entry_stored(entry)
        return out

    def _source_rows(self) -> int:
        """Input rows of the whole source (parquet: from metadata), counted once."""
        if self._rows_in_source is None:
            assert self.source is not None
            self._rows_in_source = self.source.count_rows()
        return self._rows_in_source

    def _keep_file(self, i: int, p: Partial | Spilled, tag: str) -> Partial | Spilled:
        """Cache file ``i``'s partial (with the cache on); returns it as stored."""
        assert self.source is not None
        if not self.use_cache or len(self.source.files) == 1:
            return p
        return cache.store(self._file_keys[i], p, recipe=tag, drop_others=False) or p

    def _spill_folder(self, i: int) -> Path:
        """A fresh folder for source file ``i``'s spilled rows (in the cache when it is used,
        else a temporary one), removed with this object unless the cache takes it."""
        assert self.source is not None
        fk = self._file_keys[i] if len(self.source.files) > 1 else self.entry()
        d = (cache.spill_dir(fk) if self.use_cache else None) or cache.temp_spill_dir()
        weakref.finalize(self, shutil.rmtree, d, True)
        return d

    def _spill_plan(self, i: int) -> tuple[int | None, int]:
        """How source file ``i`` is scanned when it may spill: the number of parts of its
        keyed rows (:data:`FILE_PARTS` when the source has several files, so that their
        parts line up) and the rows it is probed on."""
        from reduce.source import file_source

        assert self.source is not None
        n = len(self.source.files)
        probe = aggregate.probe_rows()
        if n > 1 and self._source_rows() > probe:
            # The source is large enough to be probed: so is each of its files, however small
            # (on half its rows at most), so that a source of many small sparse files spills
            # file by file instead of merging into one partial the size of the source.
            fsrc = file_source(self.source, self.source.states[i])
            probe = min(probe, max(1, fsrc.count_rows() // 2))
        return (FILE_PARTS if n > 1 else None), probe

    def _scan_file(self, i: int, tag: str, *, always_spill: bool) -> Partial | Spilled:
        """Scan source file ``i`` alone (spilled rows in :data:`FILE_PARTS` parts)."""
        from reduce.source import file_source

        assert self.source is not None
        fsrc = file_source(self.source, self.source.states[i])
        parts, probe = self._spill_plan(i)
        try:
            p = aggregate.scan_partial(
                self.recipe,
                fsrc,
                spill_dir=lambda: self._spill_folder(i),
                whole=False,
                always_spill=always_spill,
                parts=parts,
                probe=probe,
            )
        except pl.exceptions.PolarsError as e:  # e.g. a malformed NDJSON line
            raise (fsrc.read_error(e) or e) from None
        fsrc.check_unchanged()
        return self._keep_file(i, p, tag)

    def partial(self) -> Partial:
        """The finest partial in memory (merged from its files when it was spilled)."""
        if self._partial is None:
            f = self.finest()
            self._partial = (
                f
                if isinstance(f, Partial)
                else aggregate.rollup_spilled(self.recipe, f, hex_res=None, time_bin=None)
            )
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
        tb = parse_time_bin(time_text) if time_text else None
        finest = self.finest()
        if isinstance(finest, Spilled) and not self._finer_at_hand(hex_res, time_text):
            out = aggregate.rollup_spilled(self.recipe, finest, hex_res=hex_res, time_bin=tb)
        else:
            src = self._smallest_finer(hex_res, time_text)
            out = aggregate.rollup(self.recipe, src, hex_res=hex_res, time_bin=tb)
        self._rollups[k] = out
        return out

    def _smallest_finer(self, hex_res: int | None, time_text: str | None) -> Partial:
        """The smallest partial in memory that rolls up to (hex, time): the finest partial
        (when in memory) or a roll-up at hand."""
        finest = self.finest()
        if isinstance(finest, Partial):
            self._rollups.setdefault((finest.hex_res, _text(finest.time_bin)), finest)
        tb = parse_time_bin(time_text) if time_text else None
        sources = [
            (p.table.height, i, p)
            for i, ((h, t), p) in enumerate(self._rollups.items())
            if _finer_or_equal(h, t, hex_res, tb)
        ]
        return min(sources, key=lambda x: x[:2])[2]

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
            h, t = level.get("hex"), level.get("time")
            p = self._visible(h, t)
            if r.top is not None:
                p = self._top_k(p, int(level["top"]), self._ranks, (h, t))
            self._rows[k] = self._finish(p, h)
        return self._rows[k]

    def _top_k(
        self, p: Partial, k: int, ranks: dict[Any, pl.Series], key: tuple[Any, ...]
    ) -> Partial:
        """Top-k of ``p``, its ranks computed once per ``key`` (they do not depend on k)."""
        if key not in ranks:
            ranks[key] = prune.rank_rows(self.recipe, p)
        return prune.top_k(self.recipe, p, k, ranks[key])

    def _finish(self, p: Partial, hex_res: int | None) -> LevelRows:
        """Suppress, finalize, normalize and sort a level's partial into its rows."""
        r = self.recipe
        p, sup_rows, sup_cells = prune.suppress(r, p)
        final = aggregate.finalize(r, p)
        final, report = normalize.apply(r, final, den=self._den, hex_res=hex_res)
        return LevelRows(encode.sort_rows(r, final), sup_rows, sup_cells, report)

    def sample_every(self, level: Mapping[str, Any], rows: int) -> int:
        """How thinly a level of ``rows`` rows is sampled: 1 in ``every`` of its hex cells (of
        its time bins without hex), a power of two giving about :data:`SAMPLE_ROWS` rows and
        at least :data:`SAMPLE_MIN_KEYS` cells in the sample; below 2, the level is not
        sampled (small levels are cheap to measure in full)."""
        r = self.recipe
        col = HEX if r.hex else TIME if r.time else None
        if col is None or rows < SAMPLE_MIN_LEVEL_ROWS:
            return 1
        most = min(rows // SAMPLE_ROWS, self._distinct_keys(level) // SAMPLE_MIN_KEYS)
        every = 1
        while every * 2 <= min(most, SAMPLE_MAX_EVERY):
            every *= 2
        return every

    def sample_rows(self, level: Mapping[str, Any], every: int) -> pl.DataFrame:
        """A level's rows (finalized, normalized, sorted, as :meth:`rows`) restricted to the
        hex cells (time bins without hex) picked by :func:`sample_mask`: evidence of its
        payload's size at a fraction of the cost. With top-k ranked within groups that hold
        the sampled column, ranking is done on the sample alone (the groups are whole)."""
        r = self.recipe
        col = HEX if r.hex else TIME
        h, t = level.get("hex"), level.get("time")
        k = int(level["top"]) if r.top is not None else 0
        if r.top is not None and col not in prune.within_columns(r, r.top.within):
            # Ranks span sampled and unsampled cells: rank the whole level, then sample.
            p = self._top_k(self._visible(h, t), k, self._ranks, (h, t))
            p = aggregate.take(p, sample_mask(p.table, col, every))
        else:
            p = self._sampled_partial(h, t, every)
            if r.top is not None:
                p = self._top_k(p, k, self._sample_ranks, (h, t, every))
        return self._finish(p, h).frame

    def cells(self, level: Mapping[str, Any]) -> int:
        """The level's distinct cells (time bins without hex): what its samples are drawn
        from. Without ``min_count``, a lower bound of its rows (every cell has a row)."""
        return self._distinct_keys(level)

    def rows_at_most(self, level: Mapping[str, Any]) -> int | None:
        """An upper bound of the level's rows from its keys' distinct values alone: its
        cells times its time bins times the values of each other key, with at most k + 1
        categories per group under top-k (suppression only removes rows). None when the
        finest partial is on disk (its distinct values would cost a pass)."""
        finest = self.finest()
        if not isinstance(finest, Partial):
            return None
        r = self.recipe
        h, t = level.get("hex"), level.get("time")
        cats = set(r.categories)
        bound = 1
        per_group = 1
        for col in finest.keys:
            if col == HEX:
                bound *= len(self._key_values({"hex": h}))
            elif col == TIME:
                bound *= self._distinct_bins(t)
            elif col in cats:
                per_group *= self._distinct_values(col)
            else:
                bound *= self._distinct_values(col)
        if r.top is not None and cats:
            per_group = min(per_group, int(level["top"]) + 1)
        return bound * per_group

    def _distinct(self, col: str) -> pl.Series:
        """The distinct non-null values of a key column of the finest partial (in memory)."""
        k = ("values", col)
        if k not in self._cells:
            finest = self.finest()
            assert isinstance(finest, Partial)
            self._cells[k] = finest.table.get_column(col).drop_nulls().unique()
        return self._cells[k]

    def _distinct_values(self, col: str) -> int:
        return len(self._distinct(col))

    def _distinct_bins(self, t: str | None) -> int:
        """Distinct time bins of width ``t`` (None: the finest) in the finest partial (in
        memory): its distinct bin starts, truncated."""
        starts = self._distinct(TIME)
        finest = self.finest()
        if t is None or parse_time_bin(t) == finest.time_bin:
            return len(starts)
        k = ("bins", t)
        if k not in self._cells:
            mapping = coarsen(
                self.recipe,
                hex_res=None,
                time_bin=parse_time_bin(t),
                from_hex=None,
                from_time=finest.time_bin,
            )
            self._cells[k] = starts.to_frame().with_columns(mapping).get_column(TIME).unique()
        return len(self._cells[k])

    def sampled_share(self, level: Mapping[str, Any], every: int) -> float:
        """The share of the level's cells (time bins without hex) that a sample of 1 in
        ``every`` picks: about 1 / ``every`` (a fixed hash of the cell), exactly this."""
        values = self._key_values(level)
        if not len(values):
            return 1.0
        col = values.name
        picked = int(sample_mask(values.to_frame(), col, every).sum())
        return max(picked, 1) / len(values)

    def _distinct_keys(self, level: Mapping[str, Any]) -> int:
        """Distinct cells of the level's resolution, from the finest partial's cell column
        (one column of it, not the level's roll-up); without hex, the level's time bins
        (from its roll-up, which a time-only sample is taken from anyway)."""
        return len(self._key_values(level))

    def _key_values(self, level: Mapping[str, Any]) -> pl.Series:
        """The distinct cells (time bins without hex) behind :meth:`_distinct_keys`."""
        r = self.recipe
        h, t = level.get("hex"), level.get("time")
        if not r.hex or h is None:
            k = ("time", t)
            if k not in self._cells:
                self._cells[k] = (
                    self._visible(h, t).table.get_column(TIME).drop_nulls().unique().rename(TIME)
                )
            return self._cells[k]
        if h not in self._cells:
            finest = self.finest()
            col = HEX if h == finest.hex_res else hidden_hex(h)
            if isinstance(finest, Partial):
                values = finest.table.get_column(col).drop_nulls().unique()
            else:
                values = (
                    finest.frame()
                    .select(pl.col(col).drop_nulls().unique())
                    .collect(engine="streaming")
                    .to_series()
                )
            self._cells[h] = values.rename(HEX)
        return self._cells[h]

    def _sampled_partial(self, h: int | None, t: str | None, every: int) -> Partial:
        """The partial at (hex, time) grouped by its keys, restricted to the sampled cells
        (time bins without hex): filtered from the roll-up when it is at hand, else rolled
        up from the sampled rows of the finest partial alone (for spilled rows, read with the
        filter), which costs a fraction of the level's roll-up."""
        k = (h, t, every)
        if k in self._sample_partials:
            return self._sample_partials[k]
        r = self.recipe
        finest = self.finest()
        if (h, t) in self._rollups or not r.hex or h is None:
            p = self._visible(h, t)
            out = aggregate.take(p, sample_mask(p.table, HEX if r.hex else TIME, every))
        else:
            col = HEX if h == finest.hex_res else hidden_hex(h)
            tb = parse_time_bin(t) if t else None
            if isinstance(finest, Partial):
                sub = aggregate.take(finest, sample_mask(finest.table, col, every))
                out = aggregate.rollup(r, sub, hex_res=h, time_bin=tb)
            else:
                out = aggregate.rollup_spilled(
                    r, finest, hex_res=h, time_bin=tb, where=sample_expr(col, every)
                )
            out = aggregate.visible(r, out)
        self._sample_partials[k] = out
        return out

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
            known = self._known_count(level)
            self._row_counts[k] = known if known is not None else self._count_rows(level)
            self._note_count(level, self._row_counts[k])
        return self._row_counts[k]

    def known_count(self, level: Mapping[str, Any]) -> int | None:
        """A level's row count if it needs no work (counted now or kept from before)."""
        k = (level.get("hex"), level.get("time"), level.get("top"))
        if k in self._row_counts:
            return self._row_counts[k]
        return self._known_count(level)

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

    def _category_histogram(self, h: int | None, t: str | None, outer: list[str]) -> pl.DataFrame:
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
            per = (
                lf.group_by(outer).agg(pl.len().alias("n"))
                if outer
                else lf.select(pl.len().alias("n"))
            )
            return (
                per.group_by("n")
                .agg(pl.len().cast(pl.Int64).alias("groups"))
                .collect(engine="streaming")
                .with_columns(pl.col("n").cast(pl.Int64))
            )

        if key in self._rollups:
            out = hist(self._rollup(h, t).table)
        elif isinstance(finest, Partial) or self._finer_at_hand(h, t):
            # The level's distinct keys from the smallest finer partial at hand: a pass over
            # its key columns, without aggregating measures (about half a roll-up's time).
            src = self._smallest_finer(h, t)
            tb = parse_time_bin(t) if t else None
            mapping = coarsen(
                self.recipe, hex_res=h, time_bin=tb, from_hex=src.hex_res, from_time=src.time_bin
            )
            out = hist(
                src.table.lazy()
                .with_columns(mapping)
                .select(visible_keys)
                .unique()
                .collect(engine="streaming")
            )
        else:
            tb = parse_time_bin(t) if t else None
            at_hand = [
                (sum(p.height for p in ks), kh, kt)
                for (kh, kt), ks in self._keysets.items()
                if _finer_or_equal(kh, kt, h, tb)
            ]
            if at_hand:  # coarsen the distinct keys of a finer level counted before
                _, kh, kt = min(at_hand, key=lambda x: x[0])
                mapping = coarsen(
                    self.recipe,
                    hex_res=h,
                    time_bin=tb,
                    from_hex=kh,
                    from_time=parse_time_bin(kt) if kt else None,
                )
                group = [*finest.keys, *hidden_below(self.recipe, h)]
                tables: Any = (
                    ks.lazy()
                    .with_columns(mapping)
                    .select(group)
                    .unique()
                    .collect(engine="streaming")
                    for ks in self._keysets[(kh, kt)]
                )
            else:
                tables = aggregate.rollup_spilled_parts(
                    self.recipe, finest, hex_res=h, time_bin=tb, keys_only=True
                )
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
                out = pl.DataFrame({"n": [int((both["n"] * both["groups"]).sum())], "groups": [1]})
        self._histograms[key] = out
        return out

    def _finer_at_hand(self, hex_res: int | None, time_text: str | None) -> bool:
        tb = parse_time_bin(time_text) if time_text else None
        return any(_finer_or_equal(h, t, hex_res, tb) for h, t in self._rollups)

    def accounting(self, level: Mapping[str, Any]) -> dict[str, int]:
        """Where every input row went at this level (the payload's accounting block)."""
        acc = self.finest().accounting
        lr = self.rows(level)
        r = self.recipe
        uses_boundaries = bool((r.region and r.region.boundaries) or (r.flow and r.flow.boundaries))
        return encode.accounting_block(
            input_rows=acc.input_rows,
            filtered_rows=acc.filtered_rows,
            invalid_rows=acc.invalid_rows,
            suppressed_rows=lr.suppressed_rows,
            represented_rows=encode.represented(lr.frame),
            unassigned_rows=acc.unassigned_rows if uses_boundaries else None,
        )

    def forget(self, level: Mapping[str, Any]) -> None:
        """Drop a level's rows (a level over the budget is not needed again)."""
        self._rows.pop((level.get("hex"), level.get("time"), level.get("top")), None)


def _label(src: OpenSource) -> str:
    from reduce.source import _files_label

    return _files_label(src.files)


def _text(b: TimeBin | None) -> str | None:
    return b.text if b else None


def _finer_or_equal(h: int | None, t: str | None, hex_res: int | None, tb: TimeBin | None) -> bool:
    """Whether a partial at (h, t) can be rolled up to (hex_res, tb)."""
    if h is not None and hex_res is not None and h < hex_res:
        return False
    if t is not None and tb is not None:
        tt = parse_time_bin(t)
        return tt == tb or tb.nests(tt)
    return True
