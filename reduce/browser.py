"""Measuring preview pages in a real browser: headless Chromium driven by selenium.

This module owns the browser. It uses the Debian ``chromium`` and ``chromium-driver``
packages (``/usr/bin/chromium``, ``/usr/bin/chromedriver``, or ``$REDUCE_CHROMIUM`` and
``$REDUCE_CHROMEDRIVER``), passes the driver's path explicitly so that selenium never
downloads a browser or a driver, and starts each browser with a fresh profile folder and
no background networking. :func:`measure_pages` loads each page a few times and returns
the median parse and draw milliseconds the page wrote on its ``<body>``.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import statistics
import tempfile
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from reduce.errors import ReduceError

INSTALL_HINT = (
    "install it with: apt-get install -y chromium chromium-driver (as root), "
    "and pip install selenium"
)
# Flags for a headless run as root in a container, with nothing fetched from the network.
CHROMIUM_FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-dev-shm-usage",
    # WebGL without a GPU: the software rasterizer (SwiftShader) behind ANGLE.
    "--use-angle=swiftshader",
    "--enable-unsafe-swiftshader",
)
LOADS = 3
PAGE_TIMEOUT_S = 60


class BrowserMissing(ReduceError):
    """No usable headless browser here (exit 2, with the line saying how to install it)."""


class PageError(ReduceError):
    """A preview page did not finish drawing (a console error or a timeout)."""


def browser_paths() -> tuple[Path, Path]:
    """The Chromium binary and its driver; raises :class:`BrowserMissing` with the fix."""
    chromium = Path(os.environ.get("REDUCE_CHROMIUM") or "/usr/bin/chromium")
    driver = Path(os.environ.get("REDUCE_CHROMEDRIVER") or "/usr/bin/chromedriver")
    for p, what in ((chromium, "chromium"), (driver, "chromedriver")):
        if not (p.is_file() and os.access(p, os.X_OK)):
            raise BrowserMissing(f"{p}: no {what} here to measure pages; {INSTALL_HINT}")
    try:
        import selenium  # noqa: F401
    except ImportError:
        raise BrowserMissing(f"selenium is not installed; {INSTALL_HINT}") from None
    return chromium, driver


@contextlib.contextmanager
def browser(*, window: tuple[int, int] = (1000, 760)) -> Iterator[Any]:
    """A headless Chromium WebDriver with a fresh profile; closed and cleaned up after."""
    chromium, driver = browser_paths()
    from selenium import webdriver
    from selenium.common.exceptions import WebDriverException
    from selenium.webdriver.chrome.service import Service

    profile = tempfile.mkdtemp(prefix="reduce-chromium-")
    opts = webdriver.ChromeOptions()
    opts.binary_location = str(chromium)
    for flag in CHROMIUM_FLAGS:
        opts.add_argument(flag)
    opts.add_argument(f"--user-data-dir={profile}")
    opts.add_argument(f"--window-size={window[0]},{window[1]}")
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    drv = None
    try:
        try:
            drv = webdriver.Chrome(service=Service(executable_path=str(driver)), options=opts)
        except WebDriverException as e:
            first = (str(e.msg or e).strip().splitlines() or [""])[0]
            raise BrowserMissing(
                f"{chromium}: the browser did not start ({first}); {INSTALL_HINT}"
            ) from None
        drv.set_page_load_timeout(PAGE_TIMEOUT_S)
        yield drv
    finally:
        if drv is not None:
            with contextlib.suppress(Exception):
                drv.quit()
        shutil.rmtree(profile, ignore_errors=True)


@dataclass
class PageLoad:
    surface: str
    drawn: int
    shapes: int
    parse_ms: float
    draw_ms: float
    console: list[str]


def load_page(drv: Any, page: Path) -> PageLoad:
    """Open ``page`` (a file) and wait until its ``<body>`` says it has drawn."""
    from selenium.common.exceptions import TimeoutException
    from selenium.webdriver.support.ui import WebDriverWait

    drv.get(page.resolve().as_uri())
    try:
        WebDriverWait(drv, PAGE_TIMEOUT_S).until(
            lambda d: d.execute_script(
                "return document.body && (document.body.dataset.drawn !== undefined "
                "|| document.body.dataset.error !== undefined)"
            )
        )
    except TimeoutException:
        raise PageError(f"{page}: the page did not finish drawing in {PAGE_TIMEOUT_S} s") from None
    d = drv.execute_script("return Object.assign({}, document.body.dataset)")
    logs = [f"{e.get('level')}: {e.get('message')}" for e in drv.get_log("browser")]
    if "error" in d:
        raise PageError(f"{page}: the page failed to draw ({d['error']})")
    return PageLoad(
        d["surface"],
        int(d["drawn"]),
        int(d.get("shapes", 0)),
        float(d["parseMs"]),
        float(d["drawMs"]),
        logs,
    )


def measure_pages(pages: Sequence[Path], *, loads: int = LOADS) -> list[dict[str, Any]]:
    """Median parse and draw milliseconds of ``loads`` loads of each page (one browser)."""
    out = []
    with browser() as drv:
        for page in pages:
            runs = [load_page(drv, page) for _ in range(loads)]
            errors = [m for r in runs for m in r.console if m.startswith("SEVERE")]
            if errors:
                raise PageError(f"{page}: the page logged an error: {errors[0]}")
            out.append(
                {
                    "page": str(page),
                    "surface": runs[0].surface,
                    "drawn": runs[0].drawn,
                    "shapes": runs[0].shapes,
                    "loads": loads,
                    "parse_ms": round(statistics.median(r.parse_ms for r in runs), 3),
                    "draw_ms": round(statistics.median(r.draw_ms for r in runs), 3),
                }
            )
    return out


def measure_payloads(paths: Sequence[Path]) -> dict[Path, dict[str, Any]]:
    """Preview pages of ``paths`` written to a temporary folder and measured (see
    :func:`measure_pages`); files preview cannot draw (CSV, Arrow, other) are left out."""
    from reduce.preview import PreviewError, write_previews

    browser_paths()  # fail first, with the install line, when there is no browser
    with tempfile.TemporaryDirectory(prefix="reduce-measure-") as tmp:
        pages: dict[Path, Path] = {}
        for i, p in enumerate(paths):
            try:
                pages[p] = write_previews(p, out_dir=Path(tmp) / str(i)).html
            except PreviewError:
                continue
        results = measure_pages(list(pages.values())) if pages else []
        return {p: {k: v for k, v in m.items() if k != "page"} for p, m in zip(pages, results)}
