"""The benchmark's synthetic event table: deterministic, generated in chunks, cached on disk.

Everything is invented and drawn from ``numpy.random.default_rng`` streams seeded with a fixed
seed (one stream for the layout of the world, one per chunk of rows), so the same row count
always gives the same rows, whatever else ran before. Memory stays at about one chunk
(1,000,000 rows) however many rows are written.

Columns of ``events/part-NNN.parquet`` (10,000,000 rows per file, 1,000,000 per row group):

- ``ts``     Datetime(us, UTC): one calendar year (2025), with a daily cycle;
- ``lat``, ``lon``  Float64: clustered around 50 invented centres in open ocean
  (latitude -40..-30, longitude -125..-110); about 0.1% of rows have an invalid coordinate
  (null latitude, latitude 95 or longitude 200);
- ``region`` String: 30 invented codes, mostly the region of the row's centre;
- ``kind``   String: 15 invented categories with Zipf-like frequencies;
- ``value``  Float64: log-normal;
- ``who``    Int64: about 100,000 ids, a few of them very active.

``population.csv`` (``region,pop``) holds a denominator per region code.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

# numpy and pyarrow are imported where they are used: the harness imports this module for
# the file layout only, and must stay small (a child's peak RSS as the kernel reports it
# includes the RSS of the process that forked it).
if TYPE_CHECKING:
    import numpy as np
    import pyarrow as pa

SEED = 20_250_101
GENERATOR_VERSION = 1
CHUNK_ROWS = 1_000_000
FILE_ROWS = 10_000_000

N_CENTRES = 50
N_REGIONS = 30
N_WHO = 100_000
INVALID_SHARE = 0.001
LAT_RANGE = (-40.0, -30.0)
LON_RANGE = (-125.0, -110.0)
YEAR_START_US = 1_735_689_600_000_000  # 2025-01-01T00:00:00Z in microseconds
YEAR_US = 365 * 86_400 * 1_000_000

KINDS = (
    "drift",
    "ping",
    "flare",
    "swell",
    "glint",
    "echo",
    "ripple",
    "haze",
    "spark",
    "tide",
    "bloom",
    "squall",
    "murmur",
    "sheen",
    "vortex",
)
REGIONS = tuple(f"R{i:02d}" for i in range(N_REGIONS))


def schema() -> pa.Schema:
    import pyarrow as pa

    return pa.schema(
        [
            ("ts", pa.timestamp("us", tz="UTC")),
            ("lat", pa.float64()),
            ("lon", pa.float64()),
            ("region", pa.string()),
            ("kind", pa.string()),
            ("value", pa.float64()),
            ("who", pa.int64()),
        ]
    )


@dataclass(frozen=True)
class World:
    """The fixed layout every chunk draws from: centres, their spread, weights and regions."""

    lat: np.ndarray
    lon: np.ndarray
    sigma: np.ndarray  # degrees
    weight: np.ndarray  # sums to 1
    region: np.ndarray  # index into REGIONS
    kind_p: np.ndarray  # sums to 1
    hour_p: np.ndarray  # 24 values, sums to 1


def world() -> World:
    import numpy as np

    rng = np.random.default_rng([SEED, 0])
    lat = rng.uniform(LAT_RANGE[0] + 0.5, LAT_RANGE[1] - 0.5, N_CENTRES)
    lon = rng.uniform(LON_RANGE[0] + 0.5, LON_RANGE[1] - 0.5, N_CENTRES)
    # Towns of many sizes: a heavy-tailed weight and a spread of 2..30 km (common practice
    # for a synthetic urban mix, not a measured distribution).
    sigma = np.clip(rng.lognormal(np.log(0.07), 0.6, N_CENTRES), 0.02, 0.3)
    w = 1.0 / np.arange(1, N_CENTRES + 1) ** 0.9
    w = w[rng.permutation(N_CENTRES)]
    region = np.concatenate(
        [np.arange(N_REGIONS), rng.integers(0, N_REGIONS, N_CENTRES - N_REGIONS)]
    )
    kind_p = 1.0 / np.arange(1, len(KINDS) + 1) ** 1.1
    hours = np.arange(24)
    hour_p = 0.3 / 24 + 0.7 * np.exp(-0.5 * ((hours - 14) / 4.0) ** 2)
    return World(lat, lon, sigma, w / w.sum(), region, kind_p / kind_p.sum(), hour_p / hour_p.sum())


def chunk(w: World, index: int, rows: int) -> pa.Table:
    """Rows of chunk ``index`` (always the same for the same index and row count)."""
    import numpy as np
    import pyarrow as pa

    rng = np.random.default_rng([SEED, 1, index])
    c = rng.choice(N_CENTRES, size=rows, p=w.weight)
    lat = w.lat[c] + rng.standard_normal(rows) * w.sigma[c]
    lon = w.lon[c] + rng.standard_normal(rows) * w.sigma[c] * 1.25
    day = rng.integers(0, 365, rows)
    hour = rng.choice(24, size=rows, p=w.hour_p)
    us = rng.integers(0, 3_600_000_000, rows)
    ts = YEAR_START_US + day * 86_400_000_000 + hour * 3_600_000_000 + us
    region = w.region[c]
    moved = rng.random(rows) < 0.03  # a few rows carry another region's code
    region[moved] = rng.integers(0, N_REGIONS, int(moved.sum()))
    kind = rng.choice(len(KINDS), size=rows, p=w.kind_p)
    value = rng.lognormal(1.0, 0.8, rows)
    who = np.minimum((N_WHO * rng.random(rows) ** 2).astype(np.int64), N_WHO - 1)
    bad = np.flatnonzero(rng.random(rows) < INVALID_SHARE)
    how = rng.integers(0, 3, bad.size)
    lat_null = np.zeros(rows, dtype=bool)
    lat_null[bad[how == 0]] = True
    lat[bad[how == 1]] = 95.0
    lon[bad[how == 2]] = 200.0
    return pa.Table.from_arrays(
        [
            pa.array(ts, type=pa.int64()).cast(pa.timestamp("us", tz="UTC")),
            pa.array(lat, mask=lat_null),
            pa.array(lon),
            pa.array(REGIONS, type=pa.string()).take(pa.array(region)),
            pa.array(KINDS, type=pa.string()).take(pa.array(kind)),
            pa.array(value),
            pa.array(who),
        ],
        schema=schema(),
    )


def population() -> str:
    import numpy as np

    rng = np.random.default_rng([SEED, 2])
    pop = np.round(rng.lognormal(np.log(400_000), 0.9, N_REGIONS)).astype(np.int64) + 20_000
    lines = ["region,pop"] + [f"{r},{p}" for r, p in zip(REGIONS, pop)]
    return "\n".join(lines) + "\n"


def parse_rows(text: str) -> int:
    """``1M``, ``20M``, ``100M``, ``500k`` or a plain integer (underscores allowed)."""
    t = text.strip().lower().replace("_", "")
    mult = 1
    if t.endswith("m"):
        t, mult = t[:-1], 1_000_000
    elif t.endswith("k"):
        t, mult = t[:-1], 1_000
    try:
        n = round(float(t) * mult)
    except ValueError:
        raise ValueError(f"--rows {text!r}: use e.g. 1M, 20M, 100M or a plain integer") from None
    if n <= 0:
        raise ValueError(f"--rows {text!r}: must be positive")
    return n


def label(rows: int) -> str:
    if rows % 1_000_000 == 0:
        return f"{rows // 1_000_000}M"
    if rows % 1_000 == 0:
        return f"{rows // 1_000}k"
    return str(rows)


def estimate_bytes(rows: int) -> int:
    """Bytes on disk, measured at about 33 per row (zstd parquet; floats barely compress)."""
    return rows * 36


def _want(rows: int) -> dict[str, int]:
    return {
        "rows": rows,
        "seed": SEED,
        "version": GENERATOR_VERSION,
        "chunk_rows": CHUNK_ROWS,
        "file_rows": FILE_ROWS,
    }


def complete(root: Path, rows: int) -> bool:
    """True when the data folder for ``rows`` holds a finished table of this generator."""
    try:
        return bool(json.loads((root / label(rows) / "DONE.json").read_text()) == _want(rows))
    except (OSError, ValueError):
        return False


def ensure(root: Path, rows: int, *, log: Callable[[str], None] = print) -> Path:
    """The data folder for ``rows`` rows under ``root``, generated unless already complete."""
    import pyarrow.parquet as pq

    d = root / label(rows)
    marker = d / "DONE.json"
    if complete(root, rows):
        return d
    free = shutil.disk_usage(root if root.exists() else root.parent).free
    need = estimate_bytes(rows)
    if need > free * 0.8:
        raise SystemExit(
            f"bench: {rows:,} rows need about {need / 1e9:.1f} GB but only "
            f"{free / 1e9:.1f} GB are free under {root}; free some space"
        )
    if d.exists():
        shutil.rmtree(d)
    ev = d / "events"
    ev.mkdir(parents=True)
    w = world()
    t0 = time.perf_counter()
    done = 0
    n_files = -(-rows // FILE_ROWS)
    for f in range(n_files):
        f_rows = min(FILE_ROWS, rows - f * FILE_ROWS)
        tmp = ev / f".part-{f:03d}.parquet.tmp"
        with pq.ParquetWriter(tmp, schema(), compression="zstd") as wr:
            written = 0
            while written < f_rows:
                n = min(CHUNK_ROWS, f_rows - written)
                wr.write_table(
                    chunk(w, (f * FILE_ROWS + written) // CHUNK_ROWS, n), row_group_size=CHUNK_ROWS
                )
                written += n
        os.replace(tmp, ev / f"part-{f:03d}.parquet")
        done += f_rows
        log(f"bench: generated {done:,} / {rows:,} rows ({time.perf_counter() - t0:.0f} s)")
    (d / "population.csv").write_text(population())
    marker.write_text(json.dumps(_want(rows)))
    return d


def event_files(d: Path) -> list[Path]:
    return sorted((d / "events").glob("part-*.parquet"))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Generate the benchmark's synthetic event table.")
    ap.add_argument("--rows", default="1M", help="1M, 20M, 100M or a plain integer")
    ap.add_argument("--root", type=Path, default=Path(__file__).resolve().parent / "data")
    a = ap.parse_args(argv)
    try:
        rows = parse_rows(a.rows)
    except ValueError as e:
        ap.error(str(e))
    a.root.mkdir(parents=True, exist_ok=True)
    print(ensure(a.root, rows))
    return 0


if __name__ == "__main__":
    sys.exit(main())
