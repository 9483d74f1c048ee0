"""The manifest written beside every payload: what was chosen and why, every level the
search evaluated (estimated verdicts marked), the sizes, the accounting and the source."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

from reduce.contract import MANIFEST_FORMAT
from reduce.measure import QUICK_NOTE
from reduce.publish import sha256
from reduce.sizes import Sizes, measure_all

if TYPE_CHECKING:
    from reduce.pipeline import FitResult


def build_manifest(result: FitResult, path: Path) -> dict[str, Any]:
    r = result.recipe
    assert result.payload is not None and result.chosen is not None
    data = result.payload
    c = result.chosen
    on_brotli = result.budget is not None and result.budget.on == "brotli"
    if c.gzip is None or (c.brotli is None and on_brotli):
        s = measure_all(data, brotli=on_brotli)  # the chosen level is always measured exactly
        c.gzip = s.gzip
        if s.brotli is not None:
            c.brotli = s.brotli
    sizes = Sizes(raw=len(data), gzip=int(c.gzip), brotli=c.brotli)
    red = result.reducer
    assert result.level is not None and red is not None
    rec = red.record(result.level)
    src = result.source
    notes = list(result.notes)
    if sizes.brotli is None:
        notes.append(
            "brotli not measured: "
            + (f"the budget is on {result.budget.on}" if result.budget else "no budget")
            + " (brotli at quality 11 is slow); a brotli budget, "
            "[output] precompress = true or reduce ladder --exact measures it"
        )
    m: dict[str, Any] = {
        "format": MANIFEST_FORMAT,
        "payload": path.name,
        "layout": r.output.layout,
        "sha256": sha256(data),
        "bytes": sizes.as_dict(),
        "rows": result.chosen.rows,
        "elements": result.chosen.elements,
        "recipe": {"name": r.name, "file": r.file.name, "sha256": r.content_hash},
        "level": dict(result.level),
        "budget": (
            {
                "max": result.budget.max,
                "on": result.budget.on,
                "order": list(result.budget.order),
                "fits": sizes.on(result.budget.on) <= result.budget.max,
            }
            if result.budget
            else None
        ),
        **({"notes": notes} if notes else {}),
        "frontier": [
            {
                "level": dict(c.level),
                "rows": c.rows,
                "raw": c.raw,
                "gzip": c.gzip,
                "brotli": c.brotli,
                "fits": c.fits,
                "chosen": c.chosen,
                **({"estimated": True} if c.estimated or c.note == QUICK_NOTE else {}),
                **({"rows_estimated": True} if c.rows_estimated else {}),
            }
            for c in result.candidates
        ],
        "accounting": {
            **result.accounting,
            "invalid_by_reason": rec.accounting.get("invalid_by_reason", {}),
            "suppressed_cells": rec.suppressed_cells,
        },
        "source": {
            "fingerprint": src.fingerprint if src else None,
            "files": len(src.files) if src else None,
            "format": src.format if src else None,
        },
        # source files: how many, how many this run scanned, how many partials it reused
        "files": red.files,
    }
    if r.normalize is not None and r.normalize.rate_measures:
        m["denominators"] = rec.denominators
    return m
