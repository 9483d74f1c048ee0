"""Levels: the :class:`Level` type, and the store of what every candidate level measured,
kept with the cached partial, so that a re-fit at another budget, measure or order is a
lookup.

A level is one setting of every ladder axis of a recipe (:data:`AXES`, declared here once):
a hex resolution, a time bin, a top-k, a simplification tolerance, coordinate digits and
decimal digits; axes a recipe does not have are absent.

A *record* holds what a level's verdict and manifest need: its rows and drawn elements, its
exact raw, gzip and brotli lengths where they were measured (or lower bounds where a
compression stopped early or a fast compression settled it), the payload's sha256, the
accounting and the normalisation report. The chosen level's payload bytes are kept too, when
small (:data:`PAYLOAD_MAX`), so publishing it again needs no roll-up. Levels counted but not
measured keep their row count, and levels judged by a sample of their cells keep what the
sample showed (its fast length scaled to the level's rows), so a re-fit replays those
verdicts too; the exact/sample ratio of levels that have both calibrates later estimates.

A store belongs to one cache entry (one scan of one version of the source) and one recipe
*besides its budget*: its file name carries a hash of everything else that shapes a payload
(the recipe's validated content without ``[budget]``, and the denominators file's size and
modification time). Records are plain JSON, written atomically; in a cache entry they go
through the entry's checksummed files (``cache.write_file``/``cache.read_file``, passed in
as ``read``/``write``). A store that does not parse or verify, or a kept payload whose sha256
does not match its record, is treated as absent, never used. This module imports no polars.
"""

from __future__ import annotations

import dataclasses
import hashlib
import zlib
from collections.abc import Callable, Iterator, Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import orjson

from reduce._util.atomic import write_atomic
from reduce.contract import LEVELS_FORMAT

# The ladder axes, in the order levels are shown and keyed.
AXES: tuple[str, ...] = ("hex", "time", "top", "simplify", "coords", "digits")
_TYPES: dict[str, tuple[type, ...]] = {
    "hex": (int,),
    "time": (str,),
    "top": (int,),
    "simplify": (int, float),
    "coords": (int,),
    "digits": (int,),
}


@dataclass(frozen=True, slots=True, eq=False)
class Level(Mapping[str, Any]):
    """One setting of every ladder axis a recipe has (None: the recipe lacks that axis).

    Read-only and hashable; it reads like a mapping of the axes it has (``level["hex"]``,
    ``level.get("time")``, ``dict(level)``), in :data:`AXES` order."""

    hex: int | None = None
    time: str | None = None
    top: int | None = None
    simplify: float | None = None
    coords: int | None = None
    digits: int | None = None

    @classmethod
    def of(cls, m: Mapping[str, Any]) -> Level:
        """A level from a mapping of axis names to values (a Level is returned as it is)."""
        if isinstance(m, Level):
            return m
        unknown = [k for k in m if k not in AXES]
        if unknown:
            raise ValueError(
                f"not a ladder axis: {', '.join(map(str, unknown))}; the axes are {', '.join(AXES)}"
            )
        for k, v in m.items():
            if v is not None and (isinstance(v, bool) or not isinstance(v, _TYPES[k])):
                raise ValueError(f"level axis {k!r}: {v!r} is not a {_TYPES[k][0].__name__}")
        return cls(**dict(m))

    def with_(self, axis: str, value: Any) -> Level:
        """The same level with one axis set to another value."""
        return dataclasses.replace(self, **{axis: value})

    @property
    def key(self) -> tuple[tuple[str, Any], ...]:
        return tuple((a, getattr(self, a)) for a in AXES if getattr(self, a) is not None)

    def __getitem__(self, axis: str) -> Any:
        v = getattr(self, axis, None) if axis in AXES else None
        if v is None:
            raise KeyError(axis)
        return v

    def __iter__(self) -> Iterator[str]:
        return (a for a in AXES if getattr(self, a) is not None)

    def __len__(self) -> int:
        return sum(getattr(self, a) is not None for a in AXES)

    def __eq__(self, other: object) -> bool:
        """Equal to a level, or to a plain mapping, with the same axes and values."""
        if isinstance(other, Level):
            return self.key == other.key
        if isinstance(other, Mapping):
            return dict(self) == dict(other)
        return NotImplemented

    def __hash__(self) -> int:
        return hash(self.key)

    def __repr__(self) -> str:
        inner = ", ".join(f"{a}={v!r}" for a, v in self.key)
        return f"Level({inner})"


FORMAT = LEVELS_FORMAT
PAYLOAD_MAX = 16_000_000  # raw bytes of a payload kept with its record


def level_id(level: Mapping[str, Any]) -> str:
    """A level as a stable text key: its axes and values, sorted by axis."""
    return orjson.dumps(sorted(dict(level).items())).decode()


@dataclass
class Record:
    """What one level measured (see the module docstring)."""

    level: dict[str, Any]
    rows: int
    elements: int
    raw: int
    sha256: str
    gzip: int | None = None
    brotli: int | None = None
    # Lower bounds where the exact length was not taken (a compression that stopped once over
    # a limit, or a fast compression's floor); never above the exact length.
    gzip_floor: int | None = None
    brotli_floor: int | None = None
    # Lengths of the fast compressions that steer the search (zlib level 1 and 6 in gzip
    # framing, brotli quality 5): evidence only, never published (see sizes.quick_verdict).
    gzip_fast: int | None = None
    gzip_mid: int | None = None
    brotli_fast: int | None = None
    accounting: dict[str, Any] = field(default_factory=dict)
    suppressed_cells: int = 0
    denominators: dict[str, Any] | None = None
    payload: str | None = None  # file name of the kept payload bytes, in the store's folder

    def size(self, on: str) -> int | None:
        """The exact length on a measure, if measured."""
        return {"raw": self.raw, "gzip": self.gzip, "brotli": self.brotli}[on]

    def floor(self, on: str) -> int | None:
        """The best lower bound on a measure: the exact length, or a recorded floor."""
        exact = self.size(on)
        if exact is not None:
            return exact
        return {"raw": self.raw, "gzip": self.gzip_floor, "brotli": self.brotli_floor}[on]

    def verdict(self, on: str, limit: int) -> bool | None:
        """Whether the level fits ``limit`` on ``on``, when this record settles it."""
        exact = self.size(on)
        if exact is not None:
            return exact <= limit
        low = self.floor(on)
        if low is not None and low > limit:
            return False
        return None

    def merge(self, other: Record) -> Record:
        """Both records' knowledge of one level (exact lengths win; the higher floor)."""

        def best(a: int | None, b: int | None) -> int | None:
            return b if a is None else a

        def high(a: int | None, b: int | None) -> int | None:
            vals = [v for v in (a, b) if v is not None]
            return max(vals) if vals else None

        return Record(
            level=self.level,
            rows=self.rows,
            elements=self.elements,
            raw=self.raw,
            sha256=self.sha256,
            gzip=best(self.gzip, other.gzip),
            brotli=best(self.brotli, other.brotli),
            gzip_floor=high(self.gzip_floor, other.gzip_floor),
            brotli_floor=high(self.brotli_floor, other.brotli_floor),
            gzip_fast=best(self.gzip_fast, other.gzip_fast),
            gzip_mid=best(self.gzip_mid, other.gzip_mid),
            brotli_fast=best(self.brotli_fast, other.brotli_fast),
            accounting=self.accounting or other.accounting,
            suppressed_cells=self.suppressed_cells,
            denominators=self.denominators if self.denominators is not None else other.denominators,
            payload=self.payload or other.payload,
        )


def store_hash(document: Mapping[str, Any], extra: str = "") -> str:
    """The hash naming a recipe's store: its validated content without ``budget``."""
    doc = {k: v for k, v in document.items() if k != "budget"}
    text = orjson.dumps(doc, option=orjson.OPT_SORT_KEYS, default=str)
    return hashlib.sha256(text + b"\0" + extra.encode()).hexdigest()[:24]


Read = Callable[[Path, str], bytes]  # (folder, file name) -> bytes; OSError when unusable
Write = Callable[[Path, str, bytes], None]


def _read_plain(folder: Path, name: str) -> bytes:
    return (folder / name).read_bytes()


def _write_plain(folder: Path, name: str, data: bytes) -> None:
    if not _write_atomic(folder / name, data):
        raise OSError(f"cannot write {name}")


class Store:
    """The measured levels of one recipe over one cache entry (see the module docstring).

    ``read`` and ``write`` move a file's bytes in and out of ``folder`` (plain files by
    default; a cache entry's checksummed files in the pipeline). ``read`` raises ``OSError``
    or any exception listed in ``errors`` for a file that is absent or unusable."""

    def __init__(
        self,
        folder: Path | None,
        name: str,
        *,
        read: Read = _read_plain,
        write: Write = _write_plain,
        errors: tuple[type[BaseException], ...] = (),
    ) -> None:
        self.folder = folder
        self.name = name
        self._read = read
        self._write = write
        self._errors: tuple[type[BaseException], ...] = (OSError, *errors)
        self._bad_store: tuple[type[BaseException], ...] = (
            orjson.JSONDecodeError,
            TypeError,
            KeyError,
            AttributeError,
            ValueError,
            *self._errors,
        )
        self._bad_payload: tuple[type[BaseException], ...] = (zlib.error, *self._errors)
        self.records: dict[str, Record] = {}
        self.counts: dict[str, int] = {}  # rows of levels counted, not measured
        # levels judged by a sample: {"rows", "sample_rows", "every", "<measure>": the
        # sample's fast length scaled to the level's rows} (evidence only, see measure.py)
        self.samples: dict[str, dict[str, int]] = {}
        # levels this run judged over by what an earlier run over fewer files measured:
        # {"rows": a lower bound, "<measure>": the earlier size}. Read only as earlier
        # evidence by a later run over more files (see measure.Earlier), never replayed.
        self.carried: dict[str, dict[str, int]] = {}
        self.dirty = False
        if folder is not None:
            self._load()

    @property
    def file_name(self) -> str:
        return f"levels-{self.name}.json"

    @property
    def path(self) -> Path | None:
        return None if self.folder is None else self.folder / self.file_name

    def _load(self) -> None:
        assert self.folder is not None
        try:
            doc = orjson.loads(self._read(self.folder, self.file_name))
            if doc.get("format") != FORMAT:
                return
            records = {level_id(r["level"]): Record(**r) for r in doc["records"]}
            counts = {str(k): int(v) for k, v in doc.get("counts", {}).items()}
            samples, carried = (
                {
                    str(k): {str(m): int(n) for m, n in v.items()}
                    for k, v in doc.get(section, {}).items()
                }
                for section in ("samples", "carried")
            )
        except self._bad_store:
            return
        self.records, self.counts, self.samples = records, counts, samples
        self.carried = carried

    def get(self, level: Mapping[str, Any]) -> Record | None:
        return self.records.get(level_id(level))

    def put(self, rec: Record) -> None:
        k = level_id(rec.level)
        old = self.records.get(k)
        new = rec if old is None or old.sha256 != rec.sha256 else rec.merge(old)
        if old != new:
            self.records[k] = new
            self.dirty = True

    def count(self, level: Mapping[str, Any]) -> int | None:
        rec = self.get(level)
        return rec.rows if rec is not None else self.counts.get(level_id(level))

    def put_count(self, level: Mapping[str, Any], rows: int) -> None:
        k = level_id(level)
        if self.counts.get(k) != rows:
            self.counts[k] = rows
            self.dirty = True

    def sample(self, level: Mapping[str, Any]) -> dict[str, int] | None:
        """What a sample of the level showed (see :meth:`put_sample`), if taken before."""
        return self.samples.get(level_id(level))

    def put_sample(self, level: Mapping[str, Any], figures: Mapping[str, int]) -> None:
        """Keep what a sample of a level showed, merged with what earlier samples showed."""
        self._merge(self.samples, level, figures)

    def put_carried(self, level: Mapping[str, Any], figures: Mapping[str, int]) -> None:
        """Keep the earlier figures a level was judged by (see ``carried``)."""
        self._merge(self.carried, level, figures)

    def _merge(
        self,
        section: dict[str, dict[str, int]],
        level: Mapping[str, Any],
        figures: Mapping[str, int],
    ) -> None:
        k = level_id(level)
        new = {**section.get(k, {}), **figures}
        if section.get(k) != new:
            section[k] = new
            self.dirty = True

    def ratio(self, on: str, default: float) -> float:
        """The median of exact length / sample estimate over levels that have both: how a
        sample's scaled fast compression relates to the exact one on this recipe's payloads
        (``default`` until some level has both)."""
        seen = sorted(
            exact / est
            for k, rec in self.records.items()
            if (exact := rec.size(on)) is not None
            and (est := self.samples.get(k, {}).get(on)) is not None
            and est > 0
        )
        if not seen:
            return default
        mid = len(seen) // 2
        return seen[mid] if len(seen) % 2 else (seen[mid - 1] + seen[mid]) / 2

    def payload(self, level: Mapping[str, Any]) -> bytes | None:
        """The kept payload bytes of a level, if kept and intact (sha256 checked)."""
        rec = self.get(level)
        if rec is None or rec.payload is None or self.folder is None:
            return None
        try:
            data = zlib.decompress(self._read(self.folder, rec.payload))
        except self._bad_payload:
            return None
        return data if hashlib.sha256(data).hexdigest() == rec.sha256 else None

    def keep_payload(self, level: Mapping[str, Any], data: bytes) -> None:
        """Keep a level's payload bytes beside its record (small payloads only)."""
        rec = self.get(level)
        if (
            self.folder is None
            or rec is None
            or len(data) > PAYLOAD_MAX
            or self.payload(level) is not None
        ):
            return
        name = f"payload-{self.name}-{rec.sha256[:20]}.z"
        try:
            self._write(self.folder, name, zlib.compress(data, 1))
        except self._errors:
            return
        rec.payload = name
        self.dirty = True

    def save(self) -> None:
        """Write the store if it changed (atomically; failures are ignored: a cache)."""
        if self.folder is None or not self.dirty or not self.folder.is_dir():
            return
        doc = {
            "format": FORMAT,
            "records": [asdict(r) for _, r in sorted(self.records.items())],
            "counts": dict(sorted(self.counts.items())),
            "samples": dict(sorted(self.samples.items())),
            "carried": dict(sorted(self.carried.items())),
        }
        try:
            self._write(self.folder, self.file_name, orjson.dumps(doc))
        except self._errors:
            return
        self.dirty = False


def _write_atomic(path: Path, data: bytes) -> bool:
    try:
        write_atomic(path, data)
    except OSError:
        return False
    return True
