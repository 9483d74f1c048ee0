"""The benchmark harness: ``reduce`` against bare polars, DuckDB and pandas on one table.

    python bench/run.py --rows 20M [--repeat 3] [--tasks a,b,c,cprime,d,e,p,q,s,h3,refit]
                        [--json FILE]

Steps (see bench/README.md for the targets and the measured results):

1. Generate (or reuse) the synthetic event table under ``bench/data/<rows>/`` (``synth.py``)
   and write the two recipes beside it.
2. Read every input file once so all tasks start from a warm page cache.
3. Run the timed tasks round-robin (a, b, c, c′, d, e, p, q, s, a, b, ...), each repetition
   in a fresh process; wall seconds from the parent, CPU seconds and peak RSS from
   ``os.wait4`` (the child alone, with its own children).
4. H3 indexing throughput (``h3_points.py``), the re-fit from a cached finest partial, and a
   check that (b), (d) and (e) publish the same numbers, and that c′ publishes the rows and
   counts of (a).
5. Print the table and the ratios against the targets; ``--json`` writes every figure.

Tasks:
  a  reduce run recipe_a.toml --no-cache --quiet  (hex x time x kind, full ladder, budget fit)
  b  reduce run recipe_b.toml --no-cache --quiet  (region x kind, rate per 100,000, top 5)
  c  bare polars: the finest level of (a) only (tasks.py c)
  cprime  (c′ in the report) by hand, polars + polars-h3: exactly the level (a) published, read
     from (a)'s manifest, computed directly and written as gzip-9 JSON (tasks.py cprime)
  d  DuckDB SQL doing (b) by hand (tasks.py d)
  e  pandas doing (b) by hand (tasks.py e)
  p  (a) with progress forced on a pseudo-terminal (``script -qec``)
  q  (a) --quiet on the same kind of pseudo-terminal: progress overhead = p / q - 1
  s  reduce check recipe_b.toml: start-up cost of the command line (imports, recipe, schema)

Extra (not round-robin):
  f  an incremental night: the events split into 10 equal files; ``reduce run`` with the
     cache after 1 new file of 10 (9 cached) against a full ``--no-cache`` run of the 10
     (target <= 0.30); payloads compared byte for byte
  g  (a) on a local 2-worker Dask cluster (``--cluster local:2``) against (a) in one process
     (target <= 1.3 on a 2-core machine); payloads compared byte for byte
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import platform
import resource
import shlex
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

BENCH = Path(__file__).resolve().parent
REPO = BENCH.parent
DATA = BENCH / "data"
sys.path.insert(0, str(BENCH))

import synth  # noqa: E402

TIMED = ("a", "b", "c", "cprime", "d", "e", "p", "q", "s")
LABEL = {"cprime": "c′"}  # task names as printed
EXTRA = ("h3", "refit", "f", "g")
GB = 1000**3

RECIPE_A = """\
# Benchmark recipe (a): hex cell x hour x kind with the full ladder, fitted to 2 MB gzip.
name = "bench-hex-time-kind"

[source]
path = "events/*.parquet"
time = "ts"
lat = "lat"
lon = "lon"

[group]
hex = {{ levels = [9, 8, 7, 6, 5] }}
time = {{ levels = ["1h", "6h", "1d", "1w"], zone = "UTC" }}
category = {{ column = "kind" }}

[measures]
events = "count"
value_sum = {{ sum = "value" }}

[prune]
top = {{ k = [12, 8, 5, 3] }}

[budget]
max = "{budget}"
on = "gzip"

[output]
path = "out/recipe_a/hex_time_kind.json"
"""

RECIPE_B = """\
# Benchmark recipe (b): region x kind, events per 100,000 residents, top 5 kinds per region.
name = "bench-region-rates"

[source]
path = "events/*.parquet"

[group]
region = { column = "region" }
category = { column = "kind" }

[measures]
n = "count"

[normalize]
denominators = { path = "population.csv", key = "region", value = "pop" }
per = 100000
measures = ["n"]

[prune]
top = { k = 5 }

[output]
path = "out/recipe_b/region_rates.json"
"""


# --------------------------------------------------------------------------------------------
# Running one process
# --------------------------------------------------------------------------------------------


@dataclass
class Sample:
    task: str
    rep: int
    wall: float
    cpu: float  # user + system seconds of the child and its children
    rss_mb: float  # peak resident set size, MB (10^6 bytes)
    rc: int
    load1: float | None = None  # 1-minute load average when the process started
    info: dict[str, Any] = field(default_factory=dict)
    stderr: str = ""


def run_proc(
    argv: list[str], *, env: dict[str, str], cwd: Path, timeout: float | None = None
) -> tuple[float, Any, int, str, str]:
    """Run ``argv``; returns wall seconds, rusage, exit code, stdout and stderr."""
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        t0 = time.perf_counter()
        p = subprocess.Popen(
            argv, stdout=out, stderr=err, stdin=subprocess.DEVNULL, env=env, cwd=cwd
        )
        timer = threading.Timer(timeout, p.kill) if timeout else None
        if timer:
            timer.start()
        try:
            _, status, ru = os.wait4(p.pid, 0)
        finally:
            if timer:
                timer.cancel()
        wall = time.perf_counter() - t0
        p.returncode = os.waitstatus_to_exitcode(status)  # already reaped: keep Popen quiet
        out.seek(0)
        err.seek(0)
        return (
            wall,
            ru,
            p.returncode,
            out.read().decode(errors="replace"),
            err.read().decode(errors="replace"),
        )


def export_tree(rev: str) -> tuple[Path, str]:
    """A snapshot of the package at commit ``rev`` (``git archive``), so that a long run
    measures one version even while the working tree changes. Returns (root, full sha)."""
    sha = subprocess.run(
        ["git", "rev-parse", "--verify", f"{rev}^{{commit}}"],
        cwd=REPO,
        capture_output=True,
        text=True,
    )
    if sha.returncode != 0:
        raise SystemExit(f"bench: --commit {rev!r} is not a commit of {REPO}")
    full = sha.stdout.strip()
    root = DATA / "trees" / full[:12]
    if not (root / "reduce" / "__init__.py").is_file():
        tmp = root.with_name(root.name + ".tmp")
        shutil.rmtree(tmp, ignore_errors=True)
        tmp.mkdir(parents=True)
        archive = subprocess.run(
            ["git", "archive", "--format=tar", full, "reduce"],
            cwd=REPO,
            capture_output=True,
            check=True,
        ).stdout
        subprocess.run(["tar", "-x", "-C", str(tmp)], input=archive, check=True)
        shutil.rmtree(root, ignore_errors=True)
        os.replace(tmp, root)
    return root, full


class Bench:
    def __init__(
        self, rows: int, data: Path, *, repeat: int, timeout: float | None, code: Path = REPO
    ) -> None:
        self.rows = rows
        self.data = data
        self.repeat = repeat
        self.timeout = timeout
        self.cache = data / "cache"
        self.env = dict(os.environ)
        for k in ("POLARS_MAX_THREADS", "CI", "REDUCE_CACHE_DIR"):
            self.env.pop(k, None)
        self.env["PYTHONPATH"] = os.pathsep.join(
            [str(code), *([self.env["PYTHONPATH"]] if self.env.get("PYTHONPATH") else [])]
        )
        self.env["REDUCE_CACHE_DIR"] = str(self.cache)
        self.py = sys.executable
        self.reduce = [self.py, "-m", "reduce"]

    def argv(self, task: str) -> list[str]:
        d = self.data
        if task == "a":
            return [
                *self.reduce,
                "run",
                str(d / "recipe_a.toml"),
                "--no-cache",
                "--quiet",
                "--out",
                str(d / "out" / "a"),
            ]
        if task == "b":
            return [
                *self.reduce,
                "run",
                str(d / "recipe_b.toml"),
                "--no-cache",
                "--quiet",
                "--out",
                str(d / "out" / "b"),
            ]
        if task == "s":
            return [*self.reduce, "check", str(d / "recipe_b.toml")]
        if task in ("c", "d", "e"):
            argv = [self.py, str(BENCH / "tasks.py"), task, str(d)]
            if task in ("d", "e"):
                argv += ["--out", str(d / "out" / f"{task}.json")]
            return argv
        if task == "cprime":
            return [
                self.py,
                str(BENCH / "tasks.py"),
                task,
                str(d),
                "--manifest",
                str(a_manifest(d)),
                "--out",
                str(cprime_payload(d)),
            ]
        if task in ("p", "q"):
            # p: progress on a terminal; q: the same terminal with --quiet, to tell the cost
            # of the progress display from the cost of the terminal wrapper.
            inner = [
                *self.reduce,
                "run",
                str(d / "recipe_a.toml"),
                "--no-cache",
                "--out",
                str(d / "out" / task),
                *(["--quiet"] if task == "q" else []),
            ]
            if shutil.which("script"):
                return ["script", "-qec", shlex.join(inner), "/dev/null"]
            code = (
                "import os, pty, sys; sys.exit(os.waitstatus_to_exitcode(pty.spawn(sys.argv[1:])))"
            )
            return [self.py, "-c", code, *inner]
        raise ValueError(task)

    def sample(self, task: str, rep: int, argv: list[str] | None = None) -> Sample:
        load = loadavg()
        wall, ru, rc, out, err = run_proc(
            argv or self.argv(task), env=self.env, cwd=REPO, timeout=self.timeout
        )
        info: dict[str, Any] = {}
        if task in ("c", "cprime", "d", "e") and rc == 0:
            try:
                info = json.loads(out.strip().splitlines()[-1])
            except (ValueError, IndexError):
                pass
        if task in ("p", "q"):
            # rich draws a spinner and the status text on the terminal
            info["progress_seen"] = any(s in out for s in ("scanning", "measuring", "checking"))
        s = Sample(
            task,
            rep,
            wall,
            ru.ru_utime + ru.ru_stime,
            ru.ru_maxrss * 1024 / 1e6,
            rc,
            load[0] if load else None,
            info,
            err.strip()[-2000:] if rc else "",
        )
        flag = "" if rc == 0 else f"  EXIT {rc}: {err.strip().splitlines()[-1:]}"
        print(
            f"  {LABEL.get(task, task)} #{rep + 1}: {wall:8.2f} s wall, {s.cpu:8.2f} s cpu, "
            f"{s.rss_mb:8.0f} MB peak, load {s.load1}{flag}",
            flush=True,
        )
        return s


# --------------------------------------------------------------------------------------------
# Setup
# --------------------------------------------------------------------------------------------


def a_payload(d: Path) -> Path:
    """Where task (a) publishes (``--out d/out/a`` and the recipe's file name)."""
    return d / "out" / "a" / "hex_time_kind.json"


def a_manifest(d: Path) -> Path:
    """(a)'s manifest: ``x.json.manifest.json`` beside the payload (``x.manifest.json`` for
    versions of reduce before the manifest took the payload's full name)."""
    new = a_payload(d).with_name("hex_time_kind.json.manifest.json")
    old = a_payload(d).with_name("hex_time_kind.manifest.json")
    return new if new.exists() or not old.exists() else old


def cprime_payload(d: Path) -> Path:
    return d / "out" / "cprime" / "hex_time_kind.json.gz"


def write_recipes(d: Path, budget: str) -> None:
    (d / "recipe_a.toml").write_text(RECIPE_A.format(budget=budget))
    (d / "recipe_b.toml").write_text(RECIPE_B)
    for sub in ("a", "b", "p", "q", "refit"):
        (d / "out" / sub).mkdir(parents=True, exist_ok=True)


def warm_page_cache(files: list[Path]) -> float:
    t = time.perf_counter()
    for f in files:
        with open(f, "rb") as fh:
            while fh.read(1 << 24):
                pass
    return time.perf_counter() - t


def loadavg() -> list[float]:
    try:
        return [round(x, 2) for x in os.getloadavg()]
    except OSError:
        return []


def versions() -> dict[str, str]:
    code = (
        "import json, importlib.metadata as m; print(json.dumps({p: m.version(p) for p in "
        "('polars', 'polars-h3', 'duckdb', 'pandas', 'pyarrow', 'numpy', 'brotli')}))"
    )
    try:
        v: dict[str, str] = json.loads(
            subprocess.run(
                [sys.executable, "-c", code], capture_output=True, text=True, check=True
            ).stdout
        )
    except (subprocess.CalledProcessError, ValueError):
        v = {}
    v["python"] = platform.python_version()
    try:
        v["reduce_commit"] = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"], cwd=REPO, capture_output=True, text=True
        ).stdout.strip()
        dirty = subprocess.run(
            ["git", "status", "--porcelain", "--", "reduce"],
            cwd=REPO,
            capture_output=True,
            text=True,
        ).stdout.strip()
        v["reduce_tree"] = "modified" if dirty else "clean"
    except OSError:
        pass
    return v


# --------------------------------------------------------------------------------------------
# Checks and extra figures
# --------------------------------------------------------------------------------------------


def payload_rows(path: Path) -> list[list[Any]]:
    """Rows (region, kind, n, n_per_100000) of a reduce columns payload."""
    doc = json.loads(path.read_text())
    cols, dicts = doc["columns"], doc.get("dictionaries", {})

    def col(name: str) -> list[Any]:
        v = cols[name]
        return [dicts[name][i] for i in v] if name in dicts else v

    return [list(r) for r in zip(col("region"), col("kind"), col("n"), col("n_per_100000"))]


def agree(a: list[list[Any]], b: list[list[Any]], digits: int = 4) -> bool:
    if len(a) != len(b):
        return False
    for x, y in zip(a, b):
        if x[:3] != y[:3]:
            return False
        if (x[3] is None) != (y[3] is None):
            return False
        if x[3] is not None and abs(round(float(y[3]), digits) - float(x[3])) > 10**-digits:
            return False
    return True


def check_b(d: Path) -> dict[str, Any]:
    out: dict[str, Any] = {}
    pb = d / "out" / "b" / "region_rates.json"
    try:
        rb = payload_rows(pb)
    except (OSError, KeyError, ValueError):
        return {"checked": False}
    out["rows"] = len(rb)
    for t in ("d", "e"):
        f = d / "out" / f"{t}.json"
        if f.is_file():
            out[f"b_equals_{t}"] = agree(rb, json.loads(f.read_text()))
    out["checked"] = True
    return out


def check_cprime(d: Path) -> dict[str, Any]:
    """Does c′ publish what (a) published? Same level, the same rows and the same count per
    (time, hex, kind) key, value sums within the payload's rounding; and are the bytes the
    same (c′'s gzip member decompressed, Python's gzip module)?"""
    import gzip
    import hashlib

    try:
        raw_a = a_payload(d).read_bytes()
        man = json.loads(a_manifest(d).read_text())
        raw_c = gzip.decompress(cprime_payload(d).read_bytes())
    except (OSError, ValueError, EOFError):
        return {"checked": False}

    def rows(raw: bytes) -> tuple[dict[str, Any], dict[tuple[Any, ...], tuple[int, float]]]:
        doc = json.loads(raw)
        cols, dicts = doc["columns"], doc.get("dictionaries", {})
        kind = [dicts["kind"][i] for i in cols["kind"]] if "kind" in dicts else cols["kind"]
        keyed = {
            (t, h, k): (n, v)
            for t, h, k, n, v in zip(
                cols["time"], cols["hex"], kind, cols["events"], cols["value_sum"]
            )
        }
        return doc, keyed

    doc_a, ra = rows(raw_a)
    doc_c, rc = rows(raw_c)
    digits = int(man["level"]["digits"])
    same_keys = ra.keys() == rc.keys()
    same_counts = same_keys and all(ra[k][0] == rc[k][0] for k in ra)
    diff = (
        max((abs((ra[k][1] or 0) - (rc[k][1] or 0)) for k in ra), default=0.0)
        if same_keys
        else None
    )
    return {
        "checked": True,
        "level_a": man["level"],
        "level_cprime": doc_c["level"],
        "rows_a": doc_a["rows"],
        "rows_cprime": doc_c["rows"],
        "same_keys": same_keys,
        "same_counts": same_counts,
        "value_sum_max_diff": diff,
        "value_sums_agree": diff is not None and diff <= 1.01 * 10**-digits,
        "identical_bytes": raw_a == raw_c,
        "sha256_a_manifest": man.get("sha256"),
        "sha256_cprime": hashlib.sha256(raw_c).hexdigest(),
        "agree": bool(
            man["level"] == doc_c["level"] and same_counts and doc_a["rows"] == doc_c["rows"]
        ),
    }


def h3_throughput(bench: Bench) -> dict[str, Any]:
    with tempfile.NamedTemporaryFile(suffix=".json", delete=False) as tmp:
        path = Path(tmp.name)
    # At most 20M points are held in memory; more would measure the same rate.
    argv = [
        bench.py,
        str(BENCH / "h3_points.py"),
        "--rows",
        str(bench.rows),
        "--points",
        str(20_000_000),
        "--repeat",
        str(max(3, bench.repeat)),
        "--json",
        str(path),
    ]
    wall, ru, rc, out, err = run_proc(argv, env=bench.env, cwd=REPO)
    try:
        res: dict[str, Any] = json.loads(path.read_text()) if rc == 0 else {"error": err}
    finally:
        path.unlink(missing_ok=True)
    print("  " + (out.strip() or err.strip()), flush=True)
    return res


def refit(bench: Bench, budget: str) -> dict[str, Any]:
    """Warm the partial cache with one run, then re-fit from it with another budget.

    A re-fit or a ladder stores what it measures, so each one would make the next faster:
    the cache as the warm run left it is copied aside and put back before every timed
    re-fit run and every first ladder, so each of those samples starts from one cold run's
    cache. "ladder again" is a second ladder right after the first (everything measured)."""
    d = bench.data
    shutil.rmtree(bench.cache, ignore_errors=True)
    snapshot = bench.cache.with_name("cache-after-warm")
    shutil.rmtree(snapshot, ignore_errors=True)

    def restore() -> None:
        shutil.rmtree(bench.cache, ignore_errors=True)
        shutil.copytree(snapshot, bench.cache, symlinks=True)

    recipe = str(d / "recipe_a.toml")
    warm = bench.sample(
        "warm", 0, [*bench.reduce, "run", recipe, "--quiet", "--out", str(d / "out" / "refit")]
    )
    entries = sorted(bench.cache.glob("*/table.parquet"))
    partial_rows = None
    spilled = sorted(bench.cache.glob("*/meta.json"))
    if not entries and spilled:  # a spilled partial: keyed rows, counted in its meta.json
        with contextlib.suppress(OSError, ValueError, KeyError):
            partial_rows = int(json.loads(spilled[0].read_text())["rows"])
    if entries:
        code = (
            "import sys, polars as pl; "
            "print(pl.scan_parquet(sys.argv[1]).select(pl.len()).collect().item())"
        )
        got = subprocess.run(
            [bench.py, "-c", code, str(entries[0])], capture_output=True, text=True
        )
        partial_rows = int(got.stdout) if got.returncode == 0 and got.stdout.strip() else None
    shutil.copytree(bench.cache, snapshot, symlinks=True)
    ladder_argv = [*bench.reduce, "ladder", recipe, "--budget", budget, "--quiet"]
    ladder, again, run = [], [], []
    for i in range(bench.repeat):
        restore()
        run.append(
            bench.sample(
                "refit-run",
                i,
                [
                    *bench.reduce,
                    "run",
                    recipe,
                    "--budget",
                    budget,
                    "--quiet",
                    "--out",
                    str(d / "out" / "refit"),
                ],
            )
        )
        restore()
        ladder.append(bench.sample("ladder", i, ladder_argv))
        again.append(bench.sample("ladder-again", i, ladder_argv))
    shutil.rmtree(snapshot, ignore_errors=True)

    def med(xs: list[Sample], key: str) -> float | None:
        return _median([getattr(s, key) for s in xs if s.rc == 0])

    return {
        "budget": budget,
        "warm_run": asdict(warm),
        "finest_partial_rows": partial_rows,
        "ladder": [asdict(s) for s in ladder],
        "run": [asdict(s) for s in run],
        "ladder_again": [asdict(s) for s in again],
        "ladder_median": med(ladder, "wall"),
        "run_median": med(run, "wall"),
        "ladder_again_median": med(again, "wall"),
        "ladder_cpu_median": med(ladder, "cpu"),
        "run_cpu_median": med(run, "cpu"),
        "ladder_again_cpu_median": med(again, "cpu"),
        "run_failed": sum(s.rc != 0 for s in run),
    }


def split_tenths(d: Path) -> Path:
    """The events as 10 files of equal row counts under ``tenths/`` (made once)."""
    out = d / "tenths"
    if len(list(out.glob("part-*.parquet"))) == 10:
        return out
    code = (
        "import sys, polars as pl; from pathlib import Path; d = Path(sys.argv[1]); "
        "lf = pl.scan_parquet(str(d / 'events' / '*.parquet')); "
        "n = lf.select(pl.len()).collect().item(); step = -(-n // 10); "
        "(d / 'tenths').mkdir(exist_ok=True); "
        "[lf.slice(i * step, step).sink_parquet(d / 'tenths' / f'part-{i}.parquet') "
        "for i in range(10)]"
    )
    subprocess.run([sys.executable, "-c", code, str(d)], check=True)
    return out


def incremental(bench: Bench) -> dict[str, Any]:
    """(f): 1 new file of 10, with the 9 others cached, against a full --no-cache run."""
    d = bench.data
    tenths = split_tenths(d)
    recipe = d / "recipe_f.toml"
    recipe.write_text(
        RECIPE_A.format(budget="2MB").replace('"events/*.parquet"', '"tenths/*.parquet"')
    )
    out_full, out_inc = d / "out" / "f-full", d / "out" / "f-inc"
    shutil.rmtree(bench.cache, ignore_errors=True)
    last, aside = tenths / "part-9.parquet", d / "part-9.parquet.aside"
    full, inc = [], []
    for i in range(bench.repeat):
        full.append(
            bench.sample(
                "f-full",
                i,
                [
                    *bench.reduce,
                    "run",
                    str(recipe),
                    "--no-cache",
                    "--quiet",
                    "--out",
                    str(out_full),
                ],
            )
        )
        os.replace(last, aside)
        try:  # the 9 earlier nights, cached (untimed)
            bench.sample(
                "f-warm", i, [*bench.reduce, "run", str(recipe), "--quiet", "--out", str(out_inc)]
            )
        finally:
            os.replace(aside, last)
        inc.append(
            bench.sample(
                "f-inc", i, [*bench.reduce, "run", str(recipe), "--quiet", "--out", str(out_inc)]
            )
        )
    same = _same_payloads(out_full, out_inc)
    fm, im = (
        _median([s.wall for s in full if s.rc == 0]),
        _median([s.wall for s in inc if s.rc == 0]),
    )
    return {
        "full": [asdict(s) for s in full],
        "incremental": [asdict(s) for s in inc],
        "full_median": fm,
        "incremental_median": im,
        "ratio": im / fm if fm and im else None,
        "target": "<= 0.30",
        "same_bytes": same,
    }


def on_cluster(bench: Bench) -> dict[str, Any]:
    """(g): recipe (a) on a local 2-worker cluster against one process."""
    d = bench.data
    recipe = str(d / "recipe_a.toml")
    one, two = [], []
    for i in range(bench.repeat):
        one.append(
            bench.sample(
                "g-local",
                i,
                [
                    *bench.reduce,
                    "run",
                    recipe,
                    "--no-cache",
                    "--quiet",
                    "--out",
                    str(d / "out" / "g1"),
                ],
            )
        )
        two.append(
            bench.sample(
                "g-cluster",
                i,
                [
                    *bench.reduce,
                    "run",
                    recipe,
                    "--no-cache",
                    "--quiet",
                    "--cluster",
                    "local:2",
                    "--out",
                    str(d / "out" / "g2"),
                ],
            )
        )
    om, tm = (
        _median([s.wall for s in one if s.rc == 0]),
        _median([s.wall for s in two if s.rc == 0]),
    )
    return {
        "local": [asdict(s) for s in one],
        "cluster": [asdict(s) for s in two],
        "local_median": om,
        "cluster_median": tm,
        "ratio": tm / om if om and tm else None,
        "target": "<= 1.3",
        "same_bytes": _same_payloads(d / "out" / "g1", d / "out" / "g2"),
    }


def _same_payloads(a: Path, b: Path) -> bool:
    pa, pb = sorted(a.glob("*.json")), sorted(b.glob("*.json"))
    return (
        bool(pa)
        and [p.name for p in pa] == [p.name for p in pb]
        and all(
            x.read_bytes() == y.read_bytes()
            for x, y in zip(pa, pb)
            if not x.name.endswith(".manifest.json")
        )
    )


def _median(xs: list[float]) -> float | None:
    return statistics.median(xs) if xs else None


# --------------------------------------------------------------------------------------------
# Summary
# --------------------------------------------------------------------------------------------


def summarize(samples: list[Sample]) -> dict[str, dict[str, Any]]:
    out: dict[str, dict[str, Any]] = {}
    for t in TIMED:
        ok = [s for s in samples if s.task == t and s.rc == 0]
        bad = [s for s in samples if s.task == t and s.rc != 0]
        if not ok and not bad:
            continue
        walls = [s.wall for s in ok]
        out[t] = {
            "runs": len(ok),
            "failed": len(bad),
            "median": statistics.median(walls) if walls else None,
            "min": min(walls) if walls else None,
            "max": max(walls) if walls else None,
            "cpu_median": statistics.median(s.cpu for s in ok) if ok else None,
            "rss_mb": max(s.rss_mb for s in ok) if ok else None,
        }
    return out


def verdicts(
    rows: int,
    summary: dict[str, dict[str, Any]],
    h3: dict[str, Any] | None,
    ref: dict[str, Any] | None = None,
) -> list[dict[str, Any]]:
    def med(t: str, key: str = "median") -> float | None:
        v = summary.get(t, {}).get(key)
        return float(v) if v else None

    out = []

    def ratio(name: str, num: str, den: str, op: str, target: float) -> None:
        for key, label in (("median", "wall"), ("cpu_median", "cpu")):
            n, d = med(num, key), med(den, key)
            value = n / d if n and d else None
            met = None if value is None else (value <= target if op == "<=" else value >= target)
            out.append(
                {
                    "figure": f"{name} ({label})",
                    "value": value,
                    "target": f"{op} {target}",
                    "met": met,
                }
            )

    ratio("a/c", "a", "c", "<=", 1.15)
    ratio("a/c′", "a", "cprime", "<=", 1.15)
    ratio("b/d", "b", "d", "<=", 1.0)
    ratio("e/b", "e", "b", ">=", 10.0)
    if ref:
        # Warm re-fits from the cached partial against the cold run (a), same process rules.
        for name, key, target in (
            ("re-fit run --budget / a", "run", 0.10),
            ("warm ladder / a", "ladder", 0.20),
            ("warm ladder again / a", "ladder_again", 0.20),
        ):
            for suffix, label in (("median", "wall"), ("cpu_median", "cpu")):
                n = ref.get(f"{key}_{suffix}")
                d = med("a", suffix)
                value = n / d if n and d else None
                out.append(
                    {
                        "figure": f"{name} ({label})",
                        "value": value,
                        "target": f"<= {target}",
                        "met": None if value is None else value <= target,
                    }
                )
    limit = 1.5 if rows <= 20_000_000 else 2.5
    rss = med("a", "rss_mb")
    out.append(
        {
            "figure": "peak RSS of (a), GB",
            "value": rss / 1000 if rss else None,
            "target": f"<= {limit}",
            "met": None if rss is None else rss / 1000 <= limit,
        }
    )
    if h3 and "points_per_second" in h3:
        v = h3["points_per_second"] / 1e6
        out.append(
            {"figure": "H3 indexing, M points/s", "value": v, "target": ">= 3.0", "met": v >= 3.0}
        )
        # The same work with the cores to itself: per CPU-second times the threads used.
        v = h3["points_per_cpu_second"] * min(h3["threads"], os.cpu_count() or 1) / 1e6
        out.append(
            {
                "figure": "H3 indexing, M points/CPU-s x cores",
                "value": v,
                "target": ">= 3.0",
                "met": v >= 3.0,
            }
        )
    base = "q" if "q" in summary else "a"  # same terminal without progress, else (a)
    for key, label in (("median", "wall"), ("cpu_median", "cpu")):
        pv, bv = med("p", key), med(base, key)
        if pv and bv:
            v = (pv / bv - 1) * 100
            out.append(
                {
                    "figure": f"progress overhead p/{base}, % ({label})",
                    "value": v,
                    "target": "< 2",
                    "met": v < 2,
                }
            )
    return out


def _f(v: float | None, fmt: str = "{:.2f}") -> str:
    return "-" if v is None else fmt.format(v)


def print_report(
    rows: int,
    summary: dict[str, dict[str, Any]],
    ver: list[dict[str, Any]],
    ref: dict[str, Any] | None,
    checks: dict[str, Any],
    cprime: dict[str, Any] | None = None,
    loads: dict[str, Any] | None = None,
) -> None:
    names = {
        "a": "a reduce run, hex x time x kind (ladder fit)",
        "b": "b reduce run, region x kind rates",
        "c": "c polars, finest level of (a) only",
        "cprime": "c′ polars, (a)'s published level by hand",
        "d": "d duckdb SQL, (b) by hand",
        "e": "e pandas, (b) by hand",
        "p": "p (a) with progress on a pty",
        "q": "q (a) --quiet on a pty",
        "s": "s reduce check (b): start-up, no scan",
    }
    print(f"\nrows: {rows:,}")
    head = f"{'task':<46} {'median s':>9} {'min s':>8} {'max s':>8} {'cpu s':>8} {'peak MB':>8}"
    print(head)
    print("-" * len(head))
    for t, s in summary.items():
        fail = f"  ({s['failed']} failed)" if s["failed"] else ""
        print(
            f"{names[t]:<46} {_f(s['median']):>9} {_f(s['min']):>8} {_f(s['max']):>8} "
            f"{_f(s['cpu_median']):>8} {_f(s['rss_mb'], '{:.0f}'):>8}{fail}"
        )
    print()
    for v in ver:
        mark = {True: "met", False: "MISSED", None: "n/a"}[v["met"]]
        print(f"{v['figure']:<38} {_f(v['value'], '{:.3f}'):>10}   target {v['target']:<8} {mark}")
    if ref:
        cold = summary.get("a", {}).get("median")
        print(
            f"\nre-fit from the cached partial (budget {ref['budget']}, "
            f"{_f(ref['finest_partial_rows'], '{:,}')} rows in the cached partial):"
        )
        print("  (re-fit run and first ladder: each from the cache one cold run left)")
        for name, key in (
            ("reduce run --budget         ", "run_median"),
            ("reduce ladder --budget      ", "ladder_median"),
            ("reduce ladder --budget again", "ladder_again_median"),
        ):
            v = ref[key]
            if v is None:
                print(f"  {name}: every run failed (exit 1: does the budget fit?)")
                continue
            print(
                f"  {name}: median {v:.2f} s"
                + (f" = {v / cold:.2f} x the cold run ({cold:.2f} s)" if cold else "")
            )
    if checks.get("checked"):
        same = ", ".join(
            f"{k[-1]}: {'yes' if v else 'NO'}"
            for k, v in checks.items()
            if k.startswith("b_equals_")
        )
        print(f"\n(b) payload rows {checks['rows']}; same numbers as {same}")
    if cprime is not None:
        if not cprime.get("checked"):
            print("\n(a) and c′ payloads: not compared (a payload is missing)")
        else:
            yn = {True: "yes", False: "NO"}
            lv = cprime["level_a"]
            print(
                f"\n(a) and c′ payloads agree: {yn[cprime['agree']]} (level hex "
                f"{lv.get('hex')}, {lv.get('time')}, top {lv.get('top')}, digits "
                f"{lv.get('digits')}; rows {cprime['rows_a']:,} and "
                f"{cprime['rows_cprime']:,}; same keys {yn[cprime['same_keys']]}, same "
                f"counts {yn[cprime['same_counts']]}, value sums within rounding "
                f"{yn[cprime['value_sums_agree']]}; identical bytes "
                f"{yn[cprime['identical_bytes']]})"
            )
    if loads:
        print(
            f"\nload average (1, 5, 15 min): before {loads['before']}, after "
            f"{loads['after']}; 1-minute load at the timed starts: median "
            f"{_f(loads['median'])}, range {_f(loads['min'])}-{_f(loads['max'])}"
        )


# --------------------------------------------------------------------------------------------
# Main
# --------------------------------------------------------------------------------------------


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Benchmark reduce against polars, DuckDB, pandas.")
    ap.add_argument("--rows", default="1M", help="1M, 5M, 20M, 100M or a plain integer")
    ap.add_argument("--repeat", type=int, default=3, help="repetitions of each timed task")
    ap.add_argument(
        "--tasks",
        default=",".join((*TIMED, *EXTRA)),
        help="comma-separated: a,b,c,cprime,d,e,p,q,s (timed), h3, refit",
    )
    ap.add_argument("--budget", default="2MB", help="budget.max of recipe (a)")
    ap.add_argument(
        "--refit-budget",
        default="1.5MB",
        help="budget of the re-fit from the cached partial (must fit)",
    )
    ap.add_argument("--timeout", type=float, default=3600, help="seconds per process")
    ap.add_argument(
        "--commit",
        default=None,
        metavar="REV",
        help="measure the package as of this commit (exported with git archive "
        "under bench/data/trees/) instead of the working tree",
    )
    ap.add_argument("--json", type=Path, default=None, help="write every figure here")
    a = ap.parse_args(argv)
    try:
        rows = synth.parse_rows(a.rows)
    except ValueError as e:
        ap.error(str(e))
    tasks = [t.strip() for t in a.tasks.split(",") if t.strip()]
    unknown = [t for t in tasks if t not in (*TIMED, *EXTRA)]
    if unknown or a.repeat < 1:
        ap.error(
            f"--tasks: unknown {unknown}; use some of {', '.join((*TIMED, *EXTRA))}"
            if unknown
            else "--repeat must be at least 1"
        )

    DATA.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    if not synth.complete(DATA, rows):
        # In a child process, so this process stays small (see synth.py).
        subprocess.run(
            [sys.executable, str(BENCH / "synth.py"), "--rows", str(rows), "--root", str(DATA)],
            check=True,
        )
    d = DATA / synth.label(rows)
    gen_s = time.perf_counter() - t0
    write_recipes(d, a.budget)
    files = synth.event_files(d)
    warm_s = warm_page_cache(files)
    print(
        f"bench: {rows:,} rows in {len(files)} file(s) under {d} "
        f"({sum(f.stat().st_size for f in files) / 1e9:.2f} GB; generation {gen_s:.0f} s, "
        f"page-cache warm-up {warm_s:.1f} s); {os.cpu_count()} cores; load {loadavg()}",
        flush=True,
    )
    code, sha = export_tree(a.commit) if a.commit else (REPO, None)
    print(
        f"bench: measuring reduce from {'commit ' + sha[:12] if sha else 'the working tree'}"
        f" ({code})",
        flush=True,
    )
    bench = Bench(rows, d, repeat=a.repeat, timeout=a.timeout, code=code)
    load_before = loadavg()
    ver_before = versions()  # the tree may change under a long run: compare with the end

    samples: list[Sample] = []
    timed = [t for t in TIMED if t in tasks]
    if "cprime" in timed and "a" not in timed:
        # c′ computes the level (a) published: publish it once (untimed) for this commit.
        print("c′ needs (a)'s manifest: one untimed run of (a)", flush=True)
        bench.sample("a", -1)
    for rep in range(a.repeat):
        print(f"round {rep + 1}/{a.repeat}", flush=True)
        for t in timed:
            samples.append(bench.sample(t, rep))
    checks = check_b(d) if "b" in timed else {}

    h3 = None
    if "h3" in tasks:
        print("H3 indexing throughput", flush=True)
        h3 = h3_throughput(bench)
    ref = None
    if "refit" in tasks:
        print(f"re-fit from the cached partial (budget {a.refit_budget})", flush=True)
        ref = refit(bench, a.refit_budget)

    inc = None
    if "f" in tasks:
        print("(f) an incremental night: 1 new file of 10", flush=True)
        inc = incremental(bench)
    clu = None
    if "g" in tasks:
        print("(g) (a) on a local 2-worker cluster", flush=True)
        clu = on_cluster(bench)

    cprime = check_cprime(d) if "cprime" in timed else None
    summary = summarize(samples)
    ver = verdicts(rows, summary, h3, ref)
    started = [s.load1 for s in samples if s.load1 is not None]
    loads = {
        "before": load_before,
        "after": loadavg(),
        "median": _median(started),
        "min": min(started, default=None),
        "max": max(started, default=None),
    }
    print_report(rows, summary, ver, ref, checks, cprime, loads)
    for name, doc, what in (("f", inc, "incremental / full"), ("g", clu, "cluster / local")):
        if doc:
            print(
                f"({name}) {what}: {_f(doc['ratio'], '{:.3f}')} (target {doc['target']}); "
                f"same payload bytes: {'yes' if doc['same_bytes'] else 'NO'}"
            )
    if a.json:
        doc = {
            "rows": rows,
            "files": len(files),
            "bytes": sum(f.stat().st_size for f in files),
            "repeat": a.repeat,
            "cores": os.cpu_count(),
            "budget": a.budget,
            "load_before": load_before,
            "load_after": loads["after"],
            "versions_before": ver_before,
            "versions": versions(),
            "measured_commit": sha or "working tree",
            "summary": summary,
            "targets": ver,
            "h3": h3,
            "refit": ref,
            "checks": checks,
            "cprime_check": cprime,
            "loads": loads,
            "incremental": inc,
            "cluster": clu,
            "progress_seen": [s.info.get("progress_seen") for s in samples if s.task == "p"],
            "samples": [asdict(s) for s in samples],
            "harness_peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e3,
            "total_seconds": time.perf_counter() - t0,
        }
        a.json.parent.mkdir(parents=True, exist_ok=True)
        a.json.write_text(json.dumps(doc, indent=2))
        print(f"\nfigures written to {a.json}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
