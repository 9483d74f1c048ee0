"""The test helpers, in one module (``from tests._builders import ...``); fixtures live in
``tests/conftest.py``. Nothing here knows about a particular test.

- Event tables: :func:`events` (a small ocean patch over two weeks, for the CLI, recipe and
  budget tests) and :func:`random_events` (a seeded table with every column role);
  :func:`write_events` writes either, or any mapping of column -> list, as parquet.
- Recipes: :func:`to_toml` turns nested dicts/lists/scalars into TOML text (tables for the
  top level and one level below, inline tables deeper), so recipes can be built as Python
  data; :func:`write_case` writes ``events.parquet`` (and optional denominators CSV) and
  ``recipe.toml`` into a folder; :func:`write_recipe` and :func:`project` write the
  committed fixture recipes (fixtures/recipes/) with their events and population.
- Running: :func:`invoke` runs ``reduce ARGS`` in process; :func:`scan` computes a recipe's
  finest partial (no cache); :func:`run_payload` / :func:`fit_payload` return the decoded
  payload; :func:`payload_frame` turns a "columns" payload into a DataFrame.
- Audit inputs: :func:`columns_payload`, :func:`write_payload` and :func:`write_manifest`
  build valid ``reduce.columns/1`` payloads and their manifests. Manifests are computed
  here with the standard library and the brotli module directly (hashlib SHA-256, gzip
  RFC 1952 at level 9 with mtime 0, brotli RFC 7932 at quality 11), not with
  ``reduce.sizes``, so the audit is checked against an independent computation.
"""

from __future__ import annotations

import datetime as dt
import gzip
import hashlib
import json
import math
import textwrap
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import brotli
import numpy as np
import polars as pl

import reduce
from reduce import aggregate
from reduce.aggregate import Partial
from reduce.recipe import Recipe
from reduce.source import open_source

# --------------------------------------------------------------------------------------------
# Event tables and the committed fixture recipes
# --------------------------------------------------------------------------------------------


def events(n: int = 5000, seed: int = 7, *, invalid_every: int = 0) -> pl.DataFrame:
    """Random events on a small patch of ocean over two weeks of 2025."""
    rng = np.random.default_rng(seed)
    start = dt.datetime(2025, 3, 1, tzinfo=dt.UTC)
    secs = rng.integers(0, 14 * 86400, n)
    df = pl.DataFrame(
        {
            "ts": [start + dt.timedelta(seconds=int(s)) for s in secs],
            "lat": rng.normal(-34.5, 0.3, n),
            "lon": rng.normal(-119.5, 0.4, n),
            "kind": rng.choice(
                ["rain", "gust", "hail", "fog", "dust", "halo", "snow"],
                n,
                p=[0.35, 0.2, 0.15, 0.12, 0.08, 0.06, 0.04],
            ),
            "prov": rng.choice(["AAA", "BBB", "CCC", "DDD"], n),
            "sev": rng.integers(1, 6, n).astype(np.int64),
            "conf": rng.integers(0, 4, n).astype(np.int64),
            "who": rng.integers(0, 300, n).astype(np.int64),
        }
    ).with_columns(pl.col("ts").dt.cast_time_unit("us"))
    if invalid_every:
        df = df.with_columns(
            pl.when(pl.int_range(pl.len()) % invalid_every == 0)
            .then(None)
            .otherwise(pl.col("lat"))
            .alias("lat")
        )
    return df


def write_events(
    folder: Path,
    table: pl.DataFrame | Mapping[str, Sequence[Any]] | None = None,
    name: str = "events.parquet",
) -> Path:
    """Write ``table`` (a DataFrame or a mapping of column -> list; default :func:`events`)
    as parquet to ``folder/name`` (``name`` may hold sub-folders) and return the path."""
    if table is None:
        df = events()
    elif isinstance(table, pl.DataFrame):
        df = table
    else:
        df = pl.DataFrame(dict(table))
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    df.write_parquet(path)
    return path


def write_population(folder: Path, rows: dict[str, int] | None = None) -> Path:
    """``pop.csv`` in ``folder``: ``rows``, else fixtures/population.csv."""
    path = folder / "pop.csv"
    if rows is None:
        path.write_bytes((FIXTURES / "population.csv").read_bytes())
    else:
        pl.DataFrame({"prov": list(rows), "pop": list(rows.values())}).write_csv(path)
    return path


# Static inputs live in the tracked fixtures/ folder (see fixtures/README.md).
FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
HEX_RECIPE = (FIXTURES / "recipes" / "hexmap.toml").read_text(encoding="utf-8")
REGION_RECIPE = (FIXTURES / "recipes" / "regions.toml").read_text(encoding="utf-8")


def write_recipe(folder: Path, text: str, name: str = "recipe.toml") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    path.write_text(textwrap.dedent(text).lstrip())
    return path


def project(tmp: Path, recipe: str = HEX_RECIPE, *, df: pl.DataFrame | None = None) -> Path:
    """Events, population and a recipe in ``tmp``; returns the recipe path."""
    write_events(tmp, df)
    write_population(tmp)
    return write_recipe(tmp, recipe)


# --------------------------------------------------------------------------------------------
# The command line, in process
# --------------------------------------------------------------------------------------------


def invoke(*args: str) -> tuple[int, str, str]:
    """Run ``reduce ARGS`` in process: (exit code, stdout, stderr). An exception other than
    the exit itself means click caught a crash (a bug), so it fails the test."""
    from click.testing import CliRunner

    from reduce.cli import main

    res = CliRunner().invoke(main, list(args))
    assert res.exception is None or isinstance(res.exception, SystemExit), repr(res.exception)
    return res.exit_code, res.stdout, res.stderr


# --------------------------------------------------------------------------------------------
# TOML writing (the standard library reads TOML but does not write it)
# --------------------------------------------------------------------------------------------


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"TOML test helper: {v!r} is not a finite number")
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)  # a JSON string is a valid TOML basic string
    if isinstance(v, dt.datetime):
        return v.isoformat()
    if isinstance(v, dt.date):
        return v.isoformat()
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, Mapping):
        return "{ " + ", ".join(f"{_toml_key(k)} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"TOML test helper: cannot write {type(v).__name__}")


def _toml_key(k: str) -> str:
    return k if k.replace("_", "").replace("-", "").isalnum() else json.dumps(k)


def to_toml(doc: Mapping[str, Any]) -> str:
    """TOML text for ``doc``: scalars first, then one ``[section]`` per top-level table."""
    lines = [
        f"{_toml_key(k)} = {_toml_value(v)}" for k, v in doc.items() if not isinstance(v, Mapping)
    ]
    for k, v in doc.items():
        if isinstance(v, Mapping):
            lines.append(f"\n[{_toml_key(k)}]")
            lines += [f"{_toml_key(kk)} = {_toml_value(vv)}" for kk, vv in v.items()]
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------------------------
# Writing a case: events + recipe (+ denominators)
# --------------------------------------------------------------------------------------------


def write_case(
    folder: Path,
    events: pl.DataFrame | Mapping[str, Sequence[Any]] | None,
    *,
    group: Mapping[str, Any],
    measures: Mapping[str, Any] | None = None,
    source: Mapping[str, Any] | None = None,
    normalize: Mapping[str, Any] | None = None,
    prune: Mapping[str, Any] | None = None,
    budget: Mapping[str, Any] | None = None,
    output: Mapping[str, Any] | None = None,
    denominators: pl.DataFrame | Mapping[str, Sequence[Any]] | None = None,
    name: str = "case",
    recipe_file: str = "recipe.toml",
    events_file: str = "events.parquet",
) -> Path:
    """Write ``events`` (parquet), optional ``denominators`` (``pop.csv``) and a recipe.

    ``source`` entries are added to ``path = events_file``; ``output`` defaults to
    ``out/<name>.json`` inside ``folder``. Pass ``events=None`` to reuse an events file
    already in ``folder`` (several recipes over one table). Returns the recipe path.
    """
    folder.mkdir(parents=True, exist_ok=True)
    if events is not None:
        write_events(folder, events, events_file)
    if denominators is not None:
        den = (
            denominators
            if isinstance(denominators, pl.DataFrame)
            else pl.DataFrame(dict(denominators))
        )
        den.write_csv(folder / "pop.csv")
    doc: dict[str, Any] = {
        "name": name,
        "source": {"path": events_file, **(source or {})},
        "group": dict(group),
    }
    if measures is not None:
        doc["measures"] = dict(measures)
    if normalize is not None:
        doc["normalize"] = dict(normalize)
    if prune is not None:
        doc["prune"] = dict(prune)
    if budget is not None:
        doc["budget"] = dict(budget)
    doc["output"] = dict(output) if output is not None else {"path": f"out/{name}.json"}
    path = folder / recipe_file
    path.write_text(to_toml(doc), encoding="utf-8")
    return path


# --------------------------------------------------------------------------------------------
# Running
# --------------------------------------------------------------------------------------------


def scan(recipe: Recipe | Path | str) -> Partial:
    """The finest partial of a recipe, computed with one scan of its source."""
    r = recipe if isinstance(recipe, Recipe) else reduce.load_recipe(recipe)
    return aggregate.scan_partial(r, open_source(r))


def payload_frame(payload: Mapping[str, Any]) -> pl.DataFrame:
    """The payload's columns as a DataFrame, dictionary-coded columns turned into labels."""
    cols: dict[str, list[Any]] = {}
    dicts = payload.get("dictionaries", {})
    for name, values in payload["columns"].items():
        if name in dicts:
            labels = dicts[name]
            values = [None if i is None else labels[i] for i in values]
        cols[name] = values
    return pl.DataFrame(cols, strict=False) if cols else pl.DataFrame()


def run_payload(recipe: Path | str, **kw: Any) -> dict[str, Any]:
    """Run a recipe (no partial cache) and return its payload, parsed from the written file."""
    kw.setdefault("use_cache", False)
    res = reduce.run(recipe, **kw)
    assert res.path is not None
    return json.loads(res.path.read_bytes())


def fit_payload(recipe: Path | str, **kw: Any) -> dict[str, Any]:
    """Fit a recipe in memory (no file written, no cache) and return the parsed payload."""
    kw.setdefault("use_cache", False)
    res = reduce.fit(recipe, **kw)
    assert res.payload is not None
    return json.loads(res.payload)


# --------------------------------------------------------------------------------------------
# Random data
# --------------------------------------------------------------------------------------------

T0 = dt.datetime(2024, 1, 1, tzinfo=dt.UTC)


def random_events(
    rng: np.random.Generator,
    n: int,
    *,
    start: dt.datetime = T0,
    span_days: float = 30.0,
    regions: Sequence[str] = ("r1", "r2", "r3"),
    kinds: Sequence[str] = ("a", "b", "c", "d", "e"),
    lat: tuple[float, float] = (10.0, 10.6),
    lon: tuple[float, float] = (20.0, 20.6),
    null_fraction: float = 0.0,
    who: int = 40,
) -> pl.DataFrame:
    """A seeded event table: time (UTC), lat, lon, region, kind, x (float), y (int), who.

    ``null_fraction`` of the measure values (x, y, who) are null.
    """
    secs = rng.uniform(0, span_days * 86400, n)
    times = [start + dt.timedelta(seconds=float(s)) for s in secs]
    x = rng.normal(10, 5, n).round(3)
    y = rng.integers(-20, 100, n)
    w = rng.integers(0, who, n)
    nulls = rng.random((3, n)) < null_fraction
    return pl.DataFrame(
        {
            "t": pl.Series(times, dtype=pl.Datetime("us", "UTC")),
            "lat": rng.uniform(*lat, n),
            "lon": rng.uniform(*lon, n),
            "region": rng.choice(list(regions), n),
            "kind": rng.choice(list(kinds), n),
            "x": pl.Series(
                [None if m else float(v) for v, m in zip(x, nulls[0])], dtype=pl.Float64
            ),
            "y": pl.Series([None if m else int(v) for v, m in zip(y, nulls[1])], dtype=pl.Int64),
            "who": pl.Series([None if m else int(v) for v, m in zip(w, nulls[2])], dtype=pl.Int64),
        }
    )


# --------------------------------------------------------------------------------------------
# Audit inputs: payloads and manifests computed independently of reduce.sizes
# --------------------------------------------------------------------------------------------


def columns_payload(**overrides: Any) -> dict[str, Any]:
    """A small, consistent columns payload: 3 H3 cells at resolution 9, a dictionary column."""
    payload: dict[str, Any] = {
        "format": "reduce.columns/1",
        "recipe": "demo",
        "level": {"space": 9, "time": "day"},
        "rows": 3,
        "columns": {
            "hex": ["8928308280fffff", "89283082807ffff", "89283082803ffff"],
            "t": [1700000000, 1700086400, 1700172800],
            "count": [12, 5, 7],
            "kind": [0, 2, 1],
        },
        "dictionaries": {"kind": ["bike", "bus", "car"]},
        "accounting": {
            "input_rows": 30,
            "filtered_rows": 2,
            "invalid_rows": 1,
            "suppressed_rows": 3,
            "represented_rows": 24,
        },
        "meta": {"source": "test"},
    }
    payload.update(overrides)
    return payload


def dump(obj: Any) -> bytes:
    """Compact JSON as our writers emit it (stdlib json, no spaces, UTF-8)."""
    return json.dumps(obj, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode()


def write_bytes(path: Path, data: bytes) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    return path


def manifest_for(payload_path: Path, **overrides: Any) -> dict[str, Any]:
    data = payload_path.read_bytes()
    doc = json.loads(data)
    manifest: dict[str, Any] = {
        "format": "reduce.manifest/1",
        "payload": payload_path.name,
        "layout": "columns",
        "sha256": hashlib.sha256(data).hexdigest(),
        "bytes": {
            "raw": len(data),
            "gzip": len(gzip.compress(data, 9, mtime=0)),
            "brotli": len(brotli.compress(data, quality=11)),
        },
        "rows": doc.get("rows"),
        "elements": doc.get("rows"),
        "recipe": {"name": doc.get("recipe")},
        "level": doc.get("level"),
    }
    manifest.update(overrides)
    return manifest


def write_manifest(payload_path: Path, **overrides: Any) -> Path:
    path = payload_path.with_name(payload_path.name + ".manifest.json")
    return write_bytes(path, dump(manifest_for(payload_path, **overrides)))


def write_payload(
    path: Path, payload: dict[str, Any] | None = None, *, manifest: bool = True
) -> Path:
    write_bytes(path, dump(columns_payload() if payload is None else payload))
    if manifest:
        write_manifest(path)
    return path


# --------------------------------------------------------------------------------------------
# Sampled levels on small tables
# --------------------------------------------------------------------------------------------

# A hex x time x category ladder whose small test tables take the row-count and sample paths
# once the sample thresholds are lowered (see lower_sample_thresholds).
SAMPLED_LADDER: dict[str, Any] = {
    "group": {
        "hex": {"levels": [8, 7, 6]},
        "time": {"levels": ["1h", "1d", "1w"], "zone": "UTC"},
        "category": {"column": "kind"},
    },
    "measures": {"n": "count", "sx": {"sum": "x"}},
    "prune": {"top": {"k": [4, 2], "by": "n"}},
    "budget": {"max": "60KB", "on": "gzip", "order": ["top", "time", "hex"]},
}


def lower_sample_thresholds(monkeypatch: Any) -> None:
    """Sample levels of 2,000 rows or more (the defaults sample only levels of 100,000 rows
    and more), so that small test tables are judged by samples of their cells."""
    from reduce import tables

    monkeypatch.setattr(tables, "SAMPLE_MIN_LEVEL_ROWS", 2000)
    monkeypatch.setattr(tables, "SAMPLE_ROWS", 400)
    monkeypatch.setattr(tables, "SAMPLE_MIN_KEYS", 20)
