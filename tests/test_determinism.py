"""Determinism: the same inputs and recipe give byte-identical payloads and manifests.

README: "The same inputs and recipe give byte-identical payloads"; DEVELOPERS.md: "no wall
clock, no random state, no dependence on thread count in anything written". Every run here is
a fresh ``python -m reduce run`` process (polars reads ``POLARS_MAX_THREADS`` at import, and
hash seeds are per process), over four parquet files:

- two runs of the same recipe over the same files;
- the same files under other names, so that the glob lists them in another order;
- one polars thread against two;
- a run that computes the finest partial against one that reads it from the cache.

Two recipes are run each time: one whose measures are integers (counts, distinct counts,
integer sums, minima, maxima) and one with float measures (a mean and a sum of floats),
written with ``digits = 15`` (the most the recipe allows) so that any difference in the
order floats are added in shows in the bytes.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest

from tests._builders import events

REPO = Path(__file__).resolve().parents[1]

INTEGERS = """
name = "integers"

[source]
path = "parts/*.parquet"
time = "ts"
lat = "lat"
lon = "lon"

[group]
hex = { levels = [5, 4] }
time = { levels = ["1d", "1w"], zone = "Etc/GMT+5" }
category = { column = "kind" }

[measures]
reports = "count"
observers = { distinct = "who" }
confirmations = { sum = "conf" }
worst = { max = "sev" }
mildest = { min = "sev" }

[prune]
top = { k = [4, 2], by = "reports" }

[output]
path = "out/integers.json"
"""

FLOATS = """
name = "floats"

[source]
path = "parts/*.parquet"
time = "ts"
lat = "lat"
lon = "lon"

[group]
hex = { levels = [5, 4] }
time = { levels = ["1d", "1w"] }
category = { column = "kind" }

[measures]
reports = "count"
amount = { mean = "x" }
total = { sum = "y" }

[prune]
top = { k = [4, 2], by = "reports" }

[output]
path = "out/floats.json"
digits = 15
"""

RECIPES = ("integers", "floats")
ROWS = 40_000


def write_inputs(folder: Path, names: list[str]) -> None:
    """Four parquet files of the same events; file i is written under ``names[i]``."""
    rng = np.random.default_rng(5)
    df = events(n=ROWS, seed=3).with_columns(
        x=pl.Series(rng.lognormal(3.0, 2.0, ROWS)), y=pl.Series(rng.normal(0.0, 1e6, ROWS))
    )
    (folder / "parts").mkdir(parents=True)
    for i, name in enumerate(names):
        df.slice(i * ROWS // 4, ROWS // 4).write_parquet(folder / "parts" / name)
    for r, text in (("integers", INTEGERS), ("floats", FLOATS)):
        (folder / f"{r}.toml").write_text(textwrap.dedent(text))


def run(
    folder: Path, out: str, *, threads: int = 2, cache: bool = False
) -> dict[str, tuple[bytes, dict[str, Any]]]:
    env = dict(os.environ)
    env["POLARS_MAX_THREADS"] = str(threads)
    env["REDUCE_CACHE_DIR"] = str(folder / "cache")
    env["PYTHONPATH"] = os.pathsep.join([str(REPO), env.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    args = [
        sys.executable,
        "-m",
        "reduce",
        "run",
        "integers.toml",
        "floats.toml",
        "--out",
        out,
        "--quiet",
    ]
    if not cache:
        args.append("--no-cache")
    proc = subprocess.run(args, cwd=folder, env=env, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return {
        r: (
            (folder / out / f"{r}.json").read_bytes(),
            json.loads((folder / out / f"{r}.json.manifest.json").read_bytes()),
        )
        for r in RECIPES
    }


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """Every run the tests compare, made once: about ten seconds in all."""
    first = tmp_path_factory.mktemp("first")
    write_inputs(first, ["p0.parquet", "p1.parquet", "p2.parquet", "p3.parquet"])
    # The same files named so that sorted (glob) order is reversed: z, y, x, w.
    renamed = tmp_path_factory.mktemp("renamed")
    write_inputs(renamed, ["z.parquet", "y.parquet", "x.parquet", "w.parquet"])
    return {
        "base": run(first, "a", threads=2, cache=True),
        "again": run(first, "b", threads=2),
        "one_thread": run(first, "c", threads=1),
        "cached": run(first, "d", threads=2, cache=True),
        "renamed": run(renamed, "a", threads=2),
    }


def without_fingerprint(manifest: dict[str, Any]) -> dict[str, Any]:
    """The manifest minus the source fingerprint, which hashes the input files' paths."""
    m = json.loads(json.dumps(manifest))
    m["source"].pop("fingerprint")
    return m


def test_inputs_are_what_the_tests_need(runs: dict[str, Any]) -> None:
    """Guard: several rows, float columns really fractional, all rows represented."""
    for r in RECIPES:
        payload = json.loads(runs["base"][r][0])
        assert payload["rows"] > 500
        assert payload["accounting"]["input_rows"] == ROWS
        assert payload["accounting"]["represented_rows"] == ROWS
    floats = json.loads(runs["base"]["floats"][0])["columns"]
    assert any(v != round(v, 6) for v in floats["amount"] if v is not None)
    assert any(v != round(v, 6) for v in floats["total"] if v is not None)


@pytest.mark.parametrize("recipe", RECIPES)
def test_two_runs_give_identical_payload_and_manifest(runs: dict[str, Any], recipe: str) -> None:
    payload, manifest = runs["base"][recipe]
    again_payload, again_manifest = runs["again"][recipe]
    assert again_payload == payload
    assert again_manifest == manifest


@pytest.mark.parametrize("recipe", RECIPES)
def test_thread_count_does_not_change_payload_or_manifest(
    runs: dict[str, Any], recipe: str
) -> None:
    payload, manifest = runs["base"][recipe]
    one_payload, one_manifest = runs["one_thread"][recipe]
    assert one_payload == payload
    assert one_manifest == manifest


@pytest.mark.parametrize("recipe", RECIPES)
def test_cached_partial_gives_identical_payload_and_manifest(
    runs: dict[str, Any], recipe: str
) -> None:
    payload, manifest = runs["base"][recipe]
    cached_payload, cached_manifest = runs["cached"][recipe]
    assert cached_payload == payload
    # The manifests differ only in what the runs did: the first scanned the 4 files, the
    # second reused their cached partials.
    assert manifest["files"] == {"total": 4, "scanned": 4, "reused": 0}
    assert cached_manifest["files"] == {"total": 4, "scanned": 0, "reused": 4}
    assert {**cached_manifest, "files": None} == {**manifest, "files": None}


@pytest.mark.parametrize("recipe", RECIPES)
def test_file_names_and_glob_order_do_not_change_the_payload(
    runs: dict[str, Any], recipe: str
) -> None:
    payload, manifest = runs["base"][recipe]
    renamed_payload, renamed_manifest = runs["renamed"][recipe]
    assert renamed_payload == payload
    # Only the source fingerprint (which hashes the files' paths) may differ.
    assert renamed_manifest["source"]["fingerprint"] != manifest["source"]["fingerprint"]
    assert without_fingerprint(renamed_manifest) == without_fingerprint(manifest)
