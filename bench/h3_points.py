"""H3 indexing throughput: polars-h3 ``latlng_to_cell`` over the benchmark table's points.

    python bench/h3_points.py [--rows 20M] [--points N] [--res 9] [--repeat 5] [--json FILE]

Reads the valid coordinates of the benchmark table (generating it if absent; at most
``--points`` of them, default all) into memory, then times indexing them all at resolution
``--res``, ``--repeat`` times, on the streaming engine (morsels on every thread polars may
use: POLARS_MAX_THREADS, default every core) and in one eager call (one thread), and prints
the median points per second and points per CPU-second (which other processes competing for
the cores do not lower). The read is not timed. With
``--compare`` it also times the ``h3`` bindings called once per point on a 200,000-point
sample, for scale.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import synth  # noqa: E402

DATA = Path(__file__).resolve().parent / "data"


def measure(
    data: Path, *, points: int | None, res: int, repeat: int, compare: bool
) -> dict[str, object]:
    import polars as pl
    import polars_h3 as plh3

    lat, lon = pl.col("lat"), pl.col("lon")
    lf = (
        pl.scan_parquet([str(p) for p in synth.event_files(data)])
        .select("lat", "lon")
        .filter(lat.is_not_null() & lon.is_not_null() & (lat.abs() <= 90) & (lon.abs() <= 180))
    )
    if points is not None:
        lf = lf.head(points)
    df = lf.collect()
    n = df.height
    out: dict[str, object] = {"points": n, "res": res, "threads": pl.thread_pool_size()}
    cells = None
    # "streaming" splits the points into morsels indexed on every thread, as reduce's scan
    # does; "eager" indexes them in one call of the plugin (one thread).
    for mode in ("streaming", "eager"):
        times, cpu = [], []
        for _ in range(repeat):
            t, c = time.perf_counter(), time.process_time()
            if mode == "streaming":
                cells = (
                    df.lazy()
                    .select(plh3.latlng_to_cell("lat", "lon", res).alias("c"))
                    .collect(engine="streaming")
                )
            else:
                cells = df.select(plh3.latlng_to_cell("lat", "lon", res).alias("c"))
            times.append(time.perf_counter() - t)
            cpu.append(time.process_time() - c)
        assert cells is not None and cells.height == n
        med = statistics.median(times)
        out[mode] = {
            "seconds": times,
            "cpu_seconds": cpu,
            "median_seconds": med,
            "points_per_second": n / med,
            # Per CPU-second of the process: not lowered by other processes competing for
            # the cores (only by their effect on caches and clocks).
            "points_per_cpu_second": n / statistics.median(cpu),
        }
    out["points_per_second"] = out["streaming"]["points_per_second"]  # type: ignore[index]
    out["points_per_cpu_second"] = out["streaming"]["points_per_cpu_second"]  # type: ignore[index]
    if compare:
        import h3

        sample = df.head(200_000)
        la, lo = sample.get_column("lat").to_list(), sample.get_column("lon").to_list()
        t = time.perf_counter()
        ref = [h3.latlng_to_cell(a, b, res) for a, b in zip(la, lo)]
        dt = time.perf_counter() - t
        assert cells is not None
        got = cells.head(len(ref)).select(plh3.int_to_str("c")).to_series().to_list()
        out["h3_loop_points_per_second"] = len(ref) / dt
        out["agrees_with_h3"] = list(got) == ref
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", default="20M", help="table size: 1M, 20M, 100M or an integer")
    ap.add_argument("--points", type=int, default=None, help="index at most this many points")
    ap.add_argument("--res", type=int, default=9)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--compare", action="store_true", help="also time the h3 bindings")
    ap.add_argument("--json", type=Path, default=None, help="write the figures here")
    a = ap.parse_args(argv)
    data = synth.ensure(DATA, synth.parse_rows(a.rows))
    res = measure(data, points=a.points, res=a.res, repeat=a.repeat, compare=a.compare)
    for mode in ("streaming", "eager"):
        m = res[mode]
        assert isinstance(m, dict)
        print(
            f"H3 latlng_to_cell res {a.res}, {mode:>9}: {res['points']:,} points, "
            f"{res['threads']} threads: median {m['median_seconds']:.3f} s = "
            f"{m['points_per_second'] / 1e6:.2f} M points/s "
            f"({m['points_per_cpu_second'] / 1e6:.2f} M per CPU-second)"
        )
    if "h3_loop_points_per_second" in res:
        print(
            f"h3 bindings, one call per point: "
            f"{float(res['h3_loop_points_per_second']) / 1e6:.2f} M points/s "  # type: ignore[arg-type]
            f"(cells agree: {res['agrees_with_h3']})"
        )
    if a.json:
        a.json.write_text(json.dumps(res, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
