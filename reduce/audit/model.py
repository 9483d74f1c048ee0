"""The audit's results and the constants its checks and reports share."""

from __future__ import annotations

import re
from dataclasses import dataclass

from reduce.contract import ACCOUNTING_KEYS, COLUMNS_FORMAT
from reduce.sizes import (
    Measure,
    Sizes,
    format_size,
)

# The contract's values (reduce.contract), under the names the audit's API has used.
AUDIT_FORMAT = "reduce.audit/1"
MANIFEST_SUFFIX = ".manifest.json"

# Number.MAX_SAFE_INTEGER of JavaScript (ECMA-262): larger integers lose digits in a browser.


# Six decimals of a degree are about 0.1 m on the ground: finer than any map on a screen can
# show (common practice for published coordinates). More is bytes without information.
PRECISION_DECIMALS = 6

# Drawing-surface rules of thumb (common practice, not measurements of any one machine):
# the DOM/SVG stays fluid up to about a thousand drawn nodes, a 2D canvas up to about a
# hundred thousand marks, beyond that the GPU (WebGL) is needed to keep interaction smooth.
SVG_MAX_ELEMENTS = 1_000
CANVAS_MAX_ELEMENTS = 100_000

# Transfer estimate on a slow link: our own round assumption of 1 Mbit/s downstream, about
# what a weak mobile connection gives (an assumption, not a measurement). Latency and TLS
# set-up are not included.
SLOW_LINK_NAME = "slow link"
SLOW_LINK_BITS_PER_SECOND = 1_000_000
TRANSFER_ASSUMPTION = f"a {SLOW_LINK_NAME} of 1 Mbit/s assumed"


_JSON_SUFFIXES = frozenset({".json", ".geojson"})
_CSV_SUFFIXES = frozenset({".csv"})
_ARROW_SUFFIXES = frozenset({".arrow", ".feather"})

_ACCOUNTING_KEYS = ACCOUNTING_KEYS
_H3_CELL_RE = re.compile(r"8[0-9a-f]{14}")
_HEX_NAMES = frozenset({"hex", "h3", "cell"})
_LAT_NAMES = frozenset({"lat", "latitude"})
_LON_NAMES = frozenset({"lon", "lng", "long", "longitude"})
# A decimal number as written in text: fraction digits and exponent, for the precision count.
_DECIMAL_TEXT_RE = r"^[+-]?\d*\.?(?P<frac>\d*)(?:[eE](?P<exp>[+-]?\d{1,6}))?$"
_NON_FINITE_TOKENS = (b"NaN", b"Infinity", b"-Infinity")

KIND_LABELS = {
    "columns": COLUMNS_FORMAT,
    "rows": "row JSON",
    "geojson": "GeoJSON",
    "csv": "CSV",
    "arrow": "Arrow IPC",
    "json": "JSON (other layout)",
    "other": "other (sizes only)",
}


# --------------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FieldCost:
    """Bytes one column or property takes in the file's encoding.

    ``too_precise`` counts values written with more than :data:`PRECISION_DECIMALS` decimals.
    """

    name: str
    bytes: int
    too_precise: int = 0
    on: Measure = "raw"  # the measure of ``share``: the file's budget measure
    share: int | None = None  # bytes on ``on`` the field adds (see field_shares)


@dataclass(frozen=True, slots=True)
class Verdict:
    """A budget applied to one file or to the total: ``size`` on ``on`` against ``limit``."""

    limit: int
    on: Measure
    size: int
    source: str

    @property
    def over(self) -> bool:
        return self.size > self.limit


@dataclass(frozen=True, slots=True)
class FileAudit:
    """Everything the audit found about one file."""

    path: str
    kind: str
    raw: int
    gzip: int
    brotli: int | None
    rows: int | None
    elements: int | None
    element_kind: str | None
    fields: tuple[FieldCost, ...]
    problems: tuple[str, ...]
    notes: tuple[str, ...]
    budget: Verdict | None

    def size_on(self, measure: Measure) -> int | None:
        """Size on one measure; ``None`` for brotli when it was not measured."""
        return {"raw": self.raw, "gzip": self.gzip, "brotli": self.brotli}[measure]

    @property
    def sizes(self) -> Sizes | None:
        """All three sizes, or ``None`` while brotli is not measured."""
        if self.brotli is None:
            return None
        return Sizes(raw=self.raw, gzip=self.gzip, brotli=self.brotli)

    @property
    def surface(self) -> str | None:
        return None if self.elements is None else advice(self.elements)

    @property
    def transfer_seconds(self) -> float:
        return transfer_seconds(self.gzip)

    @property
    def too_precise_fields(self) -> tuple[FieldCost, ...]:
        return tuple(f for f in self.fields if f.too_precise)

    @property
    def findings(self) -> tuple[str, ...]:
        """Problem lines, then the budget offence if any (without the path)."""
        out = list(self.problems)
        if self.budget is not None and self.budget.over:
            out.append(_over_message(self.budget))
        return tuple(out)


@dataclass(frozen=True, slots=True)
class CommitCheck:
    """An interrupted commit found in an audited folder: completed, or why it was not."""

    journal: str
    completed: bool
    message: str


@dataclass(frozen=True, slots=True)
class AuditReport:
    """The audit of several files, their total and the measure budgets were taken on."""

    files: tuple[FileAudit, ...]
    on: Measure
    total: Verdict | None
    commits: tuple[CommitCheck, ...] = ()

    @property
    def total_size(self) -> int | None:
        """Sum over all files on the report's measure (``None`` if brotli is missing)."""
        sizes = [f.size_on(self.on) for f in self.files]
        if any(s is None for s in sizes):
            return None
        return sum(s for s in sizes if s is not None)

    @property
    def findings(self) -> tuple[tuple[str, str], ...]:
        """Every finding as ``(path, message)``; the total uses the path ``total``."""
        out = [(c.journal, c.message) for c in self.commits if not c.completed]
        out += [(f.path, message) for f in self.files for message in f.findings]
        if self.total is not None and self.total.over:
            out.append(("total", _over_message(self.total, files=len(self.files))))
        return tuple(out)

    @property
    def ok(self) -> bool:
        return not self.findings


def advice(elements: int) -> str:
    """Drawing surface for ``elements`` marks (rules of thumb, common practice).

    Up to about 1,000 elements the DOM (SVG) is fine; up to about 100,000 a 2D canvas;
    beyond, WebGL on the GPU.
    """
    if isinstance(elements, bool) or not isinstance(elements, int) or elements < 0:
        raise ValueError(f"elements must be a non-negative integer, got {elements!r}")
    if elements <= SVG_MAX_ELEMENTS:
        return "SVG/DOM"
    if elements <= CANVAS_MAX_ELEMENTS:
        return "canvas 2D"
    return "WebGL (GPU)"


def transfer_seconds(nbytes: int) -> float:
    """Seconds to transfer ``nbytes`` on the assumed slow link (1 Mbit/s, no latency)."""
    return nbytes * 8 / SLOW_LINK_BITS_PER_SECOND


class _Findings:
    """Mutable collector used while one file is analysed."""

    def __init__(self) -> None:
        self.kind = "other"
        self.rows: int | None = None
        self.elements: int | None = None
        self.element_kind: str | None = None
        self.fields: list[FieldCost] = []
        self.problems: list[str] = []
        self.notes: list[str] = []
        self.suspect_big_floats = False


def _over_message(verdict: Verdict, *, files: int | None = None) -> str:
    over = "over total budget" if files is not None else "over budget"
    across = f" summed over {files} files" if files is not None else ""
    return (
        f"{over}: {verdict.on} {verdict.size:,} B{across} > {verdict.limit:,} B "
        f"({format_size(verdict.size)} > {format_size(verdict.limit)}; {verdict.source})"
    )
