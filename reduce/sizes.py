"""Byte sizes: parsing budget strings and measuring payload bytes.

One module owns both so the optimiser, the manifest and the audit measure bytes the same way:
raw length, gzip at level 9 with a zero timestamp (as a static host pre-compresses, RFC 1952)
and brotli at quality 11 (RFC 7932).
"""

from __future__ import annotations

import gzip
import re
import zlib
from dataclasses import dataclass
from typing import Literal

import brotli

from reduce.errors import did_you_mean

Measure = Literal["raw", "gzip", "brotli"]
MEASURES: tuple[Measure, ...] = ("raw", "gzip", "brotli")

# Decimal units are SI (1 KB = 1000 bytes); binary units are IEC 80000-13 (1 KiB = 1024).
_UNITS = {
    "": 1,
    "B": 1,
    "KB": 1000,
    "MB": 1000**2,
    "GB": 1000**3,
    "KIB": 1024,
    "MIB": 1024**2,
    "GIB": 1024**3,
}
_SIZE_RE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([A-Za-z]*)\s*$")


def parse_size(value: object) -> int:
    """Parse ``300KB``, ``1.5MB``, ``200KiB`` or a plain integer into a positive byte count.

    Raises ``ValueError`` with a message naming the accepted forms.
    """
    if isinstance(value, bool):
        raise ValueError(f"{value!r} is not a size; use e.g. 300KB, 1.5MB, 200KiB or 250000")
    if isinstance(value, int):
        n = value
    elif isinstance(value, str):
        m = _SIZE_RE.match(value)
        unit = m.group(2).upper() if m else None
        if not m or unit not in _UNITS:
            raise ValueError(f"{value!r} is not a size; use e.g. 300KB, 1.5MB, 200KiB or 250000")
        n = round(float(m.group(1)) * _UNITS[unit])
    else:
        raise ValueError(f"{value!r} is not a size; use e.g. 300KB, 1.5MB, 200KiB or 250000")
    if n <= 0:
        raise ValueError(f"{value!r} is not a positive size; a budget must be above zero bytes")
    return n


def parse_measure(value: object) -> Measure:
    """``raw``, ``gzip`` or ``brotli``; anything else raises ``ValueError`` naming them."""
    if isinstance(value, str) and value in MEASURES:
        return value
    hint = did_you_mean(value, MEASURES) if isinstance(value, str) else ""
    raise ValueError(f"{value!r} is not a measure{hint}; use raw, gzip or brotli")


def format_size(n: int) -> str:
    """Human-readable decimal size: ``123 B``, ``45.6 KB``, ``1.23 MB``."""
    if n < 1000:
        return f"{n} B"
    if n < 1000**2:
        return f"{n / 1000:.1f} KB"
    return f"{n / 1000**2:.2f} MB"


def gzip_bytes(data: bytes) -> bytes:
    return gzip.compress(data, compresslevel=9, mtime=0)


def brotli_bytes(data: bytes) -> bytes:
    return bytes(brotli.compress(data, quality=11))


def size_on(data: bytes, on: Measure) -> int:
    """Exact size of ``data`` on one measure."""
    if on == "raw":
        return len(data)
    if on == "gzip":
        return len(gzip_bytes(data))
    return len(brotli_bytes(data))


def fits_on(data: bytes, on: Measure, limit: int) -> tuple[bool, int | None]:
    """Whether ``data`` measures at most ``limit`` bytes on ``on``.

    Returns ``(fits, exact_size)``. Compression streams in chunks and stops as soon as the
    output already exceeds ``limit`` (a cheap bound: output only grows), in which case the
    exact size is not known and ``None`` is returned with ``False``.
    """
    if on == "raw":
        return len(data) <= limit, len(data)
    chunk = 1 << 16
    if on == "gzip":
        # Same stream as gzip.compress(level 9, mtime 0): 10-byte header, deflate, 8-byte trailer.
        comp = zlib.compressobj(9, zlib.DEFLATED, -zlib.MAX_WBITS, zlib.DEF_MEM_LEVEL, 0)
        out = 10 + 8
        for i in range(0, len(data), chunk):
            out += len(comp.compress(data[i : i + chunk]))
            if out > limit:
                return False, None
        out += len(comp.flush())
        return out <= limit, out
    bro = brotli.Compressor(quality=11)
    out = 0
    for i in range(0, len(data), chunk):
        out += len(bro.process(data[i : i + chunk]))
        if out > limit:
            return False, None
    out += len(bro.finish())
    return out <= limit, out


# A quick look before the exact compression: the same data at a fast setting (zlib level 1,
# brotli quality 5) is never smaller in practice than at the slow one, and the slow one is
# not below half of it on JSON (measured on our payloads: 65-90%). So a fast size at or under
# the limit means the slow one fits, and a fast size over twice the limit means it does not.
_FAST_FLOOR = 0.5
# Level 9 against level 6 on the same payload: never larger in practice, and 89-100% of it on
# our payloads (bench and demo recipes, 5 KB to 40 MB); 0.85 leaves a margin below that.
_MID_FLOOR = 0.85


@dataclass(frozen=True, slots=True)
class QuickLook:
    """What a fast compression says: ``fits`` (None: too close to call, measure exactly) and
    ``floor``, a lower bound of the exact size (``fast`` times :data:`_FAST_FLOOR`); ``fast``
    and ``mid`` are the fast compressions' lengths (``mid``: zlib level 6, when taken), from
    which :func:`quick_verdict` gives the same answer for any other limit."""

    fits: bool | None
    floor: int
    fast: int | None = None
    mid: int | None = None


def quick_verdict(on: Measure, limit: int, fast: int, mid: int | None = None) -> QuickLook:
    """The verdict of :func:`quick_look` from the fast compressions' lengths alone."""
    floor = int(fast * _FAST_FLOOR)
    if fast <= limit:
        return QuickLook(True, floor, fast, mid)
    if floor > limit:
        return QuickLook(False, floor, fast, mid)
    if mid is not None:
        floor = max(floor, int(mid * _MID_FLOOR))
        if mid <= limit:
            return QuickLook(True, floor, fast, mid)
        if floor > limit:
            return QuickLook(False, floor, fast, mid)
    return QuickLook(None, floor, fast, mid)


def fast_length(data: bytes, on: Measure) -> int:
    """The length of ``data`` at the fast setting of a measure (zlib level 1 in gzip framing,
    brotli quality 5; raw is its length)."""
    if on == "raw":
        return len(data)
    if on == "gzip":
        return len(zlib.compress(data, 1)) + 18 - 6  # gzip framing instead of zlib framing
    return len(brotli.compress(data, quality=5))


def quick_look(data: bytes, on: Measure, limit: int) -> QuickLook:
    """Whether a fast compression settles that ``data`` fits ``limit`` on ``on``."""
    if on == "raw":
        return QuickLook(len(data) <= limit, len(data))
    fast = fast_length(data, on)
    look = quick_verdict(on, limit, fast)
    if look.fits is None and on == "gzip":
        # Too close to call at level 1: level 6 takes a fraction of level 9's time and comes
        # within a few percent of it.
        mid = len(zlib.compress(data, 6)) + 18 - 6
        look = quick_verdict(on, limit, fast, mid)
    return look


@dataclass(frozen=True, slots=True)
class Sizes:
    raw: int
    gzip: int
    brotli: int | None  # None: not measured (see measure_all)

    def on(self, measure: Measure) -> int:
        v = getattr(self, measure)
        if v is None:
            raise ValueError(f"{measure} size was not measured")
        return int(v)

    def as_dict(self) -> dict[str, int | None]:
        return {"raw": self.raw, "gzip": self.gzip, "brotli": self.brotli}


# Brotli at quality 11 compresses about half a megabyte a second: payloads above this raw size
# get an exact brotli figure only when the budget is on brotli or it is asked for.
BROTLI_AUTO_MAX = 4_000_000


def measure_all(data: bytes, *, brotli: bool | None = None) -> Sizes:
    """Raw, gzip (level 9) and brotli (quality 11) sizes of ``data``.

    ``brotli=None`` measures brotli for payloads up to :data:`BROTLI_AUTO_MAX` raw bytes and
    leaves it ``None`` above; True or False forces the choice. The two compressions run on
    two threads (both release the interpreter lock).
    """
    want_brotli = len(data) <= BROTLI_AUTO_MAX if brotli is None else brotli
    if not want_brotli:
        return Sizes(raw=len(data), gzip=len(gzip_bytes(data)), brotli=None)
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=2) as pool:
        b = pool.submit(lambda: len(brotli_bytes(data)))
        g = len(gzip_bytes(data))
        return Sizes(raw=len(data), gzip=g, brotli=b.result())
