"""Shared test helpers: small event tables, recipe files written from Python data, payloads.

The helpers are plain functions (importable as ``from conftest import ...``) plus a few
fixtures wrapping them. Nothing here knows about a particular test: an event table is any
mapping of column -> list (or a polars DataFrame), a recipe is any mapping of TOML sections.

- :func:`to_toml` turns nested dicts/lists/scalars into TOML text (tables for the top level
  and one level below, inline tables deeper), so recipes can be built as Python data.
- :func:`write_case` writes ``events.parquet`` (and optional denominators CSV) and
  ``recipe.toml`` into a folder and returns the recipe path.
- :func:`scan` opens a recipe's source and computes its finest partial (no cache).
- :func:`run_payload` runs a recipe with ``reduce.run`` and returns the decoded payload.
- :func:`payload_frame` turns a "columns" payload into a DataFrame (dictionaries decoded).
- :func:`random_events` makes a seeded random event table with every column role.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest

import reduce
from reduce import aggregate
from reduce.aggregate import Partial
from reduce.recipe import Recipe
from reduce.source import open_source

# --------------------------------------------------------------------------------------------
# Cache isolation: no test reads or writes the user's partial cache.
# --------------------------------------------------------------------------------------------


@pytest.fixture(autouse=True)
def _isolated_cache(
    monkeypatch: pytest.MonkeyPatch, tmp_path_factory: pytest.TempPathFactory
) -> None:
    """Every test gets a cache folder of its own (outside its tmp_path, so listings of
    tmp_path do not see it); a test that needs the folder reads ``$REDUCE_CACHE_DIR``."""
    monkeypatch.setenv("REDUCE_CACHE_DIR", str(tmp_path_factory.mktemp("reduce-cache")))


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


def write_events(path: Path, events: pl.DataFrame | Mapping[str, Sequence[Any]]) -> Path:
    df = events if isinstance(events, pl.DataFrame) else pl.DataFrame(dict(events))
    path.parent.mkdir(parents=True, exist_ok=True)
    df.write_parquet(path)
    return path


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
        write_events(folder / events_file, events)
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


@pytest.fixture
def case(tmp_path: Path):  # type: ignore[no-untyped-def]
    """``case(events, group=..., measures=..., ...)`` -> recipe path inside ``tmp_path``."""

    def make(events: Any, **kw: Any) -> Path:
        return write_case(tmp_path, events, **kw)

    return make


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
# Demo payloads (small): every demo recipe run over a 20,000-row demo scenario
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="session")
def demo_payloads(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Payload path per demo recipe, written once per test session.

    The demo recipes are pointed at a 20,000-row scenario. At that size sightings-hex
    suppresses every cell (fewer than 3 observers each), so it is run twice: as written
    (``sightings-hex``, an empty payload) and with ``prune.min_count.min = 1``
    (``sightings-hex-all``).
    """
    from reduce._scenario import generate
    from reduce.demo import RECIPES, SEED

    root = tmp_path_factory.mktemp("demo-payloads")
    data = generate(root / "data", rows=20_000, seed=SEED).root
    out: dict[str, Path] = {}
    for f in sorted(RECIPES.glob("*.toml")):
        text = f.read_text(encoding="utf-8").replace("../fixtures/demo/", f"{data.as_posix()}/")
        recipe = root / f.name
        recipe.write_text(text.replace("../out/", "out/"), encoding="utf-8")
        out[f.stem] = reduce.run(recipe, use_cache=False).path  # type: ignore[assignment]
        if f.stem == "sightings-hex":
            res = reduce.run(
                recipe,
                out_dir=root / "out-all",
                use_cache=False,
                overrides={"prune.min_count.min": "1"},
            )
            out["sightings-hex-all"] = res.path  # type: ignore[assignment]
    return out
