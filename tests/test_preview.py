"""Tests of the static previews (``reduce.preview``): the PNG picture and the page's text.

External references:
- The viridis table as published in matplotlib (``lib/matplotlib/_cm_listed.py``,
  ``_viridis_data``): its first entry (0.267004, 0.004874, 0.329415) and last entry
  (0.993248, 0.906157, 0.143936), i.e. 8-bit (68, 1, 84) and (253, 231, 37).
- The ``h3`` bindings for where a cell lies (``cell_to_latlng``).
- Pillow (reading the PNG back) and the PNG signature (RFC 2083, section 3.1).
"""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import h3
import orjson
import pytest
from click.testing import CliRunner
from PIL import Image

from reduce import preview
from reduce.cli import main

VIRIDIS_TOP = (253, 231, 37)  # matplotlib's _viridis_data[255] x 255, rounded
VIRIDIS_BOTTOM = (68, 1, 84)  # _viridis_data[0] x 255, rounded
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # RFC 2083 3.1


def _columns_payload(
    columns: dict[str, list],
    *,
    recipe: str = "t",
    level: dict | None = None,
    dictionaries: dict | None = None,
) -> bytes:
    n = len(next(iter(columns.values())))
    doc = {
        "format": "reduce.columns/1",
        "recipe": recipe,
        "level": level or {},
        "rows": n,
        "columns": columns,
        **({"dictionaries": dictionaries} if dictionaries else {}),
        "accounting": {
            "input_rows": n,
            "filtered_rows": 0,
            "invalid_rows": 0,
            "suppressed_rows": 0,
            "represented_rows": n,
        },
    }
    return orjson.dumps(doc)


def _three_cells(tmp_path: Path) -> tuple[Path, list[str], list[int]]:
    # Three resolution-5 cells some distance apart; the last holds the maximum.
    cells = [h3.latlng_to_cell(10.0 + i * 0.6, 20.0 + i * 0.9, 5) for i in range(3)]
    values = [1, 5, 10]
    p = tmp_path / "cells.json"
    p.write_bytes(_columns_payload({"hex": cells, "reports": values}, level={"hex": 5}))
    return p, cells, values


def _pixel_of_cell(t: preview.Table, cell: str) -> tuple[int, int]:
    shapes = preview.map_shapes(t, preview.choose_view(t))
    pts = [p for s in shapes for r in s.rings for p in r]
    proj = preview.projection(pts, preview._PLOT)
    lat, lng = h3.cell_to_latlng(cell)
    x, y = proj(lng, lat)
    return round(x), round(y)


def test_png_has_the_fixed_size_and_a_png_signature(tmp_path: Path) -> None:
    p, _, _ = _three_cells(tmp_path)
    data = preview.render_png(preview.load_table(p))
    assert data.startswith(PNG_SIGNATURE)
    img = Image.open(io.BytesIO(data))
    assert img.size == (preview.WIDTH, preview.HEIGHT)


def test_png_cell_holding_the_maximum_is_drawn_in_the_scales_top_colour(tmp_path: Path) -> None:
    p, cells, values = _three_cells(tmp_path)
    t = preview.load_table(p)
    img = Image.open(io.BytesIO(preview.render_png(t))).convert("RGB")
    top = cells[values.index(max(values))]
    bottom = cells[values.index(min(values))]
    assert img.getpixel(_pixel_of_cell(t, top)) == VIRIDIS_TOP
    assert img.getpixel(_pixel_of_cell(t, bottom)) == VIRIDIS_BOTTOM


def test_png_sums_a_cell_over_its_other_keys_before_colouring(tmp_path: Path) -> None:
    # Cell a has 3 + 4 = 7 over two kinds, cell b has 6 in one row: a holds the maximum.
    a = h3.latlng_to_cell(10.0, 20.0, 5)
    b = h3.latlng_to_cell(11.0, 21.0, 5)
    p = tmp_path / "k.json"
    p.write_bytes(
        _columns_payload(
            {"hex": [a, a, b], "kind": [0, 1, 0], "reports": [3, 4, 6]},
            dictionaries={"kind": ["x", "y"]},
        )
    )
    t = preview.load_table(p)
    img = Image.open(io.BytesIO(preview.render_png(t))).convert("RGB")
    assert img.getpixel(_pixel_of_cell(t, a)) == VIRIDIS_TOP
    assert img.getpixel(_pixel_of_cell(t, b)) == VIRIDIS_BOTTOM


def test_scale_ends_are_the_published_viridis_ends() -> None:
    assert preview.scale_colour(1.0) == VIRIDIS_TOP
    assert preview.scale_colour(0.0) == VIRIDIS_BOTTOM
    # Monotone in lightness proxy (green channel rises along viridis).
    greens = [preview.scale_colour(i / 20)[1] for i in range(21)]
    assert greens == sorted(greens)


@pytest.mark.parametrize(
    "name",
    [
        "daily-series",
        "hex-layer",
        "province-choropleth",
        "province-rates",
        "sightings-hex-all",
        "town-flows",
    ],
)
def test_demo_png_is_not_blank_and_deterministic(
    name: str, demo_payloads: dict[str, Path], tmp_path: Path
) -> None:
    t = preview.load_table(demo_payloads[name])
    first = preview.render_png(t)
    assert preview.render_png(preview.load_table(demo_payloads[name])) == first
    img = Image.open(io.BytesIO(first)).convert("RGB")
    assert img.size == (preview.WIDTH, preview.HEIGHT)
    # Inside the drawing area (below the title) a real share of pixels is not background.
    area = img.crop(preview._PLOT)
    hist = area.getcolors(maxcolors=1 << 20) or []
    background = sum(c for c, rgb in hist if rgb == (255, 255, 255))
    total = area.size[0] * area.size[1]
    assert total - background > 0.01 * total
    assert len(hist) >= 3


def test_demo_views_follow_the_rule(demo_payloads: dict[str, Path]) -> None:
    kinds = {n: preview.choose_view(preview.load_table(p)).kind for n, p in demo_payloads.items()}
    assert kinds == {
        "daily-series": "lines",
        "hex-layer": "map",
        "province-choropleth": "map",
        "province-rates": "bars",
        "sightings-hex": "map",
        "sightings-hex-all": "map",
        "town-flows": "bars",
    }
    # The choropleth is coloured by its rate, not by its raw count.
    t = preview.load_table(demo_payloads["province-choropleth"])
    assert preview.choose_view(t).value == "reports_per_100000"


def test_png_bytes_are_the_same_in_another_process(
    demo_payloads: dict[str, Path], tmp_path: Path
) -> None:
    src = demo_payloads["province-rates"]
    a, b = tmp_path / "a", tmp_path / "b"
    for out in (a, b):
        subprocess.run(
            [sys.executable, "-m", "reduce", "preview", str(src), "--out", str(out)],
            check=True,
            capture_output=True,
        )
    assert (a / "province-rates.png").read_bytes() == (b / "province-rates.png").read_bytes()
    assert (a / "province-rates.html").read_bytes() == (b / "province-rates.html").read_bytes()


def test_flows_are_ranked_bars_of_pairs_summed_over_time(tmp_path: Path) -> None:
    p = tmp_path / "f.json"
    p.write_bytes(
        _columns_payload(
            {
                "time": [0, 0, 86400],
                "origin": [0, 1, 0],
                "destination": [1, 0, 1],
                "forwards": [2, 5, 4],
            },
            dictionaries={"origin": ["A", "B"], "destination": ["A", "B"]},
        )
    )
    t = preview.load_table(p)
    bars = preview.bar_values(t, preview.choose_view(t))
    assert bars == [("A \u2192 B", 6.0), ("B \u2192 A", 5.0)]


def test_lines_keep_the_top_categories_by_total(tmp_path: Path) -> None:
    kinds = ["a", "b", "c", "d", "e", "f", "g"]
    rows = [(s, k, 10 - i) for s in (0, 3600) for i, k in enumerate(kinds)]
    p = tmp_path / "s.json"
    p.write_bytes(
        _columns_payload(
            {
                "time": [r[0] for r in rows],
                "kind": [r[1] for r in rows],
                "reports": [r[2] for r in rows],
            }
        )
    )
    t = preview.load_table(p)
    bins, series = preview.line_series(t, preview.choose_view(t))
    assert bins == [0, 3600]
    assert [c for c, _ in series] == ["a", "b", "c", "d", "e"]
    assert series[0][1] == [10.0, 10.0]


def test_page_is_self_contained_and_carries_the_reader(demo_payloads: dict[str, Path]) -> None:
    t = preview.load_table(demo_payloads["province-rates"])
    page = preview.render_html(t).decode("utf-8")
    assert preview.static_text("columns-reader.js") in page
    for needle in ("http://", "https://", "<script src", "<link"):
        # The only URL allowed is the SVG namespace name, which is never fetched.
        assert page.replace('"http://www.w3.org/2000/svg"', "").count(needle) == 0, needle
    assert "common practice" in page


def test_page_inlines_text_that_would_close_a_script_element(tmp_path: Path) -> None:
    p = tmp_path / "x.json"
    p.write_bytes(_columns_payload({"kind": ["</script><b>", "ok"], "reports": [1, 2]}))
    page = preview.render_html(preview.load_table(p)).decode("utf-8")
    body = page.split('<script type="application/json" id="payload">', 1)[1].split("</script>")[0]
    assert json.loads(body) == json.loads(p.read_bytes())


def test_cli_preview_writes_png_and_html_beside_the_payload(
    demo_payloads: dict[str, Path], tmp_path: Path
) -> None:
    src = tmp_path / "town-flows.json"
    src.write_bytes(demo_payloads["town-flows"].read_bytes())
    res = CliRunner().invoke(main, ["preview", str(src), "--reader"])
    assert res.exit_code == 0, res.output
    assert (tmp_path / "town-flows.png").is_file()
    assert (tmp_path / "town-flows.html").is_file()
    assert (tmp_path / "columns-reader.js").read_text() == preview.static_text("columns-reader.js")
    rows = json.loads(src.read_bytes())["rows"]
    assert res.output == (
        f"{src}: bars, {rows:,} rows -> {tmp_path / 'town-flows.png'}, "
        f"{tmp_path / 'town-flows.html'}\n"
    )


@pytest.mark.parametrize(
    "content, message",
    [
        (b"{not json", "is not valid JSON"),
        (b'{"format": "other"}', "is not a payload preview can draw"),
        (
            b'{"format": "reduce.columns/1", "rows": 2, "columns": {"a": [1]}}',
            "column 'a' does not have 2 entries",
        ),
    ],
)
def test_cli_preview_bad_payload_is_one_line_exit_2(
    tmp_path: Path, content: bytes, message: str
) -> None:
    p = tmp_path / "bad.json"
    p.write_bytes(content)
    res = CliRunner().invoke(main, ["preview", str(p), "--out", str(tmp_path / "o")])
    assert res.exit_code == 2
    lines = res.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: {p}: ") and message in lines[0]
    assert not (tmp_path / "o").exists() or not any((tmp_path / "o").iterdir())


def test_cli_preview_missing_file_is_exit_2(tmp_path: Path) -> None:
    res = CliRunner().invoke(main, ["preview", str(tmp_path / "nope.json")])
    assert res.exit_code == 2
    assert "payload file not found" in res.output


def test_cli_measure_without_a_browser_says_how_to_install_it(
    demo_payloads: dict[str, Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("REDUCE_CHROMIUM", str(tmp_path / "no-chromium"))
    res = CliRunner().invoke(
        main,
        [
            "preview",
            str(demo_payloads["province-rates"]),
            "--out",
            str(tmp_path / "o"),
            "--measure",
        ],
    )
    assert res.exit_code == 2
    lines = res.output.strip().splitlines()
    assert len(lines) == 1 and "apt-get install -y chromium chromium-driver" in lines[0]
    assert not (tmp_path / "o").exists()


def test_ladder_page_shows_every_candidate_with_its_picture_and_marks_the_chosen(
    case, tmp_path: Path
) -> None:  # type: ignore[no-untyped-def]
    import base64
    import re

    import numpy as np

    from tests._builders import random_events

    events = random_events(np.random.default_rng(3), 3000)
    recipe = case(
        events,
        source={"lat": "lat", "lon": "lon"},
        group={"hex": {"levels": [7, 6, 5]}},
        measures={"n": "count"},
        budget={"max": "6KB", "on": "gzip"},
    )
    page = tmp_path / "ladder.html"
    args = ["ladder", str(recipe), "--no-cache", "-q", "--json", "--page", str(page)]
    res = CliRunner().invoke(main, args)
    assert res.exit_code == 0, res.output
    cands = json.loads(res.output)["candidates"]
    text = page.read_text(encoding="utf-8")
    assert text.count("class='card") == len(cands)
    assert text.count("class='card chosen'") == sum(c["chosen"] for c in cands) == 1
    pngs = re.findall(r"data:image/png;base64,([A-Za-z0-9+/=]+)", text)
    assert len(pngs) == sum(c["raw"] is not None for c in cands) > 0
    assert all(base64.b64decode(p).startswith(PNG_SIGNATURE) for p in pngs)
    for c in cands:
        assert f"<td>{c['rows']:,}</td>" in text
    first = page.read_bytes()
    assert CliRunner().invoke(main, args).exit_code == 0
    assert page.read_bytes() == first


def test_ladder_page_into_a_missing_folder_is_one_line_exit_2(case, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    recipe = case({"kind": ["a", "b"]}, group={"category": {"column": "kind"}})
    res = CliRunner().invoke(
        main,
        ["ladder", str(recipe), "--no-cache", "-q", "--page", str(tmp_path / "nope" / "l.html")],
    )
    assert res.exit_code == 2
    assert res.output.strip().splitlines()[-1] == (
        f"error: {tmp_path / 'nope'}: no such folder for --page; create it first"
    )
