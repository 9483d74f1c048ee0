"""The ladder page: every candidate level of a recipe side by side, with its picture.

``reduce ladder RECIPE --page FILE`` writes one self-contained HTML file (no network; the
pictures are PNGs from :mod:`reduce.preview` inlined as ``data:`` URLs) showing, for each
candidate the search evaluated, the level, its rows, raw/gzip/brotli bytes and whether it
fits the budget, with the chosen level marked, so a person trimming sees what each step of
the budget buys. A candidate judged from its row count alone (never encoded, far over the
budget), or one above :data:`MAX_PICTURE_BYTES` raw, is listed without a picture.
"""

from __future__ import annotations

import base64
import html
from collections.abc import Callable
from pathlib import Path
from typing import Any

from reduce.budget import describe_level
from reduce.pipeline import FitResult
from reduce.sizes import format_size

MAX_PICTURE_BYTES = 20_000_000  # decoding and drawing a bigger payload takes too long here


def _size(n: int | None) -> str:
    return "-" if n is None else f"{format_size(n)} ({n:,} B)"


def render_ladder_page(
    result: FitResult, *, progress: Callable[[str], None] | None = None
) -> bytes:
    """The page as UTF-8 bytes (same result, same bytes)."""
    from reduce.preview import PreviewError, render_png, table_from_bytes

    r = result.recipe
    axes = list(r.ladder())
    red = result.reducer
    cards = []
    ordered = sorted(
        result.candidates,
        key=lambda c: [
            list(r.ladder()[a]).index(c.level[a]) if c.level[a] in r.ladder()[a] else 0
            for a in axes
        ],
    )
    for i, c in enumerate(ordered):
        if progress:
            progress(f"ladder page: drawing level {i + 1} of {len(ordered)}")
        picture = "<p class='none'>no picture: judged from its row count, never encoded</p>"
        if c.raw is not None and c.raw > MAX_PICTURE_BYTES:
            picture = (
                f"<p class='none'>no picture: {format_size(c.raw)} raw is too large "
                "to draw here</p>"
            )
        elif c.raw is not None and red is not None:
            data = red.payload(c.level)
            try:
                t = table_from_bytes(Path(f"{r.name}.json"), data)
                png = render_png(t, sizes={"raw": c.raw, "gzip": c.gzip, "brotli": c.brotli})
                src = "data:image/png;base64," + base64.b64encode(png).decode("ascii")
                picture = (
                    f"<img src='{src}' width='480' height='300' "
                    f"alt='{html.escape(describe_level(c.level))}'>"
                )
            except PreviewError as e:
                picture = f"<p class='none'>no picture: {html.escape(e.message)}</p>"
        fits = "-" if c.fits is None else ("fits" if c.fits else "over budget")
        cls = "card chosen" if c.chosen else "card"
        mark = "<strong>chosen</strong> · " if c.chosen else ""
        cards.append(
            f"<div class='{cls}'><h2>{mark}{html.escape(describe_level(c.level))}</h2>"
            f"{picture}<table>"
            f"<tr><th>rows</th><td>{c.rows:,}</td></tr>"
            f"<tr><th>elements</th><td>{c.elements:,}</td></tr>"
            f"<tr><th>raw</th><td>{_size(c.raw)}</td></tr>"
            f"<tr><th>gzip</th><td>{_size(c.gzip)}</td></tr>"
            f"<tr><th>brotli</th><td>{_size(c.brotli)}</td></tr>"
            f"<tr><th>budget</th><td>{fits}</td></tr></table></div>"
        )
    b = result.budget
    budget = (
        f"budget {format_size(b.max)} {b.on}; order {', '.join(b.order)} (first gives "
        "up detail first)"
        if b
        else "no budget"
    )
    chosen = describe_level(result.level) if result.level else "nothing fits"
    return _PAGE.format(
        title=html.escape(f"{r.name}: the ladder"),
        budget=html.escape(budget),
        chosen=html.escape(chosen),
        n=len(ordered),
        cards="\n".join(cards),
    ).encode("utf-8")


def check_page_target(page: Path) -> None:
    """Fail before the ladder is computed if ``page`` cannot be written."""
    from reduce.preview import PreviewError

    if page.is_dir():
        raise PreviewError(f"{page}: is a folder; give a file name for --page, e.g. ladder.html")
    if not page.parent.is_dir():
        raise PreviewError(f"{page.parent}: no such folder for --page; create it first")


def write_ladder_page(result: FitResult, page: Path, **kw: Any) -> Path:
    from reduce.preview import write_atomic

    check_page_target(page)
    write_atomic(page, render_ladder_page(result, **kw))
    return page


_PAGE = """<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<meta http-equiv="Content-Security-Policy" content="default-src 'none'; style-src 'unsafe-inline'; img-src data:">
<title>{title}</title>
<style>
body {{ font: 14px/1.4 system-ui, sans-serif; margin: 16px; color: #222; }}
h1 {{ font-size: 18px; margin: 0 0 4px; }} h2 {{ font-size: 14px; margin: 0 0 6px; }}
.grid {{ display: flex; flex-wrap: wrap; gap: 12px; }}
.card {{ border: 1px solid #ccc; padding: 8px; width: 480px; }}
.chosen {{ border: 3px solid #21918c; }}
th {{ text-align: left; padding-right: 12px; font-weight: normal; color: #666; }}
.none {{ color: #888; height: 300px; margin: 0; }}
</style></head>
<body>
<h1>{title}</h1>
<p>{n} candidate levels evaluated; {budget}. Chosen: {chosen}.</p>
<div class="grid">
{cards}
</div>
</body></html>
"""
