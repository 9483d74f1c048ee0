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

import os
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import replace
from pathlib import Path
from typing import Any

import orjson

from reduce.audit.budgets import (
    Budgets,
    FileRule,
    _budget_measure,
    _budget_size,
    _glob_regex,
    _posix,
    load_budgets,
)
from reduce.audit.files import (
    MANIFEST_MAX_BYTES,
    READ_MAX_BYTES,
    _links_outside,
    _read,
    _read_manifest,
)
from reduce.audit.inspect_json import _analyse_json, _count_too_precise
from reduce.audit.inspect_tables import _analyse_arrow, _analyse_csv
from reduce.audit.manifests import _SIBLING_SUFFIXES, _check_manifest, _check_siblings
from reduce.audit.model import (
    _ARROW_SUFFIXES,
    _CSV_SUFFIXES,
    _JSON_SUFFIXES,
    AUDIT_FORMAT,
    CANVAS_MAX_ELEMENTS,
    MANIFEST_SUFFIX,
    PRECISION_DECIMALS,
    SLOW_LINK_BITS_PER_SECOND,
    SLOW_LINK_NAME,
    SVG_MAX_ELEMENTS,
    AuditReport,
    CommitCheck,
    FieldCost,
    FileAudit,
    Verdict,
    _Findings,
    advice,
    transfer_seconds,
)
from reduce.audit.render import render_markdown, render_table, report_to_json
from reduce.contract import COLUMNS_FORMAT, MANIFEST_FORMAT, MAX_SAFE_INTEGER
from reduce.errors import AuditError, ReduceError
from reduce.publish import journals, reading, recover
from reduce.sizes import BROTLI_AUTO_MAX, Measure, brotli_bytes, format_size, gzip_bytes

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
    # used by tests and tools that look inside: not a stable API
    "MANIFEST_MAX_BYTES",
    "_count_too_precise",
    "_glob_regex",
    "format_size",
]

# Brotli quality 11 costs about 2 s per megabyte: measured exactly up to this size unless
# asked; the same limit as ``reduce run`` (one constant, in reduce.sizes).
BROTLI_AUTO_MAX_BYTES = BROTLI_AUTO_MAX

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
    return AuditReport(files=tuple(results), on=measure, total=total_verdict, commits=commits)


def _check_globs_match(budgets: Budgets, files: Sequence[tuple[str, Path]]) -> None:
    """A ``[[file]]`` glob matching none of the audited files is a mistake (a renamed folder,
    a typo) that would otherwise let every file pass unchecked."""
    for rule in budgets.rules:
        if not any(rule.matches(_candidates(budgets, path, given)) for given, path in files):
            n = len(files)
            raise AuditError(
                f"{rule.source} matches none of the {n:,} audited "
                f"file{'s' if n != 1 else ''}; fix the glob (relative to the "
                "budgets file's folder) or remove the rule"
            )


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
    return (
        any(path.parent.glob(f"{stem}.*{MANIFEST_SUFFIX}"))
        or path.with_name(path.stem + MANIFEST_SUFFIX).is_file()
    )


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
        out.notes.append(
            "a link to a file outside its folder: sizes only (its content is not shown)"
        )
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
        fields = tuple(
            sorted(
                (replace(f, on=share_on, share=shares.get(f.name)) for f in fields),
                key=lambda f: (-(f.share or 0), -f.bytes, f.name),
            )
        )
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


def field_shares(
    data: bytes, kind: str, on: Measure, names: Sequence[str]
) -> dict[str, int] | None:
    """The bytes on ``on`` (gzip level 9, brotli quality 11, or raw) each field adds to the
    file: the size of the file re-encoded whole minus its size re-encoded without that
    field (columns payloads: the column, or its dictionary for ``name (dictionary)``; row
    JSON and CSV: the key or column; GeoJSON: the property). Compression works on repeats
    across fields, so shares need not add up to the file's size; they say which field to
    trim first. ``None`` for other layouts and files over ``FIELD_SHARE_MAX_BYTES``."""
    if len(data) > FIELD_SHARE_MAX_BYTES or kind not in ("columns", "rows", "geojson", "csv"):
        return None
    sizers: dict[str, Callable[[bytes], int]] = {
        "raw": len,
        "gzip": lambda b: len(gzip_bytes(b)),
        "brotli": lambda b: len(brotli_bytes(b)),
    }
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
                csv.writer(buf, lineterminator="\n").writerows(
                    [[r[i] for i in keep if i < len(r)] for r in table]
                )
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
        return [
            {k: v for k, v in r.items() if k != name} if isinstance(r, dict) else r for r in doc
        ]
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


def _complete_commits(
    paths: Sequence[str | os.PathLike[str]], files: list[tuple[str, Path]]
) -> tuple[CommitCheck, ...]:
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
                out.append(CommitCheck(str(j), False, f"interrupted commit, not completed: {why}"))
            continue
        for j in found:
            name = j.name[1:].removesuffix(".reduce-commit")
            if name in done:
                out.append(
                    CommitCheck(
                        str(j), True, f"completed an interrupted commit of {name} before auditing"
                    )
                )
    return tuple(out)
