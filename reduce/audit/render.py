"""Rendering an audit report: a text table, Markdown for a pull request, JSON."""

from __future__ import annotations

import html
from typing import Any

import orjson

from reduce.audit.model import (
    AUDIT_FORMAT,
    CANVAS_MAX_ELEMENTS,
    KIND_LABELS,
    PRECISION_DECIMALS,
    SLOW_LINK_BITS_PER_SECOND,
    SLOW_LINK_NAME,
    SVG_MAX_ELEMENTS,
    TRANSFER_ASSUMPTION,
    AuditReport,
    FieldCost,
    FileAudit,
    Verdict,
)
from reduce.sizes import (
    format_size,
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
    f"Transfer time: gzip bytes on {TRANSFER_ASSUMPTION} (our assumption), latency not included."
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
            lines.append(
                f"  {'field':<{width}}  {'raw bytes':>13}  {on + ' bytes':>13}  "
                f"{'share':>6}  >6 decimals"
            )
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
    head = (
        f"| file | layout | raw | gzip | brotli | elements | surface | {SLOW_LINK_NAME} | budget |"
    )
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
                    {
                        "name": c.name,
                        "bytes": c.bytes,
                        "too_precise": c.too_precise,
                        "measured": {"on": c.on, "bytes": c.share},
                    }
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
        "commits": [
            {"journal": c.journal, "completed": c.completed, "message": c.message}
            for c in report.commits
        ],
    }
    return orjson.dumps(doc, option=orjson.OPT_INDENT_2 | orjson.OPT_APPEND_NEWLINE)
