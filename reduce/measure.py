"""Measuring levels: a level's payload bytes, its sizes (exact, or the cheap evidence that
steers the search), and the store of what every level measured, kept with the cache entry
(:mod:`reduce.levels`), which a re-fit reads instead of measuring again.

A :class:`Measurer` is the level tables of :mod:`reduce.tables` plus bytes: it encodes a
level's rows (with GeoJSON geometry where the layout asks for it), measures them as a
candidate of the budget search, and records what it measured. When files were only added
to the source since the last run, what that run measured over fewer files (:class:`Earlier`)
judges levels far over the budget without counting or sampling them.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson
import polars as pl

from reduce import budget as bsearch
from reduce import cache, encode, levels
from reduce.contract import ACCOUNTING_ORDER
from reduce.levels import Level
from reduce.publish import sha256
from reduce.recipe import Recipe
from reduce.sizes import (
    BROTLI_AUTO_MAX,
    Measure,
    fast_length,
    fits_on,
    quick_look,
    quick_verdict,
    size_on,
)
from reduce.source import OpenSource
from reduce.tables import LevelTables, Progress

# The note of a verdict taken from a fast compression (an estimate, marked so in manifests).
QUICK_NOTE = "judged by a fast compression"

# A close call that a fast compression does not settle, judged during the search by its best
# guess: the middle setting's length times this (zlib level 6 for gzip, brotli quality 5).
# For gzip the guess is level 6's length itself, which level 9 never exceeds in practice, so
# the close call counts as over: the search settles on the coarser level, and the close call,
# when it is a finer neighbour of that level, is measured exactly beside it
# (Measurer.prefetch) and taken if it fits. Brotli 11 against 5: about 0.85 (common practice).
CLOSE_GUESS: dict[str, float] = {"raw": 1.0, "gzip": 1.0, "brotli": 0.85}

# Rows assumed when choosing a pilot sample (see Measurer.sampled): more than any level has,
# so the pilot is as thin as the level's cells allow.
SAMPLE_PILOT_ROWS = 1 << 62

# A sample's fast length, scaled to the level's rows, times the exact/fast ratio of the
# measure is the estimate of a level's size; it settles a verdict only when at least this
# fraction away from the limit (closer calls are measured in full).
SAMPLE_MARGIN = 0.15
# The exact/fast ratio before any level of the recipe has both figures (then the store's
# median is used): gzip level 9 against zlib level 1 was 0.70-0.78 on the bench's 1M-row
# levels; brotli 11 against brotli 5 about 0.85 (common practice: a starting guess only).
SAMPLE_RATIO: dict[str, float] = {"raw": 1.0, "gzip": 0.75, "brotli": 0.85}


# The note of a level judged over the budget by what an earlier run over fewer files measured.
EARLIER_NOTE = "judged by an earlier run over fewer files"


@dataclass(frozen=True)
class Earlier:
    """What an earlier run measured over a strict subset of this run's files (files were
    only added since: see ``cache.earlier``), copied from its store of measured levels.

    Adding events never removes a group (finer cells and bins split groups, top-k keeps up
    to k + 1 rows per group, suppression passes more cells as counts grow), so an earlier
    row count is a lower bound of today's, and a size of the earlier payload well over the
    limit says the level is over. Evidence that steers the search only: it never says that
    a level fits."""

    store: levels.Store  # in memory (no folder): never written
    files: int  # how many of this run's files the earlier run covered
    total: int  # this run's files

    def size(self, level: Mapping[str, Any], on: Measure) -> int | None:
        """The earlier size of a level on ``on``: the exact length if measured, else the
        best of its certain lower bound and its estimate (a fast compression of the level,
        or, without one, a sample of its cells, each as :class:`Measurer` reads them)."""
        rec = self.store.get(level)
        if rec is not None and rec.size(on) is not None:
            return rec.size(on)
        ratio = self.store.ratio(on, SAMPLE_RATIO[on])
        seen: list[int] = []
        guess: int | None = None
        if rec is not None:
            floor = rec.floor(on)
            if floor is not None:
                seen.append(floor)
            fast = rec.gzip_fast if on == "gzip" else rec.brotli_fast if on == "brotli" else None
            mid = rec.gzip_mid if on == "gzip" else None
            if mid is not None:
                guess = int(mid * CLOSE_GUESS[on])
            elif fast is not None:
                guess = int(fast * ratio)
        sample = self.store.sample(level)
        if guess is None and sample is not None and on in sample:
            guess = int(sample[on] * ratio)
        if guess is None and rec is None:
            # Judged the same way by the earlier run itself, from a run before it (over
            # fewer files still): carried forward, so that every night keeps the evidence.
            guess = self.store.carried.get(levels.level_id(level), {}).get(on)
        if guess is not None:
            seen.append(guess)
        return max(seen) if seen else None

    def rows(self, level: Mapping[str, Any]) -> int | None:
        """The earlier row count of a level (a lower bound of today's), if counted."""
        n = self.store.count(level)
        if n is None:
            n = self.store.carried.get(levels.level_id(level), {}).get("rows")
        return n

    def counted(self) -> list[tuple[Level, int]]:
        """Every level the earlier run counted, with its rows (lower bounds of today's)."""
        out: dict[str, tuple[Level, int]] = {}
        for k, rec in sorted(self.store.records.items()):
            try:
                out[k] = (Level.of(rec.level), rec.rows)
            except (ValueError, TypeError):
                continue
        carried = {k: v["rows"] for k, v in self.store.carried.items() if "rows" in v}
        for k, n in sorted({**carried, **self.store.counts}.items()):
            if k in out:
                continue
            try:
                out[k] = (Level.of(dict(orjson.loads(k))), n)
            except (ValueError, TypeError, orjson.JSONDecodeError):
                continue
        return list(out.values())


class Measurer(LevelTables):
    """The levels of one recipe, encoded and measured (see the module docstring)."""

    def __init__(
        self,
        recipe: Recipe,
        *,
        use_cache: bool = True,
        progress: Progress | None = None,
        source: OpenSource | None = None,
    ) -> None:
        super().__init__(recipe, use_cache=use_cache, progress=progress, source=source)
        self._payloads: dict[tuple[Any, ...], bytes] = {}
        self._hex_geoms: dict[int, dict[str, Any]] = {}
        self._region_geoms: dict[tuple[float, int], dict[str, Any]] = {}
        self._boundaries: Any = None
        self._fast: dict[tuple[Any, ...], tuple[Any, int | None, int | None]] = {}
        self._store: levels.Store | None = None
        # exact compressions started ahead (see prefetch), by (level key, measure)
        self._exact: dict[tuple[Any, ...], Future[int]] = {}
        self._pool: ThreadPoolExecutor | None = None
        self._earlier: Earlier | None = None
        self._earlier_looked = False

    # -- the store of measured levels -------------------------------------------------------
    @property
    def store(self) -> levels.Store:
        """The measured levels kept with the cache entry (empty without the cache)."""
        if self._store is None:
            key = self.entry()
            folder = cache.cache_dir() / key if self.use_cache else None
            self._store = levels.Store(
                folder if folder is not None and folder.is_dir() else None,
                _store_name(self.recipe),
                read=cache.read_file,
                write=cache.write_file,
                errors=(cache.DamagedEntry,),
            )
            if self._store.records:
                self.partial_from_cache = True
        return self._store

    def _known_count(self, level: Mapping[str, Any]) -> int | None:
        return self.store.count(level)

    def _note_count(self, level: Mapping[str, Any], rows: int) -> None:
        self.store.put_count(level, rows)

    def _entry_stored(self, entry: Path) -> None:
        if self._store is not None and self._store.folder is None:
            self._store.folder = entry  # measurements go with the new entry

    def _before_store(self) -> None:
        _ = self.earlier  # read before the new entry removes the earlier one

    @property
    def earlier(self) -> Earlier | None:
        """What an earlier run over fewer of these files measured (see :class:`Earlier`),
        found once, before this run's entry replaces that run's: None without the cache,
        when this file set has an entry of its own, or when no usable earlier store exists
        (a damaged one is no evidence)."""
        if not self._earlier_looked:
            self._earlier_looked = True
            self._earlier = self._find_earlier()
        return self._earlier

    def _find_earlier(self) -> Earlier | None:
        if not self.use_cache:
            return None
        key = self.entry()
        if (cache.cache_dir() / key).is_dir():
            return None  # this file set's own entry (and store) serves
        name = _store_name(self.recipe)

        def read(folder: Path) -> levels.Store | None:
            found = levels.Store(folder, name, read=cache.read_file, errors=(cache.DamagedEntry,))
            if not (found.records or found.counts or found.samples or found.carried):
                return None
            copy = levels.Store(None, name)  # in memory: the entry goes away
            copy.records, copy.counts, copy.samples = found.records, found.counts, found.samples
            copy.carried = found.carried
            return copy

        got = cache.earlier(self.recipe.scan_hash, self._file_keys, key, read)
        if got is None:
            return None
        return Earlier(store=got[0], files=got[1], total=len(set(self._file_keys)))

    def judged_earlier(
        self, level: Mapping[str, Any], on: Measure, limit: int, *, rows: int = 0
    ) -> bsearch.Candidate | None:
        """A level judged over ``limit`` by what an earlier run over fewer files measured:
        its earlier size on ``on`` over (1 + :data:`SAMPLE_MARGIN`) times the limit (the
        margin of sampled verdicts). None otherwise: earlier evidence never says "fits".
        ``rows``: a lower bound of the level's rows known already."""
        ev = self.earlier
        if ev is None:
            return None
        size = ev.size(level, on)
        if size is None or size <= (1 + SAMPLE_MARGIN) * limit:
            return None
        n = max(rows, ev.rows(level) or 0)
        c = bsearch.Candidate(level=Level.of(level), rows=n, elements=n, raw=None)
        c.fits = False
        c.estimated = True
        c.guess = size
        c.note = EARLIER_NOTE
        # Into this run's store as carried evidence (for the next run over more files only).
        self.store.put_carried(level, {on: size, **({"rows": n} if n else {})})
        return c

    def record(self, level: Mapping[str, Any]) -> levels.Record:
        """What a level measured: from the store, or from the level built now."""
        rec = self.store.get(level)
        if rec is not None:
            return rec
        data = self.payload(level)
        lr = self.rows(level)
        acc = self.finest().accounting
        rec = levels.Record(
            level=dict(level),
            rows=lr.frame.height,
            elements=encode.elements(lr.frame),
            raw=len(data),
            sha256=sha256(data),
            accounting={
                **self.accounting(level),
                "invalid_by_reason": acc.invalid_by_reason,
                "suppressed_cells": lr.suppressed_cells,
            },
            suppressed_cells=lr.suppressed_cells,
            denominators=(
                lr.report.as_dict()
                if self.recipe.normalize is not None and self.recipe.normalize.rate_measures
                else None
            ),
        )
        self.store.put(rec)
        return self.store.get(level) or rec

    def remember(
        self, c: bsearch.Candidate, *, on: Measure | None = None, limit: int | None = None
    ) -> None:
        """Keep what a measured candidate showed (exact lengths; a certain lower bound where
        an exact compression stopped early over ``limit``)."""
        if c.estimated or c.raw is None:
            return
        rec = self.record(c.level)
        more = levels.Record(
            level=rec.level,
            rows=rec.rows,
            elements=rec.elements,
            raw=rec.raw,
            sha256=rec.sha256,
            gzip=c.gzip,
            brotli=c.brotli,
        )
        fast_on, fast, mid = self._fast.get(bsearch.level_key(c.level), (None, None, None))
        if fast_on == "gzip":
            more.gzip_fast, more.gzip_mid = fast, mid
        elif fast_on == "brotli":
            more.brotli_fast = fast
        if c.note.startswith(">") and on in ("gzip", "brotli") and limit is not None:
            setattr(more, f"{on}_floor", limit + 1)
        self.store.put(rec.merge(more))

    def accounting(self, level: Mapping[str, Any]) -> dict[str, int]:
        """The level's accounting block: from the store when the level was not built now."""
        rec = self.store.get(level)
        if rec is not None and rec.accounting and self.built_rows(level) is None:
            return {k: rec.accounting[k] for k in ACCOUNTING_ORDER if k in rec.accounting}
        return super().accounting(level)

    # -- bytes ------------------------------------------------------------------------------
    def payload(self, level: Mapping[str, Any]) -> bytes:
        k = bsearch.level_key(level)
        if k not in self._payloads:
            kept = self.store.payload(level)
            if kept is not None:
                self._payloads[k] = kept
                return kept
            self._payloads[k] = self._encode(level, self.rows(level).frame, self.accounting(level))
        return self._payloads[k]

    def _encode(
        self, level: Mapping[str, Any], frame: pl.DataFrame, accounting: Mapping[str, int]
    ) -> bytes:
        """A level's rows in the recipe's layout."""
        r = self.recipe
        meta: dict[str, Any] = {}
        if r.time:
            meta["time_zone"] = r.time.zone
        if r.top:
            meta["rest"] = r.top.rest
        if r.normalize and r.normalize.rate_measures:
            meta["per"] = r.normalize.per
        geometry = self._geometry(level) if r.output.layout == "geojson" else None
        return encode.encode(
            r,
            frame,
            level=level,
            accounting=accounting,
            digits=int(level["digits"]),
            meta=meta,
            geometry=geometry,
        )

    def _geometry(self, level: Mapping[str, Any]) -> Callable[[pl.DataFrame], list[Any]]:
        """A function giving each payload row its GeoJSON geometry at this level."""
        from reduce.maps import geojson

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
            from reduce.maps import boundaries as geo
            from reduce.maps import topology

            assert r.region.id_property is not None
            b = self._boundaries or geo.load_boundaries(r.region.boundaries, r.region.id_property)
            self._boundaries = b
            shapes = topology.simplify_shared(b, tol) if tol > 0 else b.geoms
            shapes = topology.quantize(shapes, coords)
            self._region_geoms[key] = {
                i: geojson.polygon_geometry(g, coords) for i, g in zip(b.ids, shapes)
            }
        by_id = self._region_geoms[key]
        col = r.region.column
        return lambda plain: [by_id.get(v) for v in plain.get_column(col).to_list()]

    # -- candidates -------------------------------------------------------------------------
    def candidate(
        self,
        level: Mapping[str, Any],
        *,
        exact: bool,
        on: Measure | None = None,
        limit: int | None = None,
        brotli: bool | None = None,
        quick: bool = True,
        defer: bool = False,
    ) -> bsearch.Candidate:
        """Encode a level and measure it: every measure (``exact``), or only whether it fits
        ``limit`` on ``on`` (compression stops once the output is over the limit; first, when
        ``quick``, a fast compression may settle it; with ``defer``, a close call it does not
        settle is judged by its best guess, to be measured exactly later if it matters: see
        :data:`CLOSE_GUESS`). A level
        measured before (the store kept with the cache entry) is not measured again when what
        was kept settles the question."""
        c = self._from_store(
            level, exact=exact, on=on, limit=limit, brotli=brotli, quick=quick, defer=defer
        )
        if c is not None:
            return c
        c = self._measure(
            level, exact=exact, on=on, limit=limit, brotli=brotli, quick=quick, defer=defer
        )
        self.remember(c, on=on, limit=limit)
        return c

    def _from_store(
        self,
        level: Mapping[str, Any],
        *,
        exact: bool,
        on: Measure | None,
        limit: int | None,
        brotli: bool | None,
        quick: bool = True,
        defer: bool = False,
    ) -> bsearch.Candidate | None:
        rec = self.store.get(level)
        if rec is None:
            return None
        want_brotli = (
            on == "brotli" or (brotli is True) or (brotli is None and rec.raw <= BROTLI_AUTO_MAX)
        )
        c = bsearch.Candidate(
            level=Level.of(level),
            rows=rec.rows,
            elements=rec.elements,
            raw=rec.raw,
            gzip=rec.gzip,
            brotli=rec.brotli,
        )
        if exact or on is None or limit is None:
            if rec.gzip is None or (want_brotli and rec.brotli is None):
                return None
            if on is not None and limit is not None:
                c.fits = (rec.size(on) or 0) <= limit
                c.floor = rec.size(on)
            return c
        verdict = rec.verdict(on, limit)
        if verdict is not None:
            c.fits = verdict
            c.floor = rec.floor(on)
            if rec.size(on) is None:
                c.note = f"> {limit} {on} (measured before)"
            return c
        fast = rec.gzip_fast if on == "gzip" else rec.brotli_fast if on == "brotli" else None
        if fast is None or not quick:
            return None
        look = quick_verdict(on, limit, fast, rec.gzip_mid if on == "gzip" else None)
        if look.fits is None:
            if not defer:
                return None
            c.guess = int((look.mid or look.fast or 0) * CLOSE_GUESS[on])  # as in _measure
            c.fits, c.floor, c.note = c.guess <= limit, look.floor, QUICK_NOTE
            return c
        c.fits, c.floor, c.note = look.fits, look.floor, QUICK_NOTE
        c.guess = look.mid or look.fast
        return c

    def _measure(
        self,
        level: Mapping[str, Any],
        *,
        exact: bool,
        on: Measure | None,
        limit: int | None,
        brotli: bool | None,
        quick: bool = True,
        defer: bool = False,
    ) -> bsearch.Candidate:
        data = self.payload(level)
        rec = self.record(level)
        c = bsearch.Candidate(
            level=Level.of(level), rows=rec.rows, elements=rec.elements, raw=len(data)
        )
        if exact or on is None or limit is None:
            want_brotli = (
                on == "brotli"
                or brotli is True
                or (brotli is None and len(data) <= BROTLI_AUTO_MAX)
            )
            known = self.store.get(level)  # exact lengths measured before are not taken again
            if want_brotli and (known is None or known.brotli is None):
                self._start_exact(level, data, "brotli")  # beside gzip, on another thread
            c.gzip = (
                known.gzip
                if known is not None and known.gzip is not None
                else self._exact_length(level, data, "gzip")
            )
            c.brotli = None
            if want_brotli:
                c.brotli = (
                    known.brotli
                    if known is not None and known.brotli is not None
                    else self._exact_length(level, data, "brotli")
                )
            if on is not None and limit is not None:
                size = c.size(on)
                assert size is not None
                c.fits = size <= limit
                c.floor = size
        else:
            started = self._exact.get((bsearch.level_key(level), on))
            if on != "raw" and started is not None:
                size = started.result()  # started beside other exact checks (see prefetch)
                c.fits, c.floor = size <= limit, size
                setattr(c, on, size)
                return c
            if quick:
                look = quick_look(data, on, limit)
                c.floor = look.floor
                c.guess = look.mid or look.fast
                self._fast[bsearch.level_key(level)] = (on, look.fast, look.mid)
                if look.fits is not None:
                    c.fits = look.fits
                    c.note = QUICK_NOTE
                    return c
                if defer:
                    c.guess = int((look.mid or look.fast or 0) * CLOSE_GUESS[on])
                    c.fits = c.guess <= limit
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

    # -- exact compressions side by side ----------------------------------------------------
    def prefetch(self, levels_: Iterable[Mapping[str, Any]], on: Measure) -> None:
        """Start the exact compressions (on ``on``) of levels about to be checked exactly, each
        on its own thread: zlib and brotli release the interpreter lock, so on two cores the
        chosen level and a close neighbour are measured side by side. Levels whose exact size
        is kept in the store are skipped; payloads are built here, one after another."""
        if on == "raw":
            return
        for level in levels_:
            rec = self.store.get(level)
            if rec is not None and rec.size(on) is not None:
                continue
            self._start_exact(level, self.payload(level), on)

    def _start_exact(self, level: Mapping[str, Any], data: bytes, on: Measure) -> None:
        k = (bsearch.level_key(level), on)
        if k not in self._exact:
            if self._pool is None:
                self._pool = ThreadPoolExecutor(max_workers=2, thread_name_prefix="reduce-size")
            self._exact[k] = self._pool.submit(size_on, data, on)

    def _exact_length(self, level: Mapping[str, Any], data: bytes, on: Measure) -> int:
        """The exact length on ``on``: from a compression started before, or computed now."""
        started = self._exact.pop((bsearch.level_key(level), on), None)
        return started.result() if started is not None else size_on(data, on)

    def sampled(
        self,
        level: Mapping[str, Any],
        on: Measure,
        limit: int,
        *,
        count: bool = True,
        at_least: int = 0,
    ) -> bsearch.Candidate | None:
        """A level judged by a sample of its cells (:meth:`LevelTables.sample_rows`): the
        sample encoded and compressed at the fast setting, scaled to the whole level, times
        the exact/fast ratio (:data:`SAMPLE_RATIO`, then what this recipe's measured levels
        showed). Evidence that steers the search only: None when the level is too small to
        sample or the estimate is within :data:`SAMPLE_MARGIN` of ``limit`` (measure it).

        With ``count`` the level's rows are counted exactly first and the sample is scaled by
        them. Without, the level is sampled when a lower bound of its rows (its distinct
        cells, or the rows of a coarser level counted before: ``at_least``) is large enough,
        and the sample is scaled by the level's cells against the sample's (1 in ``every``
        by a fixed hash, so about ``every``): its rows are estimated too, without a pass
        over the partial to count them (the candidate says so: ``rows_estimated``)."""
        seen = self.store.sample(level)
        if not count and (seen is None or on not in seen or "rows" not in seen):
            seen = None
        frame: pl.DataFrame | None = None
        if count:
            rows = self.row_count(level)
        elif seen is not None:
            rows = seen["rows"]
        else:
            # A pilot sample, as thin as the level's cells allow, estimates its rows; the
            # sample taken is then as thin as those rows allow (the pilot's cells are among
            # its cells: the same hash picks both), or the pilot itself.
            pilot = self.sample_every(level, SAMPLE_PILOT_ROWS)
            if pilot < 2:  # too few cells to sample, or neither hex cells nor time bins
                return None
            most = self.rows_at_most(level)
            if most is not None and self.sample_every(level, most) < 2:
                return None  # too few rows to sample, whatever a pilot would say
            rows = max(at_least, self.cells(level))
            self.progress(
                f"sampling 1 in {pilot} {_unit(self.recipe)} of {bsearch.describe_level(level)}"
            )
            frame = self.sample_rows(level, pilot)
            rows = max(rows, int(frame.height / self.sampled_share(level, pilot)))
            if self.sample_every(level, rows) != pilot:
                frame = None
        if seen is None or on not in seen:
            every = self.sample_every(level, rows)
            if every < 2:
                return None
            if frame is None:
                self.progress(
                    f"sampling 1 in {every} {_unit(self.recipe)} of {bsearch.describe_level(level)}"
                )
                frame = self.sample_rows(level, every)
            if not frame.height:
                return None
            fast = fast_length(self._encode(level, frame, {}), on)
            if count:
                scale = rows / frame.height
            else:
                scale = 1 / self.sampled_share(level, every)
                rows = max(rows, int(frame.height * scale))
            seen = {
                "every": every,
                "sample_rows": frame.height,
                on: int(fast * scale),
                **({} if count else {"rows": rows}),
            }
            self.store.put_sample(level, seen)
        est = int(seen[on] * self.store.ratio(on, SAMPLE_RATIO[on]))
        if (1 - SAMPLE_MARGIN) * limit < est <= (1 + SAMPLE_MARGIN) * limit:
            return None
        c = bsearch.Candidate(level=Level.of(level), rows=rows, elements=rows, raw=None)
        c.fits = est <= limit
        c.estimated = True
        c.rows_estimated = not count
        c.guess = est
        c.note = (
            f"~{est:,} {on} bytes estimated from a sample of 1 in {seen['every']} "
            f"{_unit(self.recipe)}: "
            f"{'under' if c.fits else 'over'} {limit:,}"
        )
        return c

    def forget(self, level: Mapping[str, Any]) -> None:
        """Drop a level's rows and bytes (a level over the budget is not needed again)."""
        self._payloads.pop(bsearch.level_key(level), None)
        super().forget(level)

    def estimate(
        self,
        level: Mapping[str, Any],
        on: Measure,
        per_row: float,
        limit: int,
        *,
        rows: int | None = None,
    ) -> bsearch.Candidate:
        """A candidate judged from its row count alone (see :meth:`row_count`): ``per_row``
        bytes (the least seen on measured levels) times its rows; used only to skip levels
        far over the budget. ``rows``: a lower bound of its rows known without counting (the
        rows of a coarser level), used instead of counting."""
        n = self.row_count(level) if rows is None else rows
        c = bsearch.Candidate(level=Level.of(level), rows=n, elements=n, raw=None)
        c.fits = False
        c.estimated = True
        c.guess = int(per_row * n)
        at_least = "" if rows is None else "at least "
        c.note = f"~{at_least}{int(per_row * n):,} {on} bytes estimated from rows: over {limit:,}"
        return c


def _unit(recipe: Recipe) -> str:
    return "cells" if recipe.hex else "time bins"


def _store_name(recipe: Recipe) -> str:
    """The name of a recipe's store of measured levels: everything that shapes its payloads
    besides the scan (whose entry holds the store) and the budget, including the size and
    modification time of its denominators file."""
    n = recipe.normalize
    den = n.denominators.path if n is not None and n.denominators is not None else None
    # The folder resolved: the same recipe named by a relative or an absolute path (or through
    # a symbolic link) shares its store.
    folder = recipe.file.parent.resolve()
    return levels.store_hash(recipe.document, f"{folder}\0{cache.file_stamp(den)}")
