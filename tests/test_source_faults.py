"""Sources checked after the scan as before it, and NDJSON lines named when they break.

A source file replaced while it is scanned gives a result that may mix two versions: it is
neither published nor cached, and the run exits 2 naming the file (reduce.source
``OpenSource.check_unchanged``, called by ``Reducer.finest`` right after the scan). The
change is seen by size, modification time or a hash of the parquet footer (which holds
every row group's statistics and offsets, so any rewrite of the data changes it; parquet
format specification). A malformed NDJSON line is one error line naming the file and the
line number, exit 2.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from click.testing import CliRunner

import reduce
from reduce import aggregate
from reduce.cli import main
from reduce.errors import SourceError
from reduce.source import file_state, open_source
from tests._builders import random_events, write_case


def _case(tmp: Path) -> Path:
    rng = np.random.default_rng(4)
    return write_case(
        tmp,
        random_events(rng, 3000),
        source={"time": "t", "lat": "lat", "lon": "lon"},
        group={"hex": {"levels": [8, 6]}},
        measures={"n": "count"},
    )


@pytest.mark.parametrize("use_cache", [True, False])
def test_source_replaced_mid_scan_is_neither_published_nor_cached(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, use_cache: bool
) -> None:
    recipe = _case(tmp_path / "case")
    events = tmp_path / "case" / "events.parquet"
    first = reduce.run(recipe, out_dir=tmp_path / "out")
    assert first.path is not None
    old = first.path.read_bytes()
    cache_root = Path(os.environ["REDUCE_CACHE_DIR"])
    entries_before = sorted(p.name for p in cache_root.iterdir()) if cache_root.is_dir() else []
    # Another version of the file lands while the scan reads it.
    pl.read_parquet(events).head(2000).write_parquet(events)
    real = aggregate.scan_partial

    def scan_then_replace(*args, **kwargs):  # type: ignore[no-untyped-def]
        out = real(*args, **kwargs)
        pl.read_parquet(events).head(1000).write_parquet(events)
        return out

    monkeypatch.setattr(aggregate, "scan_partial", scan_then_replace)
    res = CliRunner().invoke(
        main,
        [
            "run",
            str(recipe),
            "--out",
            str(tmp_path / "out"),
            "--quiet",
            *([] if use_cache else ["--no-cache"]),
        ],
    )
    assert res.exit_code == 2, res.output
    assert res.stderr.splitlines() == [
        f"error: {events}: changed while it was being read (size, modification time or "
        "content); nothing was published or cached: run again once the file is complete"
    ]
    assert first.path.read_bytes() == old
    after = sorted(p.name for p in cache_root.iterdir()) if cache_root.is_dir() else []
    assert after == entries_before


def test_footer_change_with_same_size_and_time_is_seen(tmp_path: Path) -> None:
    recipe = _case(tmp_path / "case")
    events = tmp_path / "case" / "events.parquet"
    src = open_source(reduce.load_recipe(recipe))
    st = events.stat()
    data = bytearray(events.read_bytes())
    data[-20] ^= 0x01  # inside the footer (the last 8 bytes are its length and magic)
    events.write_bytes(bytes(data))
    os.utime(events, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert events.stat().st_size == st.st_size and events.stat().st_mtime_ns == st.st_mtime_ns
    assert src.changed_files() == [events]
    with pytest.raises(SourceError, match="changed while it was being read"):
        src.check_unchanged()


def test_unchanged_source_passes_the_check(tmp_path: Path) -> None:
    recipe = _case(tmp_path / "case")
    src = open_source(reduce.load_recipe(recipe))
    assert src.changed_files() == []
    assert file_state(src.files[0]) == src.states[0]


@pytest.mark.parametrize(
    ("line", "why"),
    [
        (
            '{"ts": "2025-03-01T10:00:00", "lat": 10.5, "lon": ',
            "not valid JSON (unexpected end of data)",
        ),
        ("[1, 2]", "a JSON list, not an object"),
        (
            '{"ts": "2025-03-01T10:00:00", "lat": "north", "lon": 1.0}',
            "key 'lat' holds 'north', which cannot be read as Float64 like the lines before it",
        ),
    ],
)
@pytest.mark.parametrize(
    "group", ["hex = { levels = [6] }", 'hex = { levels = [6] }\ntime = { levels = ["1d"] }']
)
def test_malformed_ndjson_line_is_named_with_its_number(
    tmp_path: Path, line: str, why: str, group: str
) -> None:
    rows = [
        json.dumps(
            {"ts": f"2025-03-0{1 + i % 9}T10:00:00", "lat": 10 + i / 1e5, "lon": 20 + i / 1e5}
        )
        for i in range(12000)
    ]
    rows[11000] = line  # past the rows polars infers the schema from
    (tmp_path / "ev.ndjson").write_text("\n".join(rows) + "\n")
    (tmp_path / "r.toml").write_text(
        'name = "nd"\n[source]\npath = "ev.ndjson"\ntime = "ts"\nlat = "lat"\nlon = "lon"\n'
        f'[group]\n{group}\n[measures]\nn = "count"\n'
    )
    res = CliRunner().invoke(
        main,
        ["run", str(tmp_path / "r.toml"), "--no-cache", "--quiet", "--out", str(tmp_path / "out")],
    )
    assert res.exit_code == 2, res.output
    shown = tmp_path / "ev.ndjson"
    try:
        shown = shown.relative_to(Path.cwd())
    except ValueError:
        pass
    assert res.stderr.splitlines() == [
        f"error: {shown}: line 11001: {why}; fix or remove that line (NDJSON holds one JSON "
        "object per line)"
    ]
    assert not (tmp_path / "out").exists()
