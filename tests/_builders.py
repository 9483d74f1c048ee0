"""Small deterministic event tables and recipes for the CLI, recipe and budget tests."""

from __future__ import annotations

import datetime as dt
import textwrap
from pathlib import Path

import numpy as np
import polars as pl


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
    folder: Path, df: pl.DataFrame | None = None, name: str = "events.parquet"
) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    (df if df is not None else events()).write_parquet(path)
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
