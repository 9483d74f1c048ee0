"""Human- and machine-readable summaries of runs, ladders and checks.

The command line prints what these functions return; they hold no pipeline logic.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import orjson

from reduce.budget import Candidate, describe_level
from reduce.pipeline import FitResult, RunResult
from reduce.sizes import format_size


def _num(n: int | None) -> str:
    return "-" if n is None else f"{n:,}"


def run_line(res: RunResult) -> str:
    f = res.fit
    c = f.chosen
    assert c is not None and f.level is not None
    parts = [
        f"{f.recipe.name}: {c.rows:,} rows",
        describe_level(f.level),
        f"raw {format_size(c.raw or 0)}",
        f"gzip {format_size(c.gzip or 0)}",
        f"brotli {format_size(c.brotli)}" if c.brotli is not None else "brotli not measured",
    ]
    if f.budget:
        b = f.budget
        parts.append(
            f"budget {format_size(b.max)} {b.on}"
            + (" (over: written anyway)" if res.over_budget else "")
        )
    acc = f.accounting
    if acc.get("invalid_rows"):
        parts.append(f"{acc['invalid_rows']:,} invalid rows")
    if acc.get("suppressed_rows"):
        parts.append(f"{acc['suppressed_rows']:,} suppressed rows")
    line = ", ".join(parts)
    return f"{line} -> {shown(res.path)}"


def shown(path: Path | None) -> str:
    """A path relative to the working folder when it is inside it."""
    from reduce.errors import shown_path

    return "-" if path is None else shown_path(path)


def run_warnings(res: RunResult) -> list[str]:
    """Warning lines (for stderr) worth a user's attention: unmatched denominator keys."""
    f = res.fit
    out = []
    rep = f.record.denominators if f.record is not None else None
    if rep and f.recipe.normalize and f.recipe.normalize.rate_measures:
        name = f.recipe.name
        if rep["rows_without_denominator"]:
            out.append(
                f"warning: {name}: {rep['rows_without_denominator']:,} rows have no "
                "usable denominator (rate left empty)"
            )
        if rep["data_only_keys"]:
            out.append(
                f"warning: {name}: keys in the data but not in the denominators: "
                f"{_few(rep['data_only_keys'])}"
            )
        if rep["denominator_only_keys"]:
            out.append(
                f"warning: {name}: keys in the denominators but not in the data: "
                f"{_few(rep['denominator_only_keys'])}"
            )
    return out


def _few(keys: Sequence[str], n: int = 8) -> str:
    shown = ", ".join(keys[:n])
    return shown + (f" (+{len(keys) - n} more)" if len(keys) > n else "")


def run_json(res: RunResult) -> dict[str, Any]:
    f = res.fit
    c = f.chosen
    assert c is not None
    return {
        "recipe": f.recipe.name,
        "path": str(res.path),
        "level": dict(f.level) if f.level is not None else None,
        "rows": c.rows,
        "elements": c.elements,
        "bytes": {"raw": c.raw, "gzip": c.gzip, "brotli": c.brotli},
        "over_budget": res.over_budget,
        "accounting": f.accounting,
        "files": f.reducer.files if f.reducer is not None else None,
        **(
            {"denominators": f.record.denominators}
            if f.record is not None
            and f.record.denominators is not None
            and f.recipe.normalize
            and f.recipe.normalize.rate_measures
            else {}
        ),
        "manifest": res.manifest,
    }


def ladder_table(result: FitResult) -> str:
    """One row per evaluated candidate; the chosen one marked with '*'."""
    axes = list(result.recipe.ladder())
    head = ["", *axes, "rows", "elements", "raw", "gzip", "brotli", "fits"]
    rows: list[list[str]] = []
    cands: list[Candidate] = sorted(
        result.candidates, key=lambda c: [_rank(result, a, c.level[a]) for a in axes]
    )
    on = result.budget.on if result.budget else None
    for c in cands:
        sizes = {m: _num(c.size(m)) for m in ("raw", "gzip", "brotli")}
        if on is not None and c.size(on) is None and c.guess is not None:
            sizes[on] = f"~{c.guess:,}"  # the estimate the search went by
        verdict = "-" if c.fits is None else ("yes" if c.fits else "no")
        rows.append(
            [
                "*" if c.chosen else "",
                *[str(c.level[a]) for a in axes],
                f"~{c.rows:,}" if c.rows_estimated else _num(c.rows),
                f"~{c.elements:,}" if c.rows_estimated else _num(c.elements),
                sizes["raw"],
                sizes["gzip"],
                sizes["brotli"],
                f"~{verdict}" if c.estimated and c.fits is not None else verdict,
            ]
        )
    widths = [max(len(r[i]) for r in [head, *rows]) for i in range(len(head))]
    right = set(range(len(axes) + 1, len(head)))

    def fmt(r: list[str]) -> str:
        return "  ".join(
            v.rjust(w) if i in right else v.ljust(w) for i, (v, w) in enumerate(zip(r, widths))
        ).rstrip()

    lines = [fmt(head), fmt(["-" * w for w in widths]), *map(fmt, rows)]
    if any(c.estimated for c in cands):
        lines.append(
            "~: not measured exactly (a sample of the level's cells, a fast compression or "
            "its rows times bytes per row); --exact measures every level shown"
        )
    lines.extend(f"note: {n}" for n in result.notes)
    b = result.budget
    if b:
        lines.append(
            f"budget: {format_size(b.max)} ({b.max:,} bytes) {b.on}; order: "
            f"{', '.join(b.order)} (first gives up detail first)"
        )
    if result.chosen:
        lines.append(f"chosen: {describe_level(result.chosen.level)}")
    return "\n".join(lines)


def _rank(result: FitResult, axis: str, value: Any) -> int:
    levels = list(result.recipe.ladder()[axis])
    return levels.index(value) if value in levels else len(levels)


def ladder_json(result: FitResult) -> bytes:
    doc = {
        "recipe": result.recipe.name,
        "budget": (
            {"max": result.budget.max, "on": result.budget.on, "order": list(result.budget.order)}
            if result.budget
            else None
        ),
        "chosen": dict(result.level) if result.level is not None else None,
        "candidates": [
            {
                "level": dict(c.level),
                "rows": c.rows,
                "elements": c.elements,
                "raw": c.raw,
                "gzip": c.gzip,
                "brotli": c.brotli,
                "fits": c.fits,
                "chosen": c.chosen,
                "estimated": c.estimated,
                "rows_estimated": c.rows_estimated,
                "guess": c.guess if c.estimated else None,
            }
            for c in result.candidates
        ],
        "partial_from_cache": result.partial_from_cache,
    }
    return orjson.dumps(doc, option=orjson.OPT_INDENT_2)


def check_line(recipe_file: Path, name: str, files: int, columns: Sequence[str]) -> str:
    return (
        f"{recipe_file}: ok ({name}: {files} source file{'s' if files != 1 else ''}, "
        f"columns {', '.join(columns)})"
    )


def preview_line(p: Any) -> str:
    """One line per previewed payload (a :class:`reduce.preview.Preview`)."""
    line = f"{shown(p.payload)}: {p.kind}, {p.rows:,} rows -> {shown(p.png)}, {shown(p.html)}"
    m = p.timings
    if m:
        line += (
            f"; {m['surface']}, parse {m['parse_ms']:.1f} ms, draw {m['draw_ms']:.1f} ms "
            f"(median of {m['loads']} loads in headless Chromium)"
        )
    return line


def preview_json(previews: Sequence[Any]) -> bytes:
    return orjson.dumps(
        [
            {
                "payload": str(p.payload),
                "png": str(p.png),
                "html": str(p.html),
                "kind": p.kind,
                "rows": p.rows,
                **(
                    {"measured": {k: v for k, v in p.timings.items() if k != "page"}}
                    if p.timings
                    else {}
                ),
            }
            for p in previews
        ],
        option=orjson.OPT_INDENT_2,
    )
