"""Pre-publish size audit of payload files that are already written.

``audit_paths`` reads each file once and reports what a browser will pay for it: raw, gzip
(level 9) and brotli (quality 11) bytes as measured by :mod:`reduce.sizes`; rows and drawn
elements; the bytes each column or property takes in its encoding; numbers written with more
precision than a screen can show; budget verdicts; and, for our ``reduce.columns/1``
payloads, a consistency check of the file against its own contract and its manifest.

Recognised layouts: our columns payload, row JSON (a top-level array of objects), GeoJSON
(a FeatureCollection, RFC 7946), CSV and Arrow IPC (``.arrow``/``.feather``). Any other file
gets sizes only.

Findings (a problem in a file, a file or total over budget) are data in the returned
:class:`AuditReport`; the command line turns them into exit code 1. Bad input to the audit
itself (a missing path, an unreadable file, a malformed budgets file, a bad size) raises
:class:`reduce.errors.AuditError` (exit code 2). A file whose bytes can be read but whose
content does not parse (a ``.json`` file that is not valid JSON, say) is a finding, not an
error: the file exists, it is simply broken.

Files found in a folder are data, not trusted: only regular files (and links to them) are
read, at most :data:`READ_MAX_BYTES` each, opened so that a FIFO or device can never block
or stream without end; a link to a file outside its own folder gets sizes only (no content
of it is shown); a manifest is never read through a link. Before reading a folder, an
interrupted commit in it (see :mod:`reduce.publish`) is completed under the folder's lock,
or reported as one finding if it cannot be; each payload is read with its manifest under
the lock taken shared, so no commit happens between the two reads.

Cost: gzip at level 9 is always measured exactly (it is the default budget measure and the
basis of the transfer estimate). Brotli at quality 11 runs at roughly half a megabyte per
second, so it is measured exactly for files up to :data:`BROTLI_AUTO_MAX_BYTES`, for every
file when asked (``brotli=True``), and for every file that a brotli budget or total covers;
otherwise it is reported as not measured. Both compressions release the GIL and run in
worker threads while the main thread parses the file.
"""

from __future__ import annotations

import hashlib
import html
import os
import re
import stat
import tomllib
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import h3
import numpy as np
import orjson
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.feather as pafeather
import pyarrow.ipc as paipc

from reduce.contract import ACCOUNTING_KEYS, COLUMNS_FORMAT, MANIFEST_FORMAT, MAX_SAFE_INTEGER
from reduce.errors import AuditError, ReduceError, did_you_mean
from reduce.publish import journals, reading, recover
from reduce.sizes import (
    BROTLI_AUTO_MAX,
    MEASURES,
    Measure,
    Sizes,
    brotli_bytes,
    format_size,
    gzip_bytes,
    parse_size,
)

__all__ = [
    "AUDIT_FORMAT",
    "BROTLI_AUTO_MAX_BYTES",
    "CANVAS_MAX_ELEMENTS",
    "COLUMNS_FORMAT",
    "MANIFEST_FORMAT",
    "MAX_SAFE_INTEGER",
    "PRECISION_DECIMALS",
    "SLOW_LINK_BITS_PER_SECOND",
    "SLOW_LINK_NAME",
    "SVG_MAX_ELEMENTS",
    "READ_MAX_BYTES",
    "AuditReport",
    "Budgets",
    "CommitCheck",
    "FieldCost",
    "FileAudit",
    "FileRule",
    "Verdict",
    "advice",
    "audit_paths",
    "load_budgets",
    "render_markdown",
    "render_table",
    "report_to_json",
    "transfer_seconds",
]

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

# Brotli quality 11 costs about 2 s per megabyte: measured exactly up to this size unless
# asked; the same limit as ``reduce run`` (one constant, in reduce.sizes).
BROTLI_AUTO_MAX_BYTES = BROTLI_AUTO_MAX

# The audit reads at most this many bytes of one file (a payload for a browser is far
# smaller; a larger file is refused rather than read into memory), and of one manifest.
READ_MAX_BYTES = 256 * 1024 * 1024
MANIFEST_MAX_BYTES = 16 * 1024 * 1024

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


# --------------------------------------------------------------------------------------------
# Budgets
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FileRule:
    """One ``[[file]]`` entry of a budgets file."""

    glob: str
    limit: int
    on: Measure
    source: str
    pattern: re.Pattern[str] = field(compare=False, repr=False)

    def matches(self, candidates: Iterable[str]) -> bool:
        return any(self.pattern.fullmatch(c) for c in candidates)


@dataclass(frozen=True, slots=True)
class Budgets:
    """A parsed budgets file: per-file rules (first match wins) and an optional total."""

    path: Path
    rules: tuple[FileRule, ...]
    total: tuple[int, Measure] | None

    def rule_for(self, path: Path, given: str) -> FileRule | None:
        folder = self.path.parent.resolve()
        candidates = [_posix(given)]
        try:
            candidates.insert(0, path.resolve().relative_to(folder).as_posix())
        except ValueError:
            pass
        for rule in self.rules:
            if rule.matches(candidates):
                return rule
        return None


_BUDGET_TOP_KEYS = ("file", "total")
_BUDGET_FILE_KEYS = ("glob", "max", "on")
_BUDGET_TOTAL_KEYS = ("max", "on")


def load_budgets(path: str | os.PathLike[str], *, default_on: Measure = "gzip") -> Budgets:
    """Read and validate a TOML budgets file; any mistake raises one-line ``AuditError``."""
    p = Path(path)
    where = str(path)
    try:
        text = p.read_bytes()
    except FileNotFoundError:
        raise AuditError(f"{where}: budgets file not found") from None
    except OSError as exc:
        raise AuditError(f"{where}: cannot read budgets file ({exc.strerror or exc})") from None
    try:
        doc = tomllib.loads(text.decode("utf-8"))
    except UnicodeDecodeError:
        raise AuditError(f"{where}: budgets file is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise AuditError(f"{where}: not valid TOML: {exc}") from None

    for key in doc:
        if key not in _BUDGET_TOP_KEYS:
            raise AuditError(
                f"{where}: unknown key '{key}'{did_you_mean(key, _BUDGET_TOP_KEYS)}; "
                "expected [[file]] entries and an optional [total]"
            )
    entries = doc.get("file", [])
    if not isinstance(entries, list) or not all(isinstance(e, dict) for e in entries):
        raise AuditError(f"{where}: 'file' must be an array of tables, written [[file]]")
    rules = []
    for number, entry in enumerate(entries, start=1):
        label = f"[[file]] #{number}"
        _check_keys(entry, _BUDGET_FILE_KEYS, f"{where}: {label}")
        for required in ("glob", "max"):
            if required not in entry:
                raise AuditError(f"{where}: {label}: key '{required}' is missing")
        glob = entry["glob"]
        if not isinstance(glob, str) or not glob.strip():
            raise AuditError(f"{where}: {label} key 'glob': expected a non-empty string")
        limit = _budget_size(entry["max"], f"{where}: {label} key 'max'")
        on = _budget_measure(entry.get("on", default_on), f"{where}: {label} key 'on'")
        rules.append(
            FileRule(
                glob=glob,
                limit=limit,
                on=on,
                source=f"{where} {label} glob '{glob}'",
                pattern=_glob_regex(glob),
            )
        )
    total = None
    if "total" in doc:
        table = doc["total"]
        if not isinstance(table, dict):
            raise AuditError(f"{where}: 'total' must be a table, written [total]")
        _check_keys(table, _BUDGET_TOTAL_KEYS, f"{where}: [total]")
        if "max" not in table:
            raise AuditError(f"{where}: [total]: key 'max' is missing")
        total = (
            _budget_size(table["max"], f"{where}: [total] key 'max'"),
            _budget_measure(table.get("on", default_on), f"{where}: [total] key 'on'"),
        )
    return Budgets(path=p, rules=tuple(rules), total=total)


def _check_keys(table: dict[str, Any], allowed: Sequence[str], where: str) -> None:
    for key in table:
        if key not in allowed:
            raise AuditError(
                f"{where}: unknown key '{key}'{did_you_mean(key, allowed)}; "
                f"allowed: {', '.join(allowed)}"
            )


def _budget_size(value: object, where: str) -> int:
    try:
        return parse_size(value)
    except ValueError as exc:
        raise AuditError(f"{where}: {exc}") from None


def _budget_measure(value: object, where: str) -> Measure:
    if isinstance(value, str) and value in MEASURES:
        return value
    hint = did_you_mean(value, MEASURES) if isinstance(value, str) else ""
    raise AuditError(f"{where}: {value!r} is not a measure{hint}; use raw, gzip or brotli")


def _glob_regex(glob: str) -> re.Pattern[str]:
    """Shell-style glob to a regex: ``*`` and ``?`` stay inside one folder, ``**`` crosses."""
    pattern = glob.removeprefix("./")
    out: list[str] = []
    i = 0
    while i < len(pattern):
        c = pattern[i]
        if c == "*":
            if pattern.startswith("**", i):
                i += 2
                if pattern.startswith("/", i):
                    i += 1
                    out.append("(?:.*/)?")
                else:
                    out.append(".*")
                continue
            out.append("[^/]*")
        elif c == "?":
            out.append("[^/]")
        elif c == "[":
            end = pattern.find("]", i + 2)
            if end == -1:
                out.append(re.escape(c))
            else:
                body = pattern[i + 1 : end]
                if body.startswith("!"):
                    body = "^" + body[1:]
                out.append("[" + body.replace("\\", "\\\\") + "]")
                i = end + 1
                continue
        else:
            out.append(re.escape(c))
        i += 1
    return re.compile("".join(out))


def _posix(given: str) -> str:
    text = Path(given).as_posix()
    return text.removeprefix("./")


# --------------------------------------------------------------------------------------------
# The audit
# --------------------------------------------------------------------------------------------


def audit_paths(
    paths: Sequence[str | os.PathLike[str]],
    *,
    budget: str | int | None = None,
    on: str = "gzip",
    budgets_file: str | os.PathLike[str] | None = None,
    total: str | int | None = None,
    brotli: bool = False,
) -> AuditReport:
    """Audit files and folders (walked recursively, sorted) and return the report.

    Precedence, one rule: the command line wins over the budgets file. ``budget`` applies
    to every file on ``on`` (the ``[[file]]`` rules are then not used); without it, a
    ``budgets_file`` (TOML) gives per-glob budgets, the first matching rule winning, and
    each of its globs must match at least one audited file. ``total`` (else the file's
    ``[total]``) caps the sum over all files. Bytes per field are given on the measure of
    the file's budget (see :func:`field_shares`). Brotli is measured for
    every file, however large, with ``brotli=True``, with ``on="brotli"`` and wherever a
    brotli budget or total applies; otherwise only for files up to ``BROTLI_AUTO_MAX_BYTES``.
    Folders are walked top-down: a folder's files in name order, then its subfolders in name
    order; hidden entries and ``*.manifest.json`` files are skipped.
    """
    measure = _budget_measure(on, "--on")
    limit = None if budget is None else _budget_size(budget, "--budget")
    budgets = None if budgets_file is None else load_budgets(budgets_file, default_on=measure)
    total_rule: tuple[int, Measure, str] | None = None
    if total is not None:
        total_rule = (_budget_size(total, "--total"), measure, "--total")
    elif budgets is not None and budgets.total is not None:
        total_rule = (*budgets.total, f"{budgets_file} [total]")

    files = _collect(paths)
    commits = _complete_commits(paths, files)
    if any(c.completed for c in commits):
        files = _collect(paths)  # a completed first commit adds a payload
    if budgets is not None:
        _check_globs_match(budgets, files)
    results = []
    with ThreadPoolExecutor(max_workers=2, thread_name_prefix="reduce-audit") as pool:
        for given, path in files:
            verdict_rule: tuple[int, Measure, str] | None = None
            rule = budgets.rule_for(path, given) if budgets is not None else None
            if limit is not None:  # the command line wins over the budgets file
                verdict_rule = (limit, measure, "--budget")
            elif rule is not None:
                verdict_rule = (rule.limit, rule.on, rule.source)
            needs_brotli = (
                brotli
                or measure == "brotli"
                or any(r is not None and r[1] == "brotli" for r in (verdict_rule, total_rule))
            )
            results.append(_audit_file(given, path, pool, needs_brotli, verdict_rule))

    total_verdict = None
    if total_rule is not None:
        t_limit, t_on, t_source = total_rule
        sizes = [f.size_on(t_on) for f in results]
        # Brotli was measured for every file when the total is on brotli (needs_brotli above).
        total_verdict = Verdict(
            limit=t_limit, on=t_on, size=sum(s or 0 for s in sizes), source=t_source
        )
    return AuditReport(files=tuple(results), on=measure, total=total_verdict,
                       commits=commits)


def _check_globs_match(budgets: Budgets, files: Sequence[tuple[str, Path]]) -> None:
    """A ``[[file]]`` glob matching none of the audited files is a mistake (a renamed folder,
    a typo) that would otherwise let every file pass unchecked."""
    for rule in budgets.rules:
        if not any(rule.matches(_candidates(budgets, path, given)) for given, path in files):
            n = len(files)
            raise AuditError(f"{rule.source} matches none of the {n:,} audited "
                             f"file{'s' if n != 1 else ''}; fix the glob (relative to the "
                             "budgets file's folder) or remove the rule")


def _candidates(budgets: Budgets, path: Path, given: str) -> list[str]:
    out = [_posix(given)]
    try:
        out.insert(0, path.resolve().relative_to(budgets.path.parent.resolve()).as_posix())
    except ValueError:
        pass
    return out


def _is_preview(path: Path) -> bool:
    """Whether ``x.png``/``x.html`` sits beside a payload ``x.<ext>`` that has a manifest
    (``x.<ext>.manifest.json``, or the older ``x.manifest.json``)."""
    import glob

    stem = glob.escape(path.stem)
    return (any(path.parent.glob(f"{stem}.*{MANIFEST_SUFFIX}"))
            or path.with_name(path.stem + MANIFEST_SUFFIX).is_file())


def _collect(paths: Sequence[str | os.PathLike[str]]) -> list[tuple[str, Path]]:
    """Expand folders (recursively, sorted, hidden entries skipped); drop manifests."""
    if not paths:
        raise AuditError("no PATH given; name at least one file or folder to audit")
    found: list[tuple[str, Path]] = []
    seen: set[Path] = set()

    def add(given: str, path: Path) -> None:
        if path.name.endswith(MANIFEST_SUFFIX):
            return  # checked beside its payload, never audited as a payload itself
        if path.suffix in _SIBLING_SUFFIXES and path.with_suffix("").is_file():
            return  # a pre-compressed copy (x.json.gz): checked beside its payload
        if path.suffix in (".png", ".html") and _is_preview(path):
            return  # a preview of payload x (x.png, x.html), not a file a page loads
        key = path.resolve()
        if key not in seen:
            seen.add(key)
            found.append((given, path))

    def walk_error(exc: OSError) -> None:
        raise AuditError(f"{exc.filename}: cannot read folder ({exc.strerror or exc})")

    for item in paths:
        given = os.fspath(item)
        path = Path(given)
        if path.is_dir():
            for folder, dirs, names in os.walk(path, onerror=walk_error):
                dirs[:] = sorted(d for d in dirs if not d.startswith("."))
                for name in sorted(names):
                    if not name.startswith("."):
                        add(os.path.normpath(os.path.join(folder, name)), Path(folder, name))
        elif path.exists():
            add(given, path)
        else:
            raise AuditError(f"{given}: no such file or folder")
    if not found:
        shown = ", ".join(os.fspath(p) for p in paths)
        raise AuditError(f"{shown}: no payload files to audit (manifests are not payloads)")
    return found


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


def _audit_file(
    given: str,
    path: Path,
    pool: ThreadPoolExecutor,
    force_brotli: bool,
    rule: tuple[int, Measure, str] | None,
) -> FileAudit:
    with reading(path.parent):  # no commit between reading the payload and its manifest
        data = _read(path, given)
        manifest = _read_manifest(path)
    gz: Future[bytes] = pool.submit(gzip_bytes, data)
    br: Future[bytes] | None = None
    if force_brotli or len(data) <= BROTLI_AUTO_MAX_BYTES:
        br = pool.submit(brotli_bytes, data)

    out = _Findings()
    suffix = path.suffix.lower()
    if _links_outside(path):
        out.notes.append("a link to a file outside its folder: sizes only (its content is "
                         "not shown)")
    elif suffix in _JSON_SUFFIXES:
        _analyse_json(data, suffix, out)
    elif suffix in _CSV_SUFFIXES:
        _analyse_csv(data, out)
    elif suffix in _ARROW_SUFFIXES:
        _analyse_arrow(data, out)
    else:
        out.notes.append("not a recognised layout: sizes only")

    gzip_size = len(gz.result())
    brotli_size = None if br is None else len(br.result())
    if brotli_size is None:
        out.notes.append(
            f"brotli not measured (file over {format_size(BROTLI_AUTO_MAX_BYTES)}; use --brotli)"
        )
    _check_manifest(path, data, out, gzip_size, brotli_size, manifest)
    _check_siblings(path, data, out, manifest[1])

    verdict = None
    if rule is not None:
        limit, on, source = rule
        size = {"raw": len(data), "gzip": gzip_size, "brotli": brotli_size}[on]
        assert size is not None  # brotli is measured whenever a brotli rule applies
        verdict = Verdict(limit=limit, on=on, size=size, source=source)

    fields = tuple(sorted(out.fields, key=lambda f: (-f.bytes, f.name)))
    share_on: Measure = rule[1] if rule is not None else "gzip"
    shares = field_shares(data, out.kind, share_on, [f.name for f in fields])
    if shares is not None:
        fields = tuple(sorted((replace(f, on=share_on, share=shares.get(f.name))
                               for f in fields),
                              key=lambda f: (-(f.share or 0), -f.bytes, f.name)))
    return FileAudit(
        path=given,
        kind=out.kind,
        raw=len(data),
        gzip=gzip_size,
        brotli=brotli_size,
        rows=out.rows,
        elements=out.elements,
        element_kind=out.element_kind,
        fields=fields,
        problems=tuple(out.problems),
        notes=tuple(out.notes),
        budget=verdict,
    )


# Field shares are measured by compressing the file once per field: up to this size.
FIELD_SHARE_MAX_BYTES = BROTLI_AUTO_MAX


def field_shares(data: bytes, kind: str, on: Measure,
                 names: Sequence[str]) -> dict[str, int] | None:
    """The bytes on ``on`` (gzip level 9, brotli quality 11, or raw) each field adds to the
    file: the size of the file re-encoded whole minus its size re-encoded without that
    field (columns payloads: the column, or its dictionary for ``name (dictionary)``; row
    JSON and CSV: the key or column; GeoJSON: the property). Compression works on repeats
    across fields, so shares need not add up to the file's size; they say which field to
    trim first. ``None`` for other layouts and files over ``FIELD_SHARE_MAX_BYTES``."""
    if len(data) > FIELD_SHARE_MAX_BYTES or kind not in ("columns", "rows", "geojson", "csv"):
        return None
    sizers: dict[str, Callable[[bytes], int]] = {
        "raw": len, "gzip": lambda b: len(gzip_bytes(b)),
        "brotli": lambda b: len(brotli_bytes(b))}
    size = sizers[on]
    try:
        if kind == "csv":
            import csv
            import io

            table = list(csv.reader(io.StringIO(data.decode("utf-8", "replace"))))
            if not table:
                return None

            def without(name: str | None) -> bytes:
                keep = [i for i, h in enumerate(table[0]) if h != name]
                buf = io.StringIO()
                csv.writer(buf, lineterminator="\n").writerows([[r[i] for i in keep if i < len(r)]
                                                                 for r in table])
                return buf.getvalue().encode()
        else:
            doc = orjson.loads(data)

            def without(name: str | None) -> bytes:
                return orjson.dumps(_drop_field(doc, kind, name))
    except (ValueError, UnicodeError):
        return None
    whole = size(without(None))
    return {n: max(0, whole - size(without(n))) for n in names}


def _drop_field(doc: Any, kind: str, name: str | None) -> Any:
    if name is None:
        return doc
    if kind == "columns" and isinstance(doc, dict):
        dicts = doc.get("dictionaries")
        if name.endswith(" (dictionary)") and isinstance(dicts, dict):
            base = name.removesuffix(" (dictionary)")
            return {**doc, "dictionaries": {k: v for k, v in dicts.items() if k != base}}
        cols = doc.get("columns")
        if isinstance(cols, dict):
            return {**doc, "columns": {k: v for k, v in cols.items() if k != name}}
        return doc
    if kind == "rows" and isinstance(doc, list):
        return [{k: v for k, v in r.items() if k != name} if isinstance(r, dict) else r
                for r in doc]
    if kind == "geojson" and isinstance(doc, dict) and isinstance(doc.get("features"), list):
        def feature(f: Any) -> Any:
            if not isinstance(f, dict):
                return f
            if name in ("geometry", "id") and name in f:
                return {k: v for k, v in f.items() if k != name}
            prop = name.removeprefix("properties.")  # a property named like a member
            props = f.get("properties")
            if isinstance(props, dict):
                return {**f, "properties": {k: v for k, v in props.items() if k != prop}}
            return f
        return {**doc, "features": [feature(f) for f in doc["features"]]}
    return doc


def _read(path: Path, given: str, *, cap: int | None = None) -> bytes:
    """The bytes of a regular file (or of a link to one), at most ``cap`` (default
    :data:`READ_MAX_BYTES`) of them. A FIFO, device, socket or folder is refused without
    opening it for reading in a way that could block (``O_NONBLOCK``), so the audit never
    hangs on a pipe or reads an endless device."""
    limit = READ_MAX_BYTES if cap is None else cap
    try:
        before = os.stat(path)
        if not stat.S_ISREG(before.st_mode):
            raise AuditError(f"{given}: not a regular file ({_file_kind(before.st_mode)}); the "
                             "audit reads only regular files and links to them")
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | os.O_CLOEXEC)
        try:
            st = os.fstat(fd)
            if not stat.S_ISREG(st.st_mode) or (st.st_dev, st.st_ino) != (before.st_dev,
                                                                          before.st_ino):
                raise AuditError(f"{given}: changed while being opened; audit it again")
            if st.st_size > limit:
                raise AuditError(f"{given}: {st.st_size:,} bytes, over the audit's limit of "
                                 f"{limit:,} bytes per file; is it a payload?")
            chunks = []
            left = limit + 1
            while left > 0:
                chunk = os.read(fd, min(left, 1 << 20))
                if not chunk:
                    break
                chunks.append(chunk)
                left -= len(chunk)
            data = b"".join(chunks)
            if len(data) > limit:
                raise AuditError(f"{given}: grew over the audit's limit of {limit:,} bytes "
                                 "while being read")
            return data
        finally:
            os.close(fd)
    except FileNotFoundError:
        raise AuditError(f"{given}: no such file or folder") from None
    except OSError as exc:
        raise AuditError(f"{given}: cannot read ({exc.strerror or exc})") from None


def _file_kind(mode: int) -> str:
    for test, name in ((stat.S_ISFIFO, "a FIFO"), (stat.S_ISCHR, "a character device"),
                       (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket"),
                       (stat.S_ISDIR, "a folder")):
        if test(mode):
            return name
    return "not a plain file"


def _links_outside(path: Path) -> bool:
    """Whether ``path`` is a link whose target lies outside the link's own folder."""
    if not path.is_symlink():
        return False
    try:
        path.resolve().relative_to(path.parent.resolve())
        return False
    except (ValueError, OSError):
        return True


def _read_manifest(path: Path) -> tuple[Path, bytes | None, str | None]:
    """The manifest beside ``path``: (its path, its bytes or None if absent, a problem).
    Manifests are regular files written by reduce: a link is reported, never followed."""
    man = _manifest_of(path)
    try:
        st = os.lstat(man)
    except FileNotFoundError:
        return man, None, None
    except OSError as exc:
        return man, None, f"manifest {man.name}: cannot read ({exc.strerror or exc})"
    if not stat.S_ISREG(st.st_mode):
        kind = "a link" if stat.S_ISLNK(st.st_mode) else _file_kind(st.st_mode)
        return man, None, (f"manifest {man.name}: is {kind}, not a regular file; reduce "
                           "writes manifests as regular files")
    try:
        return man, _read(man, str(man), cap=MANIFEST_MAX_BYTES), None
    except AuditError as exc:
        return man, None, f"manifest {man.name}: {exc.message.split(': ', 1)[-1]}"


def _complete_commits(paths: Sequence[str | os.PathLike[str]],
                      files: list[tuple[str, Path]]) -> tuple[CommitCheck, ...]:
    """Complete the interrupted commits (see reduce.publish) in the audited folders, under
    each folder's lock; one that cannot be completed (a refused journal, a folder that is not
    writable, a lock held too long) is reported, never guessed at."""
    folders = {p.parent for _, p in files}
    folders |= {Path(os.fspath(p)) for p in paths if Path(os.fspath(p)).is_dir()}
    out: list[CommitCheck] = []
    for folder in sorted(folders):
        found = journals(folder)
        if not found:
            continue
        try:
            done = {p.name for p in recover(folder)}
        except (ReduceError, OSError) as exc:
            why = exc.message if isinstance(exc, ReduceError) else (exc.strerror or str(exc))
            for j in found:
                out.append(CommitCheck(str(j), False, "interrupted commit, not completed: "
                                                      f"{why}"))
            continue
        for j in found:
            name = j.name[1:].removesuffix(".reduce-commit")
            if name in done:
                out.append(CommitCheck(str(j), True, f"completed an interrupted commit of "
                                                     f"{name} before auditing"))
    return tuple(out)


# --------------------------------------------------------------------------------------------
# JSON
# --------------------------------------------------------------------------------------------


def _parse_json(data: bytes) -> tuple[Any, str | None]:
    """``(document, None)`` or ``(None, message)`` naming the line, column and byte offset."""
    try:
        return orjson.loads(data), None
    except orjson.JSONDecodeError as exc:
        # orjson counts characters; convert to a byte offset for the report.
        text = data.decode("utf-8", errors="replace")
        pos = min(exc.pos, len(text))
        byte = len(text[:pos].encode("utf-8", errors="replace"))
        what = exc.msg
        if data.startswith(b"NaN", byte):
            what = "NaN is not a JSON value"
        elif data.startswith(b"Infinity", byte) or data.startswith(b"-Infinity", byte):
            if data[byte : byte + 1] != b"-" and byte > 0 and data[byte - 1 : byte] == b"-":
                byte -= 1  # orjson points past the sign of -Infinity
            token = "-Infinity" if data[byte : byte + 1] == b"-" else "Infinity"
            what = f"{token} is not a JSON value"
        return None, f"not valid JSON (RFC 8259): {what} at {_position(data, byte)}"


def _position(data: bytes, byte: int) -> str:
    """``line L column C (byte B)``; the column counts characters, as editors do."""
    line_start = data.rfind(b"\n", 0, byte) + 1
    line = data.count(b"\n", 0, byte) + 1
    column = len(data[line_start:byte].decode("utf-8", errors="replace")) + 1
    return f"line {line} column {column} (byte {byte})"


def _analyse_json(data: bytes, suffix: str, out: _Findings) -> None:
    out.kind = "json"
    doc, error = _parse_json(data)
    if error is not None:
        out.problems.append(error)
        return
    if isinstance(doc, dict) and doc.get("format") == COLUMNS_FORMAT:
        out.kind = "columns"
        _analyse_columns(doc, out)
    elif isinstance(doc, dict) and doc.get("type") == "FeatureCollection":
        out.kind = "geojson"
        _analyse_geojson(doc, out)
    elif isinstance(doc, list) and all(type(row) is dict for row in doc):
        out.kind = "rows"
        _analyse_rows(doc, out)
    else:
        if isinstance(doc, dict) and isinstance(doc.get("format"), str):
            out.notes.append(f"format '{doc['format']}' is not a layout this audit knows")
        elif suffix == ".geojson":
            out.notes.append("not a GeoJSON FeatureCollection")
        out.notes.append("JSON of another layout: sizes and safe-integer check only")
        _check_tree_integers(doc, "document", out)
    if out.suspect_big_floats:
        _check_integer_literals(data, out)


def _type_name(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, int):
        return "integer"
    if isinstance(value, float):
        return "number"
    if isinstance(value, str):
        return "string"
    if isinstance(value, list):
        return "array"
    return "object"


def _show(value: Any, limit: int = 40) -> str:
    text = orjson.dumps(value).decode() if not isinstance(value, int) else str(value)
    return text if len(text) <= limit else text[: limit - 1] + "…"


@dataclass(slots=True)
class _Scan:
    """Numbers of one column: unsafe integers (count and first) and too-precise floats."""

    unsafe: int = 0
    first_unsafe: tuple[int, int] | None = None
    too_precise: int = 0
    big_integral_floats: int = 0


def _count_too_precise(values: np.ndarray) -> int:
    """Finite floats whose shortest decimal form has more than six decimals.

    ``round(x, 6) != x`` decides it exactly (Python rounds on the exact decimal value). Below
    1e6 in magnitude the vectorised ``rint(x * 1e6) / 1e6`` gives the same answer: the product
    errs by far less than half a unit and the division rounds correctly.
    """
    a = np.asarray(values, dtype=np.float64)
    a = a[np.isfinite(a)]
    small = np.abs(a) < 1e6
    count = int(np.count_nonzero(np.round(a[small], PRECISION_DECIMALS) != a[small]))
    for v in a[~small].tolist():
        if round(v, PRECISION_DECIMALS) != v:
            count += 1
    return count


def _scan(values: list[Any]) -> _Scan:
    scan = _Scan()
    types = set(map(type, values))
    if types <= {int}:
        if values and (min(values) < -MAX_SAFE_INTEGER or max(values) > MAX_SAFE_INTEGER):
            _scan_ints(values, scan)
        return scan
    if types <= {int, float}:
        floats = [v for v in values if type(v) is float] if int in types else values
        arr = np.asarray(floats, dtype=np.float64)
        scan.too_precise = _count_too_precise(arr)
        big = np.abs(arr) > MAX_SAFE_INTEGER
        if big.any():
            scan.big_integral_floats = int(np.count_nonzero(big & (arr == np.floor(arr))))
        if int in types:
            ints = [v for v in values if type(v) is int]
            if min(ints) < -MAX_SAFE_INTEGER or max(ints) > MAX_SAFE_INTEGER:
                _scan_ints(values, scan)
        return scan
    floats_seen: list[float] = []
    for index, value in enumerate(values):
        kind = type(value)
        if kind is int:
            _note_int(value, index, scan)
        elif kind is float:
            floats_seen.append(value)
        elif kind is list or kind is dict:
            for number in _numbers(value):
                if type(number) is int:
                    _note_int(number, index, scan)
                else:
                    floats_seen.append(number)
    if floats_seen:
        arr = np.asarray(floats_seen, dtype=np.float64)
        scan.too_precise = _count_too_precise(arr)
        big = np.abs(arr) > MAX_SAFE_INTEGER
        scan.big_integral_floats = int(np.count_nonzero(big & (arr == np.floor(arr))))
    return scan


def _scan_ints(values: list[Any], scan: _Scan) -> None:
    for index, value in enumerate(values):
        if type(value) is int:
            _note_int(value, index, scan)


def _note_int(value: int, index: int, scan: _Scan) -> None:
    if value > MAX_SAFE_INTEGER or value < -MAX_SAFE_INTEGER:
        scan.unsafe += 1
        if scan.first_unsafe is None:
            scan.first_unsafe = (index, value)


def _numbers(value: Any) -> Iterator[int | float]:
    """Every int and float nested inside lists and objects (booleans excluded)."""
    stack = [value]
    while stack:
        item = stack.pop()
        kind = type(item)
        if kind is int or kind is float:
            yield item
        elif kind is list:
            stack.extend(reversed(item))
        elif kind is dict:
            stack.extend(reversed(list(item.values())))


def _unsafe_message(where: str, scan: _Scan, index_word: str = "row") -> str:
    assert scan.first_unsafe is not None
    index, value = scan.first_unsafe
    more = f" ({scan.unsafe:,} such values)" if scan.unsafe > 1 else ""
    return (
        f"{where}: integer {value} at {index_word} {index} is outside the JavaScript safe "
        f"range ±(2^53-1){more}"
    )


def _check_tree_integers(value: Any, where: str, out: _Findings) -> None:
    """Unsafe integers anywhere in ``value`` (reported once, with a count)."""
    scan = _scan([value])
    if scan.unsafe:
        assert scan.first_unsafe is not None
        more = f" ({scan.unsafe:,} such values)" if scan.unsafe > 1 else ""
        out.problems.append(
            f"{where}: integer {scan.first_unsafe[1]} is outside the JavaScript safe range "
            f"±(2^53-1){more}"
        )
    if scan.big_integral_floats:
        out.suspect_big_floats = True


def _check_integer_literals(data: bytes, out: _Findings) -> None:
    """Integers too long even for 64 bits parse as floats: find them in the text itself."""
    token = re.compile(rb'"(?:[^"\\]|\\.)*"|-?\d+(?:\.\d+)?(?:[eE][+-]?\d+)?')
    for match in token.finditer(data):
        text = match.group()
        if text[:1] == b'"' or b"." in text or b"e" in text or b"E" in text:
            continue
        value = int(text)
        if -(2**63) <= value < 2**64:
            continue  # parsed as an integer, so the column scan has reported it already
        out.problems.append(
            f"integer literal {_show(value)} at {_position(data, match.start())} is "
            "outside the JavaScript safe range ±(2^53-1)"
        )
        return


def _element_kind(columns: dict[str, list[Any]]) -> str:
    """``cells`` with a hex column, ``points`` with lat/lon columns, else ``rows``."""
    names = {name.lower() for name in columns}
    for name, values in columns.items():
        # An empty payload still names its hex column; its (absent) values cannot say so.
        if _is_h3_strings(values) or (not values and name.lower() in _HEX_NAMES):
            return "cells"
    if names & _LAT_NAMES and names & _LON_NAMES:
        return "points"
    return "rows"


def _is_h3_strings(values: Sequence[Any]) -> bool:
    """All non-null values are H3 cells as 15-character lowercase hex strings (and some are)."""
    if not values or type(values[0]) not in (str, type(None)):
        return False
    try:
        unique = set(values)
    except TypeError:
        return False
    unique.discard(None)
    if not unique or not all(type(v) is str and _H3_CELL_RE.fullmatch(v) for v in unique):
        return False
    return all(h3.is_valid_cell(v) for v in sorted(unique)[:64])


def _analyse_columns(doc: dict[str, Any], out: _Findings) -> None:
    expected = {
        "recipe": str,
        "level": dict,
        "rows": int,
        "columns": dict,
        "accounting": dict,
    }
    for key, kind in expected.items():
        if key not in doc:
            out.problems.append(f"key '{key}' is missing")
        elif type(doc[key]) is not kind:
            want = {str: "string", dict: "object", int: "integer"}[kind]
            out.problems.append(
                f"key '{key}': expected {want}, got {_type_name(doc[key])} {_show(doc[key])}"
            )
    rows = doc.get("rows")
    if type(rows) is int and rows < 0:
        out.problems.append(f"key 'rows': expected a non-negative integer, got {rows}")
    rows_ok = type(rows) is int and rows >= 0
    if rows_ok:
        out.rows = out.elements = rows

    raw_columns = doc.get("columns")
    columns: dict[str, Any] = raw_columns if isinstance(raw_columns, dict) else {}
    dictionaries = doc.get("dictionaries", {})
    if not isinstance(dictionaries, dict):
        out.problems.append(f"key 'dictionaries': expected object, got {_type_name(dictionaries)}")
        dictionaries = {}

    arrays: dict[str, list[Any]] = {}
    for name, values in columns.items():
        if not isinstance(values, list):
            out.problems.append(f"column '{name}': expected an array, got {_type_name(values)}")
            continue
        arrays[name] = values
        if rows_ok and len(values) != rows:
            out.problems.append(
                f"column '{name}' has {len(values):,} values, expected rows = {rows:,}"
            )
        scan = _scan(values)
        if scan.unsafe:
            out.problems.append(_unsafe_message(f"column '{name}'", scan))
        if scan.big_integral_floats:
            out.suspect_big_floats = True
        out.fields.append(FieldCost(name, len(orjson.dumps(values)), scan.too_precise))

    labels_by_column: dict[str, list[Any]] = {}
    for name, labels in dictionaries.items():
        if not isinstance(labels, list):
            out.problems.append(
                f"dictionary '{name}': expected an array of labels, got {_type_name(labels)}"
            )
            continue
        out.fields.append(FieldCost(f"{name} (dictionary)", len(orjson.dumps(labels))))
        _check_tree_integers(labels, f"dictionary '{name}'", out)
        if name not in columns:
            out.problems.append(f"dictionary '{name}': no column of that name")
        elif name in arrays:
            labels_by_column[name] = labels
            _check_indexes(name, arrays[name], len(labels), out)

    for key, value in doc.items():
        if key not in ("columns", "dictionaries"):
            _check_tree_integers(value, f"key '{key}'", out)

    if isinstance(doc.get("accounting"), dict):
        _check_accounting(doc["accounting"], out)

    decoded = {name: labels_by_column.get(name, values) for name, values in arrays.items()}
    out.element_kind = _element_kind(decoded) if rows_ok else None
    if not rows_ok:
        out.elements = None


def _check_indexes(name: str, values: list[Any], size: int, out: _Findings) -> None:
    """Dictionary indexes are integers in ``0..size-1``; null stands for a missing value."""
    types = set(map(type, values))
    if types <= {int} and (not values or (min(values) >= 0 and max(values) < size)):
        return
    wrong_type = out_of_range = 0
    first_type: tuple[int, Any] | None = None
    first_range: tuple[int, int] | None = None
    for index, value in enumerate(values):
        if value is None:
            continue
        if type(value) is not int:
            wrong_type += 1
            if first_type is None:
                first_type = (index, value)
        elif not 0 <= value < size:
            out_of_range += 1
            if first_range is None:
                first_range = (index, value)
    if first_type is not None:
        more = f" ({wrong_type:,} such values)" if wrong_type > 1 else ""
        out.problems.append(
            f"column '{name}': value {_show(first_type[1])} at row {first_type[0]} is not an "
            f"integer index into its dictionary{more}"
        )
    if first_range is not None:
        more = f" ({out_of_range:,} such values)" if out_of_range > 1 else ""
        valid = f"0..{size - 1}" if size else "none"
        out.problems.append(
            f"column '{name}': index {first_range[1]} at row {first_range[0]} is outside its "
            f"dictionary of {size:,} labels (valid {valid}){more}"
        )


def _check_accounting(accounting: dict[str, Any], out: _Findings) -> None:
    keys = list(_ACCOUNTING_KEYS)
    if "unassigned_rows" in accounting:
        keys.append("unassigned_rows")
    values: dict[str, int] = {}
    for key in keys:
        if key not in accounting:
            out.problems.append(f"accounting: key '{key}' is missing")
            continue
        value = accounting[key]
        if type(value) is not int or value < 0:
            out.problems.append(
                f"accounting: key '{key}': expected a non-negative integer, got {_show(value)}"
            )
            continue
        values[key] = value
    if len(values) != len(keys):
        return
    right = keys[1:]
    total = sum(values[k] for k in right)
    if values["input_rows"] != total:
        terms = " + ".join(f"{k} {values[k]:,}" for k in right)
        out.problems.append(
            f"accounting: input_rows {values['input_rows']:,} != {terms} (= {total:,})"
        )


def _bucket_cost(key: str, values: list[Any]) -> int:
    """Bytes of ``"key":value`` over all values, as a row-oriented encoding writes them."""
    if not values:
        return 0
    key_cost = len(orjson.dumps(key)) + 1  # quoted key and the colon
    array = len(orjson.dumps(values))  # "[v1,v2,...]": values plus brackets and commas
    return len(values) * key_cost + array - 2 - (len(values) - 1)


def _buckets(rows: list[dict[str, Any]]) -> dict[str, list[Any]]:
    buckets: dict[str, list[Any]] = {}
    for row in rows:
        for key, value in row.items():
            bucket = buckets.get(key)
            if bucket is None:
                buckets[key] = [value]
            else:
                bucket.append(value)
    return buckets


def _row_of(rows: list[dict[str, Any]], key: str, nth: int) -> int:
    """Index of the row holding the ``nth`` occurrence of ``key``."""
    seen = -1
    for index, row in enumerate(rows):
        if key in row:
            seen += 1
            if seen == nth:
                return index
    return nth


def _analyse_properties(
    rows: list[dict[str, Any]], out: _Findings, where: str, index_word: str
) -> dict[str, list[Any]]:
    buckets = _buckets(rows)
    for key, values in buckets.items():
        scan = _scan(values)
        if scan.unsafe:
            assert scan.first_unsafe is not None
            row = _row_of(rows, key, scan.first_unsafe[0])
            scan.first_unsafe = (row, scan.first_unsafe[1])
            out.problems.append(_unsafe_message(f"{where} '{key}'", scan, index_word))
        if scan.big_integral_floats:
            out.suspect_big_floats = True
        out.fields.append(FieldCost(key, _bucket_cost(key, values), scan.too_precise))
    return buckets


def _analyse_rows(rows: list[dict[str, Any]], out: _Findings) -> None:
    out.rows = out.elements = len(rows)
    buckets = _analyse_properties(rows, out, "key", "row")
    out.element_kind = _element_kind(buckets)
    out.notes.append('bytes per field count "key":value in compact JSON over all rows')


def _analyse_geojson(doc: dict[str, Any], out: _Findings) -> None:
    features = doc.get("features")
    if not isinstance(features, list):
        out.problems.append(f"key 'features': expected an array, got {_type_name(features)}")
        return
    out.rows = out.elements = len(features)
    out.element_kind = "features"
    geometries: list[Any] = []
    properties: list[dict[str, Any]] = []
    ids: list[Any] = []
    for index, feature in enumerate(features):
        if not isinstance(feature, dict) or feature.get("type") != "Feature":
            out.problems.append(
                f'feature {index}: expected an object with "type": "Feature", got {_show(feature)}'
            )
            return
        if "geometry" in feature:
            geometries.append(feature["geometry"])
        props = feature.get("properties")
        properties.append(props if isinstance(props, dict) else {})  # aligned with features
        if "id" in feature:
            ids.append(feature["id"])
    buckets = _analyse_properties(properties, out, "property", "feature")
    reserved = {"geometry", "id"} & set(buckets)
    if reserved:
        out.fields = [
            FieldCost(f"properties.{f.name}", f.bytes, f.too_precise) if f.name in reserved else f
            for f in out.fields
        ]
    if ids:
        out.fields.append(FieldCost("id", _bucket_cost("id", ids), _scan(ids).too_precise))
    coordinates = _coordinates(geometries)
    out.fields.append(
        FieldCost(
            "geometry",
            _bucket_cost("geometry", geometries),
            _count_too_precise(np.asarray(coordinates, dtype=np.float64)),
        )
    )
    out.notes.append(
        'bytes per field count "key":value in compact JSON over all features; geometry is one entry'
    )


def _coordinates(geometries: list[Any]) -> list[float]:
    """All coordinate numbers of GeoJSON geometries (collections included)."""
    numbers: list[float] = []
    stack: list[Any] = []
    for geometry in geometries:
        if isinstance(geometry, dict):
            stack.append(geometry)
    while stack:
        item = stack.pop()
        if isinstance(item, dict):
            if "geometries" in item and isinstance(item["geometries"], list):
                stack.extend(item["geometries"])
            if "coordinates" in item:
                stack.append(item["coordinates"])
        elif isinstance(item, list):
            if item and type(item[0]) in (int, float):
                numbers.extend(v for v in item if type(v) in (int, float))
            else:
                stack.extend(item)
    return numbers


# --------------------------------------------------------------------------------------------
# CSV and Arrow
# --------------------------------------------------------------------------------------------


def _analyse_csv(data: bytes, out: _Findings) -> None:
    out.kind = "csv"
    try:
        names = pacsv.open_csv(pa.BufferReader(data)).schema.names
        table = pacsv.read_csv(
            pa.BufferReader(data),
            convert_options=pacsv.ConvertOptions(column_types={n: pa.string() for n in names}),
        )
    except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
        out.problems.append(f"not readable as CSV: {str(exc).splitlines()[0]}")
        return
    out.rows = out.elements = table.num_rows
    hex_found = False
    for name, column in zip(table.column_names, table.columns):
        nbytes = pc.sum(pc.binary_length(column)).as_py() or 0
        parts = pc.extract_regex(column, _DECIMAL_TEXT_RE)
        frac = pc.utf8_length(pc.struct_field(parts, "frac"))
        exp_text = pc.struct_field(parts, "exp")
        exponent = pc.cast(pc.if_else(pc.equal(exp_text, ""), "0", exp_text), pa.int64())
        decimals = pc.subtract(pc.cast(frac, pa.int64()), exponent)
        too_precise = pc.sum(pc.greater(decimals, PRECISION_DECIMALS).cast(pa.int64())).as_py()
        out.fields.append(FieldCost(name, int(nbytes), int(too_precise or 0)))
        if not hex_found and table.num_rows:
            hex_found = _is_h3_strings(pc.unique(column).to_pylist())
    out.element_kind = _arrow_element_kind(table.column_names, hex_found, table.num_rows)
    out.notes.append("bytes per column count the field values as written (no quotes, commas)")


def _read_arrow(data: bytes) -> pa.Table:
    errors = []
    readers: tuple[Callable[[], pa.Table], ...] = (
        lambda: paipc.open_file(pa.BufferReader(data)).read_all(),
        lambda: paipc.open_stream(pa.BufferReader(data)).read_all(),
        lambda: pafeather.read_table(pa.BufferReader(data)),
    )
    for reader in readers:
        try:
            return reader()
        except (pa.ArrowException, OSError, ValueError) as exc:
            errors.append(str(exc).splitlines()[0] if str(exc) else type(exc).__name__)
    raise ValueError(errors[0])


def _analyse_arrow(data: bytes, out: _Findings) -> None:
    out.kind = "arrow"
    try:
        table = _read_arrow(data)
    except ValueError as exc:
        out.problems.append(f"not readable as Arrow IPC (file or stream format): {exc}")
        return
    out.rows = out.elements = table.num_rows
    hex_found = False
    for name, column in zip(table.column_names, table.columns):
        kind = column.type
        too_precise = 0
        if pa.types.is_floating(kind):
            values = pc.drop_null(column).to_numpy().astype(np.float64)
            too_precise = _count_too_precise(values)
        if not hex_found and table.num_rows:
            hex_found = _is_h3_arrow(column)
        out.fields.append(FieldCost(name, int(column.nbytes), too_precise))
    out.element_kind = _arrow_element_kind(table.column_names, hex_found, table.num_rows)
    out.notes.append("bytes per column are the Arrow buffers in memory (before any compression)")


def _is_h3_arrow(column: pa.ChunkedArray) -> bool:
    kind = column.type
    if pa.types.is_dictionary(kind):
        column = column.cast(kind.value_type)
        kind = kind.value_type
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        return _is_h3_strings(pc.unique(pc.drop_null(column)).to_pylist())
    if pa.types.is_integer(kind) and kind.bit_width == 64:
        ints = pc.drop_null(column).to_numpy().astype(np.uint64)
        # Mode 1 (cell) sits in bits 59-62 with the reserved top bit clear.
        if ints.size == 0 or not bool(np.all((ints >> np.uint64(59)) == 1)):
            return False
        return all(h3.is_valid_cell(h3.int_to_str(int(v))) for v in np.unique(ints)[:64])
    return False


def _arrow_element_kind(names: Sequence[str], hex_found: bool, rows: int) -> str:
    lowered = {n.lower() for n in names}
    if hex_found or (rows == 0 and lowered & _HEX_NAMES):
        return "cells"
    if lowered & _LAT_NAMES and lowered & _LON_NAMES:
        return "points"
    return "rows"


# --------------------------------------------------------------------------------------------
# Manifest
# --------------------------------------------------------------------------------------------


def _manifest_of(path: Path) -> Path:
    """The manifest beside a payload: ``x.json.manifest.json`` (see reduce.publish); a
    manifest of the older name ``x.manifest.json`` is read when only that one exists."""
    current = path.with_name(path.name + MANIFEST_SUFFIX)
    legacy = path.with_name(path.stem + MANIFEST_SUFFIX)
    if not current.exists() and legacy.exists():
        return legacy
    return current


def _check_manifest(
    path: Path,
    data: bytes,
    out: _Findings,
    gzip_size: int,
    brotli_size: int | None,
    read: tuple[Path, bytes | None, str | None],
) -> None:
    manifest_path, manifest_bytes, problem = read
    name = manifest_path.name
    if problem is not None:
        out.problems.append(problem)
        return
    if manifest_bytes is None:
        if out.kind == "columns":
            out.notes.append(f"no manifest beside it ({name}): checksum and sizes not checked")
        return
    manifest, error = _parse_json(manifest_bytes)
    where = f"manifest {name}"
    if error is not None:
        out.problems.append(f"{where}: {error}")
        return
    if not isinstance(manifest, dict):
        out.problems.append(f"{where}: expected a JSON object, got {_type_name(manifest)}")
        return
    claimed_payload = manifest.get("payload")
    if out.kind != "columns" and isinstance(claimed_payload, str) and claimed_payload != path.name:
        return  # the manifest of a sibling with the same stem (x.json beside x.csv)
    if manifest.get("format") != MANIFEST_FORMAT:
        out.problems.append(
            f"{where} key 'format': {_show(manifest.get('format'))}, expected \"{MANIFEST_FORMAT}\""
        )
    if manifest.get("payload") != path.name:
        out.problems.append(
            f"{where} key 'payload': {_show(manifest.get('payload'))}, expected \"{path.name}\""
        )
    digest = hashlib.sha256(data).hexdigest()
    claimed = manifest.get("sha256")
    if claimed != digest:
        shown = _show(claimed[:16] + "…") if isinstance(claimed, str) else _show(claimed)
        out.problems.append(
            f"{where} key 'sha256': {shown} does not match the payload's sha256 \"{digest[:16]}…\""
        )
    sizes = manifest.get("bytes")
    if not isinstance(sizes, dict):
        out.problems.append(f"{where} key 'bytes': expected an object with raw, gzip, brotli")
    else:
        measured = {"raw": len(data), "gzip": gzip_size, "brotli": brotli_size}
        for measure in MEASURES:
            value = measured[measure]
            if measure not in sizes:
                out.problems.append(f"{where} key 'bytes.{measure}' is missing")
            elif value is None:
                out.notes.append(f"{where}: bytes.brotli not verified (brotli not measured)")
            elif sizes[measure] != value:
                out.problems.append(
                    f"{where} key 'bytes.{measure}': {_show(sizes[measure])}, "
                    f"but the file measures {value}"
                )
    if "rows" in manifest and out.rows is not None and manifest["rows"] != out.rows:
        out.problems.append(
            f"{where} key 'rows': {_show(manifest['rows'])}, but the payload has {out.rows} rows"
        )


_SIBLING_SUFFIXES = {".gz": "gzip", ".br": "brotli"}


def _check_siblings(path: Path, data: bytes, out: _Findings,
                    manifest_bytes: bytes | None) -> None:
    """Pre-compressed copies beside a payload (x.json.gz, x.json.br) must decompress to it
    (Python's gzip and brotli modules), and their lengths must be the manifest's sizes."""
    import contextlib
    import gzip
    import zlib

    import brotli

    manifest: Any = None
    with contextlib.suppress(ValueError, TypeError):
        manifest = orjson.loads(manifest_bytes) if manifest_bytes is not None else None
    sizes = manifest.get("bytes") if isinstance(manifest, dict) else None
    listed = manifest.get("precompressed") if isinstance(manifest, dict) else None
    for suffix, measure in _SIBLING_SUFFIXES.items():
        sib = path.with_name(path.name + suffix)
        if not sib.is_file():
            if isinstance(listed, dict) and measure in listed:
                out.problems.append(f"{sib.name}: listed in the manifest but missing; run "
                                    "reduce run again")
            continue
        packed = _read(sib, str(sib))
        try:
            unpacked = gzip.decompress(packed) if measure == "gzip" else brotli.decompress(packed)
        except (OSError, EOFError, zlib.error, brotli.error) as e:
            out.problems.append(f"{sib.name}: not valid {measure} ({e}); run reduce run again")
            continue
        if unpacked != data:
            out.problems.append(f"{sib.name}: does not decompress to the payload; run reduce "
                                "run again or delete it")
        elif isinstance(sizes, dict) and isinstance(listed, dict) and \
                sizes.get(measure) != len(packed):
            out.problems.append(f"{sib.name}: {len(packed):,} bytes, but the manifest's "
                                f"bytes.{measure} is {_show(sizes.get(measure))}")


def _over_message(verdict: Verdict, *, files: int | None = None) -> str:
    over = "over total budget" if files is not None else "over budget"
    across = f" summed over {files} files" if files is not None else ""
    return (
        f"{over}: {verdict.on} {verdict.size:,} B{across} > {verdict.limit:,} B "
        f"({format_size(verdict.size)} > {format_size(verdict.limit)}; {verdict.source})"
    )


# --------------------------------------------------------------------------------------------
# Rendering
# --------------------------------------------------------------------------------------------

_SURFACE_NOTE = (
    f"Surface advice is a rule of thumb (common practice): SVG/DOM up to about "
    f"{SVG_MAX_ELEMENTS:,} elements, canvas 2D up to about {CANVAS_MAX_ELEMENTS:,}, "
    "WebGL (GPU) beyond."
)
_TRANSFER_NOTE = (
    f"Transfer time: gzip bytes on {TRANSFER_ASSUMPTION} (our assumption), latency not "
    "included."
)
_PRECISION_NOTE = (
    f"More than {PRECISION_DECIMALS} decimals is finer than about 0.1 m in degrees "
    "(common practice): a screen cannot show it."
)


def _bytes_text(n: int | None) -> str:
    if n is None:
        return "not measured (use --brotli)"
    return f"{n:,} B" if n < 1000 else f"{n:,} B ({format_size(n)})"


def _elements_text(f: FileAudit) -> str:
    if f.elements is None:
        return "-"
    return f"{f.elements:,} {f.element_kind}"


def _verdict_text(v: Verdict) -> str:
    state = "OVER" if v.over else "ok"
    return f"{v.on} {v.size:,} B of {v.limit:,} B ({v.size / v.limit:.0%}) {state} [{v.source}]"


def _precision_text(f: FileAudit) -> str:
    return ", ".join(
        f"{c.name} ({c.too_precise:,} value{'s' if c.too_precise != 1 else ''})"
        for c in f.too_precise_fields
    )


def render_table(report: AuditReport) -> str:
    """Plain aligned text for a terminal or a CI log."""
    lines = [f"reduce audit: {len(report.files)} file(s), budget measure {report.on}", ""]
    for f in report.files:
        lines.append(f"{f.path}  [{KIND_LABELS[f.kind]}]")
        lines.append(
            f"  bytes      raw {_bytes_text(f.raw)} | gzip {_bytes_text(f.gzip)} | "
            f"brotli {_bytes_text(f.brotli)}"
        )
        if f.elements is not None:
            lines.append(f"  rows       {f.rows:,} | elements {_elements_text(f)} -> {f.surface}")
        lines.append(
            f"  transfer   ~{f.transfer_seconds:.1f} s on {TRANSFER_ASSUMPTION} (gzip size)"
        )
        if f.budget is not None:
            lines.append(f"  budget     {_verdict_text(f.budget)}")
        if f.fields:
            on, total = _share_basis(f)
            width = max(len("field"), *(len(c.name) for c in f.fields))
            lines.append(f"  {'field':<{width}}  {'raw bytes':>13}  {on + ' bytes':>13}  "
                         f"{'share':>6}  >6 decimals")
            for c in f.fields:
                part = _share_of(c, on)
                lines.append(
                    f"  {c.name:<{width}}  {c.bytes:>13,}  {_num_text(part):>13}  "
                    f"{_pct(part, total):>6}  {c.too_precise:>11,}"
                )
        if f.too_precise_fields:
            lines.append(
                f"  precision  more than {PRECISION_DECIMALS} decimals in {_precision_text(f)}: "
                "round them"
            )
        for note in f.notes:
            lines.append(f"  note       {note}")
        for message in f.findings:
            lines.append(f"  PROBLEM    {message}")
        lines.append("")
    if report.total is not None:
        lines.append(f"total  {_verdict_text(report.total)}")
    elif (size := report.total_size) is not None:
        lines.append(f"total  {report.on} {size:,} B ({format_size(size)})")
    findings = report.findings
    lines.append(f"{len(findings)} problem(s)" if findings else "no problems")
    lines += ["", _SURFACE_NOTE, _TRANSFER_NOTE, _PRECISION_NOTE]
    return "\n".join(lines) + "\n"


def _share_basis(f: FileAudit) -> tuple[str, int]:
    """The measure bytes per field are shown on, and their sum (for the share column)."""
    on = next((c.on for c in f.fields if c.share is not None), "raw")
    return on, sum(_share_of(c, on) or 0 for c in f.fields) or 1


def _share_of(c: FieldCost, on: str) -> int | None:
    return c.bytes if on == "raw" else c.share


def _num_text(n: int | None) -> str:
    return "-" if n is None else f"{n:,}"


def _pct(n: int | None, total: int) -> str:
    return "-" if n is None else f"{n / total:.1%}"


def _md(text: str) -> str:
    return text.replace("|", "\\|")


def render_markdown(report: AuditReport) -> str:
    """A Markdown summary to paste into a pull request."""
    head = ("| file | layout | raw | gzip | brotli | elements | surface | "
            f"{SLOW_LINK_NAME} | budget |")
    rule = "| --- | --- | ---: | ---: | ---: | ---: | --- | ---: | --- |"
    lines = ["### reduce audit", "", head, rule]
    for f in report.files:
        budget = "-"
        if f.budget is not None:
            state = "**over**" if f.budget.over else "ok"
            budget = f"{state} ({f.budget.on} ≤ {format_size(f.budget.limit)})"
        brotli_text = "not measured" if f.brotli is None else format_size(f.brotli)
        lines.append(
            f"| `{_md(f.path)}` | {_md(KIND_LABELS[f.kind])} | {format_size(f.raw)} | "
            f"{format_size(f.gzip)} | {brotli_text} | {_elements_text(f)} | "
            f"{f.surface or '-'} | {f.transfer_seconds:.1f} s | {budget} |"
        )
    lines.append("")
    if report.total is not None:
        state = "**over**" if report.total.over else "ok"
        lines.append(
            f"**Total** ({report.total.on}): {format_size(report.total.size)} of "
            f"{format_size(report.total.limit)}: {state}"
        )
        lines.append("")
    for f in report.files:
        if not f.fields:
            continue
        on, total = _share_basis(f)
        lines += [
            f"<details><summary><code>{html.escape(f.path)}</code>: bytes per field</summary>",
            "",
            f"| field | raw bytes | {on} bytes | share | >6 decimals |",
            "| --- | ---: | ---: | ---: | ---: |",
        ]
        for c in f.fields:
            part = _share_of(c, on)
            lines.append(
                f"| {_md(c.name)} | {c.bytes:,} | {_num_text(part)} | {_pct(part, total)} | "
                f"{c.too_precise:,} |"
            )
        lines += ["", "</details>", ""]
    findings = report.findings
    if findings:
        lines.append("**Problems**")
        lines.append("")
        lines += [f"- `{_md(path)}`: {_md(message)}" for path, message in findings]
        lines.append("")
    notes = [(f.path, n) for f in report.files for n in f.notes]
    if notes:
        lines.append("Notes:")
        lines.append("")
        lines += [f"- `{_md(path)}`: {_md(note)}" for path, note in notes]
        lines.append("")
    lines += [f"_{_SURFACE_NOTE}_", "", f"_{_TRANSFER_NOTE}_", "", f"_{_PRECISION_NOTE}_"]
    return "\n".join(lines) + "\n"


def _verdict_json(v: Verdict | None) -> dict[str, Any] | None:
    if v is None:
        return None
    return {"on": v.on, "max": v.limit, "size": v.size, "over": v.over, "source": v.source}


def report_to_json(report: AuditReport) -> bytes:
    """The report as JSON for machines, keys in a fixed order, ending with a newline."""
    doc = {
        "format": AUDIT_FORMAT,
        "on": report.on,
        "ok": report.ok,
        "assumptions": {
            "transfer": {
                "name": SLOW_LINK_NAME,
                "bits_per_second": SLOW_LINK_BITS_PER_SECOND,
                "on": "gzip",
            },
            "surface": {"svg_dom_max": SVG_MAX_ELEMENTS, "canvas_2d_max": CANVAS_MAX_ELEMENTS},
            "precision_decimals": PRECISION_DECIMALS,
        },
        "files": [
            {
                "path": f.path,
                "kind": f.kind,
                "bytes": {"raw": f.raw, "gzip": f.gzip, "brotli": f.brotli},
                "rows": f.rows,
                "elements": f.elements,
                "element_kind": f.element_kind,
                "surface": f.surface,
                "transfer_seconds": round(f.transfer_seconds, 3),
                "fields": [
                    {"name": c.name, "bytes": c.bytes, "too_precise": c.too_precise,
                     "measured": {"on": c.on, "bytes": c.share}}
                    for c in f.fields
                ],
                "budget": _verdict_json(f.budget),
                "problems": list(f.problems),
                "notes": list(f.notes),
            }
            for f in report.files
        ],
        "total": _verdict_json(report.total),
        "total_size": report.total_size,
        "findings": [{"path": p, "message": m} for p, m in report.findings],
        "commits": [{"journal": c.journal, "completed": c.completed, "message": c.message}
                    for c in report.commits],
    }
    return orjson.dumps(doc, option=orjson.OPT_INDENT_2 | orjson.OPT_APPEND_NEWLINE)
