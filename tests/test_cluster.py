"""The Dask path (reduce.cluster): per-file partials scanned on a cluster's workers and merged
on the client give the same payload bytes as a local run; a scheduler that does not answer,
or a missing extra, is one error line and exit 2.

One loopback-only LocalCluster (two worker processes) serves the whole module."""

from __future__ import annotations

import os
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from click.testing import CliRunner

import reduce
from reduce import cluster
from reduce.cli import main
from tests._builders import FIXTURES, random_events, to_toml

distributed = pytest.importorskip("distributed")

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def address() -> Iterator[str]:
    lc = distributed.LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        host="127.0.0.1",
        dashboard_address=None,
        silence_logs=50,
        timeout=60,
    )
    try:
        yield str(lc.scheduler_address)
    finally:
        lc.close(timeout=30)


def _split(df: pl.DataFrame, folder: Path, parts: int = 3) -> None:
    (folder / "ev").mkdir(parents=True, exist_ok=True)
    step = -(-df.height // parts)
    for i in range(parts):
        df.slice(i * step, step).write_parquet(folder / "ev" / f"part-{i}.parquet")


def _recipe(folder: Path, doc: dict[str, object]) -> Path:
    path = folder / "recipe.toml"
    output = {"path": "out/c.json", **doc.get("output", {})}  # type: ignore[dict-item]
    path.write_text(to_toml({"name": "c", **doc, "output": output}), encoding="utf-8")
    return path


def _local_and_cluster(recipe: Path, tmp: Path, address: str) -> tuple[bytes, bytes]:
    local = reduce.run(recipe, out_dir=tmp / "local", use_cache=False).path.read_bytes()
    said: list[str] = []
    with cluster.using(address):
        res = reduce.run(recipe, out_dir=tmp / "cluster", use_cache=False, progress=said.append)
    assert any("on the cluster" in m for m in said)  # scanned by the workers, not here
    assert res.manifest["files"] == {"total": 3, "scanned": 3, "reused": 0}
    return local, res.path.read_bytes()


def test_hex_time_categories_and_distinct_measures_match_a_local_run(
    tmp_path: Path, address: str
) -> None:
    _split(random_events(np.random.default_rng(4), 3000, span_days=5), tmp_path)
    recipe = _recipe(
        tmp_path,
        {
            "source": {"path": "ev/*.parquet", "time": "t", "lat": "lat", "lon": "lon"},
            "group": {
                "hex": {"levels": [9, 7]},
                "time": {"levels": ["1h", "1d"]},
                "category": {"column": "kind"},
            },
            "measures": {
                "n": "count",
                "mx": {"mean": "x"},
                "who": {"distinct": "who"},
                "big": {"count": True, "where": {"column": "y", "min": 5}},
            },
            "prune": {"top": {"k": [3, 1], "by": "n"}},
            "budget": {"max": "20KB", "on": "gzip", "order": ["top", "time", "hex"]},
        },
    )
    local, remote = _local_and_cluster(recipe, tmp_path, address)
    assert local == remote


def test_region_boundaries_and_flows_match_a_local_run(tmp_path: Path, address: str) -> None:
    rng = np.random.default_rng(8)
    n = 3000
    df = pl.DataFrame(
        {
            "lat": rng.uniform(-0.2, 2.0, n),
            "lon": rng.uniform(0.0, 2.0, n),
            "from_town": rng.choice(["T1", "T2", "T3", "T4"], n),
            "to_town": rng.choice(["T1", "T2", "T3", "T4"], n),
        }
    )
    _split(df, tmp_path)
    (tmp_path / "squares.geojson").write_bytes((FIXTURES / "squares.geojson").read_bytes())
    regions = _recipe(
        tmp_path,
        {
            "source": {"path": "ev/*.parquet", "lat": "lat", "lon": "lon"},
            "group": {"region": {"boundaries": "squares.geojson", "id": "code"}},
            "measures": {"n": "count"},
            "output": {"path": "out/c.geojson", "layout": "geojson"},
        },
    )
    local, remote = _local_and_cluster(regions, tmp_path / "r", address)
    assert local == remote
    flows = _recipe(
        tmp_path,
        {
            "source": {"path": "ev/*.parquet"},
            "group": {"flow": {"origin": "from_town", "destination": "to_town"}},
            "measures": {"n": "count"},
            "prune": {"top": {"k": [5]}},
        },
    )
    local, remote = _local_and_cluster(flows, tmp_path / "f", address)
    assert local == remote


def test_a_source_that_spills_locally_matches_on_the_cluster(
    tmp_path: Path, address: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("REDUCE_PROBE_ROWS", "500")  # the local run spills its keyed rows
    _split(random_events(np.random.default_rng(6), 4500, span_days=4), tmp_path)
    recipe = _recipe(
        tmp_path,
        {
            "source": {"path": "ev/*.parquet", "time": "t", "lat": "lat", "lon": "lon"},
            "group": {"hex": {"levels": [10, 8]}, "time": {"levels": ["1h", "1d"]}},
            "measures": {"n": "count", "sx": {"sum": "x"}},
            "budget": {"max": "40KB", "on": "gzip"},
        },
    )
    red = reduce.pipeline.Reducer(reduce.load_recipe(recipe), use_cache=False)
    assert isinstance(red.finest(), reduce.aggregate.Spilled)  # the premise
    local, remote = _local_and_cluster(recipe, tmp_path, address)
    assert local == remote
    # The workers spilled too: the keyed rows came back as their parquet files, so the
    # client never held the files' groups in memory.
    with cluster.using(address):
        red = reduce.pipeline.Reducer(reduce.load_recipe(recipe), use_cache=False)
        finest = red.finest()
        assert isinstance(finest, reduce.aggregate.Spilled)
        assert all(f.is_file() for f in finest.files)
    # Cached per file: a second run on the cluster reuses them, a new file is scanned alone.
    with cluster.using(address):
        first = reduce.run(recipe, out_dir=tmp_path / "c1")
        random_events(np.random.default_rng(7), 1500, span_days=4).write_parquet(
            tmp_path / "ev" / "part-9.parquet"
        )
        second = reduce.run(recipe, out_dir=tmp_path / "c2")
    assert first.path is not None and first.path.read_bytes() == local
    assert second.manifest is not None
    assert second.manifest["files"] == {"total": 4, "scanned": 1, "reused": 3}
    fresh = reduce.run(recipe, out_dir=tmp_path / "c3", use_cache=False)
    assert second.path is not None and fresh.path is not None
    assert second.path.read_bytes() == fresh.path.read_bytes()


def test_spill_files_from_a_worker_stay_inside_the_folder(tmp_path: Path) -> None:
    doc = {
        "spilled": True,
        "keys": ["hex"],
        "hex_res": 8,
        "time_bin": None,
        "accounting": [1, 0, 0, {}],
        "rows": 1,
        "parts": [[["../escape.parquet", b"x"]]],
    }
    with pytest.raises(cluster.ClusterError, match="outside its folder"):
        cluster.spilled_from_wire(doc, tmp_path / "in")
    assert not (tmp_path / "escape.parquet").exists()


def test_cluster_partials_are_cached_per_file(tmp_path: Path, address: str) -> None:
    _split(random_events(np.random.default_rng(2), 2000, span_days=3), tmp_path)
    recipe = _recipe(
        tmp_path,
        {
            "source": {"path": "ev/*.parquet", "time": "t", "lat": "lat", "lon": "lon"},
            "group": {"hex": {"levels": [8]}, "time": {"levels": ["1d"]}},
            "measures": {"n": "count", "who": {"distinct": "who"}},
        },
    )
    with cluster.using(address):
        first = reduce.run(recipe, out_dir=tmp_path / "a")
        random_events(np.random.default_rng(3), 500).write_parquet(
            tmp_path / "ev" / "part-9.parquet"
        )
        second = reduce.run(recipe, out_dir=tmp_path / "b")
    assert first.manifest["files"] == {"total": 3, "scanned": 3, "reused": 0}
    assert second.manifest["files"] == {"total": 4, "scanned": 1, "reused": 3}
    fresh = reduce.run(recipe, out_dir=tmp_path / "c", use_cache=False)
    assert second.path.read_bytes() == fresh.path.read_bytes()


def test_a_scheduler_that_does_not_answer_is_one_line_and_exit_2(tmp_path: Path) -> None:
    _split(random_events(np.random.default_rng(1), 300), tmp_path)
    recipe = _recipe(
        tmp_path,
        {
            "source": {"path": "ev/*.parquet", "lat": "lat", "lon": "lon"},
            "group": {"hex": {"levels": [7]}},
        },
    )
    env = {**os.environ, "REDUCE_CLUSTER_TIMEOUT": "2"}
    # Port 1 on loopback: nothing listens there (tcpmux, unused on test machines).
    proc = subprocess.run(
        [
            sys.executable,
            "-m",
            "reduce",
            "run",
            str(recipe),
            "--quiet",
            "--cluster",
            "tcp://127.0.0.1:1",
        ],
        capture_output=True,
        text=True,
        env=env,
        cwd=REPO,
        timeout=120,
    )
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "tcp://127.0.0.1:1" in lines[0] and "Traceback" not in lines[0]
    assert not (tmp_path / "out" / "c.json").exists()


def test_a_missing_extra_is_one_line_and_exit_2(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    _split(random_events(np.random.default_rng(1), 300), tmp_path)
    recipe = _recipe(
        tmp_path,
        {
            "source": {"path": "ev/*.parquet", "lat": "lat", "lon": "lon"},
            "group": {"hex": {"levels": [7]}},
        },
    )
    monkeypatch.setitem(sys.modules, "distributed", None)  # import fails as if not installed
    out = CliRunner().invoke(main, ["run", str(recipe), "--quiet", "--cluster", "local:2"])
    assert out.exit_code == 2
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and "reduce[cluster]" in lines[0]


def test_reduce_run_reads_the_cluster_from_the_environment(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    _split(random_events(np.random.default_rng(1), 300), tmp_path)
    recipe = _recipe(
        tmp_path,
        {
            "source": {"path": "ev/*.parquet", "lat": "lat", "lon": "lon"},
            "group": {"hex": {"levels": [7]}},
        },
    )
    monkeypatch.setenv("REDUCE_CLUSTER", "tcp://127.0.0.1:1")
    monkeypatch.setenv("REDUCE_CLUSTER_TIMEOUT", "1")
    out = CliRunner().invoke(main, ["run", str(recipe), "--quiet"])
    assert out.exit_code == 2
    assert out.stderr.strip().splitlines()[-1].startswith("error: cluster tcp://127.0.0.1:1")


def test_a_file_the_worker_sees_otherwise_is_refused(tmp_path: Path, address: str) -> None:
    from reduce.errors import SourceError
    from reduce.source import file_state

    _split(random_events(np.random.default_rng(1), 300), tmp_path)
    recipe = reduce.load_recipe(
        _recipe(
            tmp_path,
            {
                "source": {"path": "ev/*.parquet", "lat": "lat", "lon": "lon"},
                "group": {"hex": {"levels": [7]}},
            },
        )
    )
    path = tmp_path / "ev" / "part-0.parquet"
    seen = file_state(path)
    random_events(np.random.default_rng(2), 120).write_parquet(path)  # rewritten meanwhile
    with pytest.raises(SourceError, match="part-0.parquet: differs on the worker"):
        cluster.scan_files(address, recipe, [seen])


def test_a_scheduler_that_does_not_answer_fails_even_when_nothing_needs_scanning(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Every file's partial is cached by a first run, so the run with --cluster would send
    # nothing to the cluster: the wrong address still fails it, before anything is written.
    _split(random_events(np.random.default_rng(1), 300), tmp_path)
    recipe = _recipe(
        tmp_path,
        {
            "source": {"path": "ev/*.parquet", "lat": "lat", "lon": "lon"},
            "group": {"hex": {"levels": [7]}},
        },
    )
    first = CliRunner().invoke(main, ["run", str(recipe), "--quiet", "--out", str(tmp_path / "a")])
    assert first.exit_code == 0, first.output
    monkeypatch.setenv("REDUCE_CLUSTER_TIMEOUT", "1")
    out = CliRunner().invoke(
        main,
        [
            "run",
            str(recipe),
            "--quiet",
            "--out",
            str(tmp_path / "b"),
            "--cluster",
            "tcp://127.0.0.1:1",
        ],
    )
    assert out.exit_code == 2
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1
    assert lines[0].startswith("error: cluster tcp://127.0.0.1:1: the scheduler does not answer")
    assert not (tmp_path / "b").exists()
