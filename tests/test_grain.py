"""Hex resolutions a run that keeps no partial does not scan (reduce.grain).

The first rows of the source (``REDUCE_PROBE_ROWS``, lowered here so that small tables have
a slice and a rest) show that the finest resolutions cannot fit the budget; the run scans
the coarser ones only. The reference for every published level and byte is the same run
with the judgement turned off (every resolution scanned), and the level ``reduce.ladder``
finds when it measures every level exactly.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import reduce
from reduce import aggregate, grain
from reduce.sizes import parse_size
from tests._builders import random_events, write_case

SLICE = 20_000


@pytest.fixture(autouse=True)
def _small_slice(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("REDUCE_PROBE_ROWS", str(SLICE))


def _case(tmp: Path, *, budget: str = "50KB", **kw: Any) -> Path:
    # Scattered points: at resolution 9 almost every event is a group of its own.
    rng = np.random.default_rng(3)
    events = random_events(rng, 40_000, span_days=28, lat=(10.0, 11.5), lon=(20.0, 21.5))
    spec: dict[str, Any] = {
        "source": {"time": "t", "lat": "lat", "lon": "lon"},
        "group": {
            "hex": {"levels": [9, 8, 6, 5]},
            "time": {"levels": ["1d", "1w"], "zone": "UTC"},
            "category": {"column": "kind"},
        },
        "measures": {"n": "count", "sx": {"sum": "x"}},
        "prune": {"top": {"k": [3, 1], "by": "n"}},
        "budget": {"max": budget, "on": "gzip", "order": ["top", "time", "hex"]},
    }
    spec.update(kw)
    return write_case(tmp, events, **spec)


def _scans(monkeypatch: pytest.MonkeyPatch, *, whole_only: bool = True) -> list[tuple[int, ...]]:
    """The hex ladders of the scans of the runs that follow: of the whole source (one file
    at a time with the cache: ``whole_only=False``)."""
    seen: list[tuple[int, ...]] = []
    real = aggregate.scan_partial

    def spy(recipe: Any, src: Any, **kw: Any) -> Any:
        if kw.get("whole", True) or not whole_only:
            seen.append(tuple(recipe.hex.levels))
        return real(recipe, src, **kw)

    monkeypatch.setattr(aggregate, "scan_partial", spy)
    return seen


def _full_scan_run(path: Path, out: Path, budget: str) -> reduce.RunResult:
    real = grain.eligible
    grain.eligible = lambda *a, **k: False  # type: ignore[assignment]
    try:
        return reduce.run(path, out_dir=out, budget=budget, use_cache=False)
    finally:
        grain.eligible = real  # type: ignore[assignment]


@pytest.mark.parametrize("budget", ["30KB", "50KB", "60KB"])
def test_unscanned_resolutions_change_no_published_byte(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, budget: str
) -> None:
    path = _case(tmp_path, budget=budget)
    scans = _scans(monkeypatch)
    lines: list[str] = []
    res = reduce.run(
        path, out_dir=tmp_path / "skip", budget=budget, use_cache=False, progress=lines.append
    )
    assert scans and scans[0][0] < 9, scans  # the finest resolution was not scanned
    assert any(line.startswith("not scanning hex 9") for line in lines), lines
    full = _full_scan_run(path, tmp_path / "full", budget)
    assert scans[-1] == (9, 8, 6, 5)  # the reference scanned every resolution
    assert res.path is not None and full.path is not None
    assert res.fit.level == full.fit.level
    assert res.path.read_bytes() == full.path.read_bytes()
    # ... and it is the finest level that fits when every level is measured exactly.
    exact = reduce.ladder(path, budget=budget, use_cache=False)
    assert res.fit.level == exact.level
    limit = parse_size(budget)
    assert res.fit.chosen is not None and (res.fit.chosen.gzip or 0) <= limit


def test_levels_not_scanned_are_estimated_over_and_the_manifest_says_why(
    tmp_path: Path,
) -> None:
    path = _case(tmp_path)
    res = reduce.run(path, out_dir=tmp_path / "out", use_cache=False)
    assert res.manifest is not None and res.path is not None
    skipped = [c for c in res.fit.candidates if "not scanned" in c.note]
    assert skipped, "the search asked about no level that was not scanned"
    for c in skipped:
        assert c.level["hex"] in (9, 8)
        assert c.fits is False and c.estimated and c.rows_estimated
        assert c.guess is not None and c.guess > grain.MARGIN * parse_size("50KB")
        assert f"first {SLICE:,} rows at hex {c.level['hex']}" in c.note
    hexes = {c.level["hex"] for c in skipped}
    frontier = [f for f in res.manifest["frontier"] if f["level"]["hex"] in hexes]
    assert frontier and all(f["estimated"] and f["rows_estimated"] for f in frontier)
    assert all(f["fits"] is False for f in frontier)
    notes = res.manifest["notes"]
    assert any(n.startswith("hex 9, 8") and "not scanned" in n for n in notes), notes
    on_disk = json.loads(Path(str(res.path) + ".manifest.json").read_text())
    assert on_disk["notes"] == notes


def test_the_rows_of_an_unscanned_level_are_a_lower_bound(tmp_path: Path) -> None:
    """What the slice showed never exceeds the level's rows over the whole source."""
    path = _case(tmp_path)
    res = reduce.fit(path, use_cache=False)
    exact = reduce.ladder(path, use_cache=False)
    rows = {tuple(sorted(c.level.items())): c.rows for c in exact.candidates}
    skipped = [c for c in res.candidates if "not scanned" in c.note]
    assert skipped
    for c in skipped:
        assert c.rows <= rows[tuple(sorted(c.level.items()))]


@pytest.mark.parametrize(
    "why",
    ["cache", "min_count", "budget fits hex 9", "small source", "exact ladder"],
)
def test_every_resolution_is_scanned_when_a_run_cannot_skip(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, why: str
) -> None:
    kw: dict[str, Any] = {}
    budget = "50KB"
    if why == "min_count":
        kw["prune"] = {"top": {"k": [3, 1], "by": "n"}, "min_count": {"min": 2}}
    if why == "budget fits hex 9":
        budget = "20MB"
    if why == "small source":
        monkeypatch.setenv("REDUCE_PROBE_ROWS", "1000000")
    path = _case(tmp_path, budget=budget, **kw)
    scans = _scans(monkeypatch, whole_only=False)
    if why == "exact ladder":
        reduce.ladder(path, use_cache=False)
    else:
        reduce.run(path, out_dir=tmp_path / "out", use_cache=(why == "cache"))
    assert scans and all(s[0] == 9 for s in scans), scans


def test_a_finest_time_bin_the_budget_cannot_afford_is_not_scanned(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Hourly bins are over the budget even at the coarsest resolution on the first rows:
    the scan leaves them out (and the resolutions too fine), and publishes what scanning
    everything publishes."""
    path = _case(
        tmp_path,
        group={
            "hex": {"levels": [9, 8, 6, 5]},
            "time": {"levels": ["1h", "1d", "1w"], "zone": "UTC"},
            "category": {"column": "kind"},
        },
    )
    seen: list[tuple[str, ...]] = []
    real = aggregate.scan_partial

    def spy(recipe: Any, src: Any, **kw: Any) -> Any:
        if kw.get("whole", True):
            seen.append(tuple(t.text for t in recipe.time.levels))
        return real(recipe, src, **kw)

    monkeypatch.setattr(aggregate, "scan_partial", spy)
    res = reduce.run(path, out_dir=tmp_path / "skip", use_cache=False)
    assert seen and seen[0] == ("1d", "1w"), seen
    assert res.manifest is not None and any("time 1h" in n for n in res.manifest["notes"])
    hourly = [c for c in res.fit.candidates if c.level["time"] == "1h"]  # if the search asked
    assert all(c.fits is False and "was not scanned" in c.note for c in hourly)
    full = _full_scan_run(path, tmp_path / "full", "50KB")
    assert seen[-1] == ("1h", "1d", "1w")
    assert res.path is not None and full.path is not None
    assert res.fit.level == full.fit.level
    assert res.path.read_bytes() == full.path.read_bytes()


def test_the_ladder_says_what_was_not_scanned(tmp_path: Path) -> None:
    """``reduce ladder --no-cache`` shows the levels not scanned as estimates and names
    them in a note line."""
    from tests._builders import invoke

    path = _case(tmp_path)
    code, out, err = invoke("ladder", str(path), "--no-cache")
    assert code == 0, err
    note = next(line for line in out.splitlines() if line.startswith("note: "))
    assert note.startswith("note: hex 9, 8") and "not scanned" in note
    rows = [line.split() for line in out.splitlines() if line.lstrip("* ").startswith("8 ")]
    assert rows and all(r[-1] == "~no" for r in rows), out
