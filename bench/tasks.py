"""The peer tasks of the benchmark, one per process: ``python bench/tasks.py TASK DATA_DIR``.

- ``c``: the bare polars query behind the finest level of recipe (a): scan parquet, keep valid
  coordinates, H3 cell at resolution 9, hour bin, group by (cell, hour, kind) with count and
  sum, on the streaming engine. Nothing else.
- ``cprime`` (c′ in the report): the one-shot of exactly the level that (a) published, as a
  script that knew the answer would write it: read (a)'s manifest (``--manifest FILE``) for
  the level (hex resolution, time bin, top k, digits), then scan parquet, keep valid
  coordinates, H3 cell at that resolution directly (``latlng_to_cell``), truncate time to that
  bin in the recipe's zone, group by (cell, bin, kind) with count and sum, keep the top k kinds
  per (cell, bin) by count (ties by kind) with one ``other`` remainder row, sort, encode a
  columns document like reduce's (cells as 15-character hex strings, bins as epoch seconds,
  kind dictionary-encoded when smaller) with orjson, and gzip it at level 9 (Python's
  ``gzip``, mtime 0) into ``--out FILE``.
- ``d``: recipe (b) by hand in DuckDB SQL: count per (region, kind), top 5 kinds per region
  by count with an ``other`` remainder row, joined to the population, rate per 100,000.
- ``e``: recipe (b) by hand in pandas: read the two columns, group, top 5 + remainder, merge,
  rate per 100,000.

Each task prints one JSON line on stdout: the seconds spent after imports (``compute``), the
seconds spent importing (``imports``) and the result's row count. ``d`` and ``e`` write their
rows to ``--out FILE`` (JSON) when asked, so the harness can check they agree with ``reduce``.
"""

from __future__ import annotations

import gzip
import json
import sys
import time
import tomllib
from pathlib import Path

T0 = time.perf_counter()

TOP_K = 5
PER = 100_000
REST = "other"


def _files(data: Path) -> list[str]:
    return [str(p) for p in sorted((data / "events").glob("part-*.parquet"))]


def task_c(data: Path) -> dict[str, object]:
    import polars as pl
    import polars_h3 as plh3

    t1 = time.perf_counter()
    lat, lon = pl.col("lat"), pl.col("lon")
    valid = (
        lat.is_not_null()
        & lon.is_not_null()
        & ~lat.is_nan()
        & ~lon.is_nan()
        & (lat.abs() <= 90)
        & (lon.abs() <= 180)
    )
    out = (
        pl.scan_parquet(_files(data))
        .select("ts", "lat", "lon", "kind", "value")
        .filter(valid)
        .select(
            plh3.latlng_to_cell("lat", "lon", 9).alias("cell"),
            pl.col("ts").dt.truncate("1h").alias("hour"),
            "kind",
            "value",
        )
        .group_by("cell", "hour", "kind")
        .agg(pl.len().alias("n"), pl.col("value").sum().alias("value_sum"))
        .collect(engine="streaming")
    )
    return {
        "imports": t1 - T0,
        "compute": time.perf_counter() - t1,
        "rows": out.height,
        "events": int(out.get_column("n").sum()),
    }


def task_cprime(data: Path, manifest: Path, out: Path | None) -> dict[str, object]:
    import orjson
    import polars as pl
    import polars_h3 as plh3

    t1 = time.perf_counter()
    man = json.loads(manifest.read_text())
    level = man["level"]
    res, bin_, k, digits = (
        int(level["hex"]),
        str(level["time"]),
        int(level["top"]),
        int(level["digits"]),
    )
    recipe = tomllib.loads((data / "recipe_a.toml").read_text())
    zone = recipe["group"]["time"].get("zone", "UTC")
    files = _files(data)
    lat, lon = pl.col("lat"), pl.col("lon")
    valid = (
        lat.is_not_null()
        & lon.is_not_null()
        & ~lat.is_nan()
        & ~lon.is_nan()
        & (lat.abs() <= 90)
        & (lon.abs() <= 180)
        & pl.col("ts").is_not_null()
    )
    g = (
        pl.scan_parquet(files)
        .select("ts", "lat", "lon", "kind", "value")
        .filter(valid)
        .select(
            pl.col("ts").dt.convert_time_zone(zone).dt.truncate(bin_).alias("time"),
            plh3.latlng_to_cell("lat", "lon", res).alias("hex"),
            "kind",
            "value",
        )
        .group_by("time", "hex", "kind")
        .agg(pl.len().alias("events"), pl.col("value").sum().alias("value_sum"))
        .collect(engine="streaming")
    )
    # Top k kinds per (time, hex) by count, ties by kind; the others folded into one row.
    ranked = g.sort(["events", "kind"], descending=[True, False]).with_columns(
        pl.int_range(pl.len()).over("time", "hex").alias("rank")
    )
    top = (
        ranked.with_columns(
            pl.when(pl.col("rank") < k).then(pl.col("kind")).otherwise(pl.lit(REST)).alias("kind")
        )
        .group_by("time", "hex", "kind")
        .agg(pl.col("events").sum(), pl.col("value_sum").sum())
        .sort(["time", "hex", pl.col("kind") == REST, "kind"])
    )
    plain = top.select(
        pl.col("time").dt.epoch("s"),
        plh3.int_to_str("hex").alias("hex"),
        "kind",
        "events",
        pl.when(pl.col("value_sum").is_finite())
        .then(pl.col("value_sum").round(digits))
        .cast(pl.Int64 if digits == 0 else pl.Float64)
        .alias("value_sum"),
    )
    columns = {c: plain.get_column(c).to_list() for c in plain.columns}
    labels = sorted(set(columns["kind"]))
    doc: dict[str, object] = {
        "format": "reduce.columns/1",
        "recipe": recipe.get("name", ""),
        "level": {"hex": res, "time": bin_, "top": k, "digits": digits},
        "rows": plain.height,
        "columns": columns,
    }
    pos = {v: i for i, v in enumerate(labels)}
    coded = [pos[v] for v in columns["kind"]]
    if len(orjson.dumps(labels)) + len(orjson.dumps(coded)) < len(orjson.dumps(columns["kind"])):
        columns["kind"] = coded
        doc["dictionaries"] = {"kind": labels}
    input_rows = pl.scan_parquet(files).select(pl.len()).collect().item()
    represented = int(plain.get_column("events").sum())
    doc["accounting"] = {
        "input_rows": input_rows,
        "filtered_rows": 0,
        "invalid_rows": input_rows - represented,
        "suppressed_rows": 0,
        "represented_rows": represented,
    }
    doc["meta"] = {"time_zone": zone, "rest": REST}
    body = orjson.dumps(doc)
    packed = gzip.compress(body, compresslevel=9, mtime=0)
    if out is not None:
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_bytes(packed)
    return {
        "imports": t1 - T0,
        "compute": time.perf_counter() - t1,
        "rows": plain.height,
        "raw": len(body),
        "gzip": len(packed),
        "level": doc["level"],
    }


_SQL = """
WITH g AS (
    SELECT region, kind, count(*) AS n
    FROM read_parquet($files)
    WHERE region IS NOT NULL AND kind IS NOT NULL
    GROUP BY region, kind
), ranked AS (
    SELECT region, kind, n,
           row_number() OVER (PARTITION BY region ORDER BY n DESC, kind) AS rk
    FROM g
), folded AS (
    SELECT region, CASE WHEN rk <= $k THEN kind ELSE $rest END AS kind, sum(n)::BIGINT AS n
    FROM ranked
    GROUP BY ALL
)
SELECT f.region, f.kind, f.n,
       CASE WHEN p.pop > 0 THEN f.n * $per::DOUBLE / p.pop END AS n_per_100000
FROM folded f LEFT JOIN read_csv($den, header = true, columns = {'region': 'VARCHAR',
                                                                 'pop': 'DOUBLE'}) p
     USING (region)
ORDER BY f.region, f.kind = $rest, f.kind
"""


def task_d(data: Path, out: Path | None) -> dict[str, object]:
    import duckdb

    t1 = time.perf_counter()
    con = duckdb.connect()
    con.execute("SET threads = 2")
    rows = con.execute(
        _SQL,
        {
            "files": _files(data),
            "k": TOP_K,
            "rest": REST,
            "per": PER,
            "den": str(data / "population.csv"),
        },
    ).fetchall()
    if out is not None:
        out.write_text(json.dumps([list(r) for r in rows]))
    return {"imports": t1 - T0, "compute": time.perf_counter() - t1, "rows": len(rows)}


def task_e(data: Path, out: Path | None) -> dict[str, object]:
    import pandas as pd

    t1 = time.perf_counter()
    df = pd.read_parquet(data / "events", columns=["region", "kind"])
    df = df.dropna(subset=["region", "kind"])
    g = df.groupby(["region", "kind"], sort=False).size().rename("n").reset_index()
    g = g.sort_values(["region", "n", "kind"], ascending=[True, False, True])
    g["rk"] = g.groupby("region").cumcount()
    g.loc[g["rk"] >= TOP_K, "kind"] = REST
    g = g.groupby(["region", "kind"], sort=False)["n"].sum().reset_index()
    pop = pd.read_csv(data / "population.csv", dtype={"region": str, "pop": float})
    g = g.merge(pop, on="region", how="left")
    g["n_per_100000"] = (g["n"] / g["pop"] * PER).where(g["pop"] > 0)
    g["is_rest"] = g["kind"] == REST
    g = g.sort_values(["region", "is_rest", "kind"])
    if out is not None:
        out.write_text(
            json.dumps(g[["region", "kind", "n", "n_per_100000"]].astype(object).values.tolist())
        )
    return {"imports": t1 - T0, "compute": time.perf_counter() - t1, "rows": len(g)}


def main(argv: list[str]) -> int:
    if (
        len(argv) < 2
        or argv[0] not in ("c", "cprime", "d", "e")
        or (argv[0] == "cprime" and "--manifest" not in argv)
    ):
        print(
            "usage: tasks.py c|cprime|d|e DATA_DIR [--out FILE] [--manifest FILE (cprime)]",
            file=sys.stderr,
        )
        return 2
    task, data = argv[0], Path(argv[1])
    out = Path(argv[argv.index("--out") + 1]) if "--out" in argv else None
    if task == "c":
        res = task_c(data)
    elif task == "cprime":
        res = task_cprime(data, Path(argv[argv.index("--manifest") + 1]), out)
    elif task == "d":
        res = task_d(data, out)
    else:
        res = task_e(data, out)
    print(json.dumps(res))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
