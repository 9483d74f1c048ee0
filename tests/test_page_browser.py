"""The preview pages in a real browser: headless Debian Chromium driven by selenium.

`.ci/run` installs the ``chromium`` and ``chromium-driver`` packages when they are missing,
so these tests run in the normal test run. The checks against the outside world:
- Chromium itself (its DOM, canvas, WebGL and JSON.parse) draws and decodes the page;
- Python's ``json`` module decodes the same payload bytes for the comparison with the
  page-side reader (dictionary indexes resolved, bin starts as ``Date``).
Timings are read and checked to be finite numbers, never compared with a limit.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import orjson
import pytest

from reduce import preview
from reduce.browser import browser, browser_paths, load_page, measure_pages

try:
    browser_paths()
    _NO_BROWSER = ""
except Exception as e:  # reported as the skip reason; .ci/run installs the browser
    _NO_BROWSER = str(e)

pytestmark = pytest.mark.skipif(bool(_NO_BROWSER), reason=_NO_BROWSER)

# Rule of thumb (common practice), as the page and the audit state it.
SVG_MAX, CANVAS_MAX = 1_000, 100_000


def _expected_surface(n: int) -> str:
    return "svg" if n <= SVG_MAX else "canvas" if n <= CANVAS_MAX else "webgl"


@pytest.fixture(scope="module")
def pages(
    demo_payloads: dict[str, Path], tmp_path_factory: pytest.TempPathFactory
) -> dict[str, Path]:
    out = tmp_path_factory.mktemp("pages")
    res = {}
    for name, p in demo_payloads.items():
        res[name] = preview.write_previews(p, out_dir=out / name).html
    return res


@pytest.fixture(scope="module")
def driver() -> Any:
    with browser() as drv:
        yield drv


def _elements(payload: Path) -> int:
    doc = json.loads(payload.read_bytes())
    return len(doc["features"]) if doc.get("type") == "FeatureCollection" else doc["rows"]


@pytest.mark.parametrize(
    "name",
    [
        "daily-series",
        "hex-layer",
        "province-choropleth",
        "province-rates",
        "sightings-hex",
        "sightings-hex-all",
        "town-flows",
    ],
)
def test_every_demo_page_draws_with_finite_timings_and_no_console_errors(
    name: str, pages: dict[str, Path], demo_payloads: dict[str, Path], driver: Any
) -> None:
    load = load_page(driver, pages[name])
    n = _elements(demo_payloads[name])
    assert load.drawn == n
    assert load.surface == _expected_surface(n)
    assert math.isfinite(load.parse_ms) and load.parse_ms >= 0
    assert math.isfinite(load.draw_ms) and load.draw_ms >= 0
    assert [m for m in load.console if m.startswith("SEVERE")] == []
    if n:
        assert load.shapes > 0


def _python_rows(payload: dict[str, Any]) -> list[dict[str, Any]]:
    dicts = payload.get("dictionaries", {})
    cols = payload["columns"]
    rows = []
    for i in range(payload["rows"]):
        row = {}
        for name, values in cols.items():
            v = values[i]
            if name in dicts and v is not None:
                v = dicts[name][v]
            elif name == "time" and v is not None:
                v = {"date_ms": v * 1000}
            row[name] = v
        rows.append(row)
    return rows


_JS_ROWS = """
return reduceReader.toRows(reducePayload).map((r) => Object.fromEntries(Object.entries(r)
  .map(([k, v]) => [k, v instanceof Date ? { date_ms: v.getTime() } : v])));
"""


@pytest.mark.parametrize(
    "name", ["daily-series", "province-rates", "sightings-hex", "sightings-hex-all", "town-flows"]
)
def test_page_reader_rows_equal_the_python_decoding(
    name: str, pages: dict[str, Path], demo_payloads: dict[str, Path], driver: Any
) -> None:
    load_page(driver, pages[name])
    got = driver.execute_script(_JS_ROWS)
    want = _python_rows(json.loads(demo_payloads[name].read_bytes()))
    assert len(got) == len(want)
    assert got == want


def test_page_reader_columns_keep_seconds_when_asked(
    pages: dict[str, Path], demo_payloads: dict[str, Path], driver: Any
) -> None:
    load_page(driver, pages["daily-series"])
    got = driver.execute_script(
        "return reduceReader.toColumns(reducePayload, { dates: false }).time;"
    )
    assert got == json.loads(demo_payloads["daily-series"].read_bytes())["columns"]["time"]


def test_page_reader_rejects_an_index_outside_its_dictionary(tmp_path: Path, driver: Any) -> None:
    p = tmp_path / "bad.json"
    p.write_bytes(
        orjson.dumps(
            {
                "format": "reduce.columns/1",
                "recipe": "x",
                "rows": 1,
                "columns": {"kind": [0], "n": [1]},
                "dictionaries": {"kind": ["a"]},
            }
        )
    )
    page = preview.write_previews(p, out_dir=tmp_path / "o").html
    load_page(driver, page)
    msg = driver.execute_script("""
      const bad = structuredClone(reducePayload); bad.columns.kind = [3];
      try { reduceReader.toColumns(bad); return "no error"; } catch (e) { return e.message; }
    """)
    assert "outside its dictionary" in msg


def test_hovering_a_shape_shows_its_keys_and_measures(pages: dict[str, Path], driver: Any) -> None:
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By

    load_page(driver, pages["province-choropleth"])
    shape = driver.find_elements(By.CSS_SELECTOR, "#plot svg path")[0]
    ActionChains(driver).move_to_element(shape).perform()
    tip = driver.find_element(By.ID, "tip")
    assert tip.is_displayed()
    assert "reports_per_100000:" in tip.text and "reports:" in tip.text


def test_hovering_a_canvas_cell_shows_its_cell(tmp_path: Path, driver: Any) -> None:
    import h3
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By

    # 1,001 rows over one cell (1,001 elements: a canvas); hover the middle of the plot,
    # where the only cell is drawn.
    cell = h3.latlng_to_cell(10.0, 20.0, 6)
    n = SVG_MAX + 1
    p = tmp_path / "one.json"
    p.write_bytes(
        orjson.dumps(
            {
                "format": "reduce.columns/1",
                "recipe": "one",
                "rows": n,
                "columns": {
                    "time": [3600 * i for i in range(n)],
                    "hex": [cell] * n,
                    "reports": [1] * n,
                },
            }
        )
    )
    load = load_page(driver, preview.write_previews(p, out_dir=tmp_path / "o").html)
    assert load.surface == "canvas"
    plot = driver.find_element(By.ID, "plot")
    ActionChains(driver).move_to_element(plot).perform()
    tip = driver.find_element(By.ID, "tip")
    assert tip.is_displayed()
    assert f"hex: {cell}" in tip.text and f"rows: {n}" in tip.text


def test_a_large_payload_is_drawn_with_webgl(tmp_path: Path, driver: Any) -> None:
    n = CANVAS_MAX + 1
    p = tmp_path / "big.json"
    p.write_bytes(
        orjson.dumps(
            {
                "format": "reduce.columns/1",
                "recipe": "big",
                "level": {},
                "rows": n,
                "columns": {
                    "kind": [i % 40 for i in range(n)],
                    "reports": [1 + i % 7 for i in range(n)],
                },
                "dictionaries": {"kind": [f"k{i:02d}" for i in range(40)]},
            }
        )
    )
    page = preview.write_previews(p, out_dir=tmp_path / "o").html
    load = load_page(driver, page)
    assert (load.drawn, load.surface) == (n, "webgl")
    assert [m for m in load.console if m.startswith("SEVERE")] == []
    # The WebGL canvas holds the drawing: some pixels are not the white background.
    painted = driver.execute_script("""
      const c = document.querySelector('#plot canvas');
      const gl = c.getContext('webgl', { preserveDrawingBuffer: true });
      const px = new Uint8Array(c.width * c.height * 4);
      gl.readPixels(0, 0, c.width, c.height, gl.RGBA, gl.UNSIGNED_BYTE, px);
      let n = 0; for (let i = 0; i < px.length; i += 4) if (px[i] !== 255 || px[i+1] !== 255) n++;
      return n;""")
    assert painted > 1000


def test_measure_pages_reports_medians_of_three_loads(
    pages: dict[str, Path], demo_payloads: dict[str, Path]
) -> None:
    [m] = measure_pages([pages["province-rates"]])
    n = _elements(demo_payloads["province-rates"])
    assert (m["loads"], m["surface"], m["drawn"]) == (3, _expected_surface(n), n)
    assert math.isfinite(m["parse_ms"]) and math.isfinite(m["draw_ms"])


def test_cli_preview_measure_json_reports_finite_medians(
    demo_payloads: dict[str, Path], tmp_path: Path
) -> None:
    from click.testing import CliRunner

    from reduce.cli import main

    src = demo_payloads["town-flows"]
    res = CliRunner().invoke(
        main, ["preview", str(src), "--out", str(tmp_path), "--measure", "--json"]
    )
    assert res.exit_code == 0, res.output
    [entry] = json.loads(res.output)
    m = entry["measured"]
    assert m["loads"] == 3 and m["drawn"] == _elements(src)
    assert math.isfinite(m["parse_ms"]) and math.isfinite(m["draw_ms"])


def test_audit_measure_adds_timings_and_max_draw_ms_is_a_finding(
    demo_payloads: dict[str, Path], monkeypatch: pytest.MonkeyPatch
) -> None:
    from click.testing import CliRunner

    from reduce.cli import main

    src = str(demo_payloads["province-rates"])
    res = CliRunner().invoke(main, ["audit", src, "--measure", "--json"])
    assert res.exit_code == 0, res.output
    [f] = json.loads(res.output)["files"]
    assert f["measured"]["surface"] == "svg" and math.isfinite(f["measured"]["draw_ms"])
    # The budget check itself, on a fixed timing (timings are never asserted in tests).
    import reduce.browser

    monkeypatch.setattr(
        reduce.browser,
        "measure_payloads",
        lambda paths: {
            Path(p): {
                "surface": "svg",
                "drawn": 72,
                "shapes": 25,
                "loads": 3,
                "parse_ms": 1.0,
                "draw_ms": 12.5,
            }
            for p in paths
        },
    )
    res = CliRunner().invoke(main, ["audit", src, "--measure", "--max-draw-ms", "10", "--quiet"])
    assert res.exit_code == 1
    assert res.output == f"{src}: page draws in 12.5 ms > --max-draw-ms 10 ms\n"
    res = CliRunner().invoke(main, ["audit", src, "--measure", "--max-draw-ms", "20", "--quiet"])
    assert res.exit_code == 0 and res.output == ""


def test_audit_max_draw_ms_needs_measure(demo_payloads: dict[str, Path]) -> None:
    from click.testing import CliRunner

    from reduce.cli import main

    res = CliRunner().invoke(
        main, ["audit", str(demo_payloads["province-rates"]), "--max-draw-ms", "5"]
    )
    assert res.exit_code == 2 and "--max-draw-ms needs --measure" in res.output


def test_a_rows_layout_payload_is_drawn(tmp_path: Path, driver: Any) -> None:
    rows = [
        {"region": r, "kind": k, "reports": n}
        for r, k, n in [("a", "x", 3), ("a", "y", 5), ("b", "x", 2)]
    ]
    p = tmp_path / "rows.json"
    p.write_bytes(orjson.dumps(rows))
    load = load_page(driver, preview.write_previews(p, out_dir=tmp_path / "o").html)
    assert (load.drawn, load.surface, load.shapes) == (3, "svg", 3)
    assert [m for m in load.console if m.startswith("SEVERE")] == []
