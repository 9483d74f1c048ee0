"""Faults around publishing: a full disk and SIGTERM leave no debris and the old payload.

- A failed publish (the disk full at any write or sync, on a real tiny tmpfs where the
  machine allows mounting one, else by injecting ``OSError(ENOSPC)``) removes its temporary
  files, leaves the old payload and manifest as they were, and is one line, exit 2.
- SIGTERM is handled like Ctrl-C: one line, exit 143 (128 + 15), temporary and spill files
  removed, the old payload intact; sent at several moments of whole runs that spill.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from reduce.cli import main
from reduce.errors import OutputError
from reduce.publish import LOCK_NAME, manifest_path, publish
from tests._builders import random_events, write_case

REPO = Path(__file__).resolve().parents[1]


def sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def pair(out: Path, name: str) -> tuple[bytes, dict[str, object]]:
    data = (out / name).read_bytes()
    return data, json.loads(manifest_path(out / name).read_bytes())


def manifest(name: str, data: bytes, pad: int = 0) -> dict[str, object]:
    return {
        "format": "reduce.manifest/1",
        "payload": name,
        "sha256": sha(data),
        "notes": ["x" * pad] if pad else [],
    }


def debris(folder: Path) -> list[str]:
    return sorted(
        p.name for p in folder.iterdir() if p.name.startswith(".") and p.name != LOCK_NAME
    )


def _published_old_pair(tmp: Path) -> tuple[Path, bytes]:
    """An output folder holding a published pair (``p.json`` and its manifest)."""
    out = tmp / "out"
    old = b'{"format": "reduce.columns/1", "v": 1}'
    publish(out / "p.json", old, manifest("p.json", old))
    return out, old


@pytest.mark.parametrize("failing_sync", [1, 2, 3])
def test_disk_full_at_any_sync_leaves_old_pair_and_no_temporary_file(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, failing_sync: int
) -> None:
    out, old = _published_old_pair(tmp_path)
    real = os.fsync
    calls = {"n": 0}

    def fsync(fd: int) -> None:
        calls["n"] += 1
        if calls["n"] == failing_sync:  # payload, manifest, journal temporary files
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        real(fd)

    monkeypatch.setattr(os, "fsync", fsync)
    new = b'{"format": "reduce.columns/1", "v": 2}'
    with pytest.raises(OutputError, match="No space left on device"):
        publish(out / "p.json", new, manifest("p.json", new))
    assert debris(out) == []
    assert pair(out, "p.json") == (old, manifest("p.json", old))


@pytest.mark.parametrize("after_rename", [1, 2])
def test_an_exception_right_after_a_rename_still_completes_the_pair(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, after_rename: int
) -> None:
    # An exception (a signal's, say) between a rename and the count of renames that follows
    # it: the commit is completed from what the files show, never left with the new payload
    # beside the old manifest.
    import reduce.publish as pub

    out, old = _published_old_pair(tmp_path)
    real = os.replace
    calls = {"n": 0}

    def replace(src: object, dst: object) -> None:
        real(src, dst)  # type: ignore[arg-type]
        if str(src).endswith(".tmp"):
            calls["n"] += 1
            if calls["n"] == 1 + after_rename:  # the journal's rename comes first
                raise KeyboardInterrupt

    monkeypatch.setattr(pub.os, "replace", replace)
    new = b'{"format": "reduce.columns/1", "v": 2}'
    with pytest.raises(KeyboardInterrupt):
        publish(out / "p.json", new, manifest("p.json", new))
    monkeypatch.setattr(pub.os, "replace", real)
    assert pair(out, "p.json") == (new, manifest("p.json", new))
    assert debris(out) == []


def test_sigterm_during_the_renames_is_handled_after_them(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # SIGTERM is held back while a commit renames its files: its handler runs once they are
    # all in place (the pair is whole), not between two of them.
    import reduce.publish as pub

    class Stop(Exception):
        pass

    def handler(signum: int, frame: object) -> None:
        raise Stop

    out, old = _published_old_pair(tmp_path)
    real = os.replace
    seen: list[str] = []

    def replace(src: object, dst: object) -> None:
        real(src, dst)  # type: ignore[arg-type]
        seen.append(Path(str(dst)).name)
        if Path(str(dst)).name == "p.json":  # the payload is in place: signal now
            os.kill(os.getpid(), signal.SIGTERM)

    previous = signal.signal(signal.SIGTERM, handler)
    try:
        monkeypatch.setattr(pub.os, "replace", replace)
        new = b'{"format": "reduce.columns/1", "v": 2}'
        with pytest.raises(Stop):
            publish(out / "p.json", new, manifest("p.json", new))
    finally:
        signal.signal(signal.SIGTERM, previous)
        monkeypatch.setattr(pub.os, "replace", real)
    assert "p.json.manifest.json" in seen  # the manifest's rename ran before the handler
    assert pair(out, "p.json") == (new, manifest("p.json", new))
    assert debris(out) == []


def _tmpfs(folder: Path, size: str) -> bool:
    folder.mkdir(parents=True, exist_ok=True)
    done = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder)], capture_output=True
    )
    return done.returncode == 0


@pytest.fixture
def tiny_disk(tmp_path: Path):  # type: ignore[no-untyped-def]
    disk = tmp_path / "disk"
    if not _tmpfs(disk, "64k"):
        pytest.skip("cannot mount a tmpfs here (needs root); the ENOSPC injection test covers it")
    yield disk
    subprocess.run(["umount", str(disk)], check=False)


@pytest.mark.parametrize("what", ["payload", "manifest"])
def test_full_tmpfs_keeps_old_pair_and_removes_temporary_files(tiny_disk: Path, what: str) -> None:
    old = b"[" + b"1," * 2000 + b"1]"  # 4 KB
    publish(tiny_disk / "p.json", old, manifest("p.json", old))
    if what == "payload":  # more than the disk holds
        new, pad = b"[" + b"2," * 60_000 + b"2]", 0
    else:  # the payload fits, its manifest does not
        new, pad = b"[" + b"2," * 15_000 + b"2]", 40_000
    with pytest.raises(OutputError, match="No space left on device"):
        publish(tiny_disk / "p.json", new, manifest("p.json", new, pad))
    assert debris(tiny_disk) == []
    assert pair(tiny_disk, "p.json") == (old, manifest("p.json", old))


def test_run_onto_a_full_disk_is_one_line_exit_2(tiny_disk: Path, tmp_path: Path) -> None:
    rng = np.random.default_rng(5)
    recipe = write_case(
        tmp_path / "case",
        random_events(rng, 4000),
        source={"time": "t", "lat": "lat", "lon": "lon"},
        group={"hex": {"levels": [9]}},
        measures={"n": "count"},
    )
    res = CliRunner().invoke(
        main, ["run", str(recipe), "--out", str(tiny_disk), "--quiet", "--no-cache"]
    )
    assert res.exit_code == 2, res.output
    assert res.stderr.splitlines() == [
        f"error: {tiny_disk}: cannot write (No space left on device); check free space and "
        "permissions"
    ]
    assert debris(tiny_disk) == [] and not (tiny_disk / "case.json").exists()


# --------------------------------------------------------------------------------------------
# SIGTERM
# --------------------------------------------------------------------------------------------


def _spilling_case(tmp: Path) -> Path:
    rng = np.random.default_rng(99)
    return write_case(
        tmp,
        # Enough events that a run's work outlasts its start-up (about 0.8 s of imports, when
        # a SIGTERM still ends the process at once), so the kills below land in the work.
        random_events(rng, 400_000, span_days=20),
        source={"time": "t", "lat": "lat", "lon": "lon"},
        group={
            "hex": {"levels": [10, 8, 6]},
            "time": {"levels": ["1h", "1d"]},
            "category": {"column": "kind"},
        },
        measures={"n": "count", "sx": {"sum": "x"}},
        prune={"top": {"k": [4, 2], "by": "n"}},
        name="spilly",
    )


@pytest.mark.slow
def test_sigterm_at_several_moments_leaves_no_debris_and_the_old_payload(tmp_path: Path) -> None:
    recipe = _spilling_case(tmp_path / "case")
    out, cache, tmpdir = tmp_path / "out", tmp_path / "cache", tmp_path / "tmpdir"
    tmpdir.mkdir()
    env = dict(
        os.environ, REDUCE_CACHE_DIR=str(cache), REDUCE_PROBE_ROWS="1100", TMPDIR=str(tmpdir)
    )
    env["PYTHONPATH"] = os.pathsep.join([str(REPO), env.get("PYTHONPATH", "")]).rstrip(":")
    env.pop("CI", None)

    def cmd(budget: str, no_cache: bool) -> list[str]:
        return [
            sys.executable,
            "-m",
            "reduce",
            "run",
            str(recipe),
            "--out",
            str(out),
            "--quiet",
            "--budget",
            budget,
            *(["--no-cache"] if no_cache else []),
        ]

    first = subprocess.run(cmd("100KB", True), env=env, capture_output=True)
    assert first.returncode == 0, first.stderr.decode()
    old = pair(out, "spilly.json")
    start = time.monotonic()
    subprocess.run(cmd("400KB", True), env=env, capture_output=True, check=True)
    whole = time.monotonic() - start  # spreads the kills over a run; never asserted
    # Until the command's signal handler is in place a SIGTERM ends the process at once
    # (-SIGTERM below); the kills are spread after that start-up, so that most land in the
    # command's work however short the run is.
    start = time.monotonic()
    subprocess.run([sys.executable, "-m", "reduce", "--help"], env=env, capture_output=True)
    startup = time.monotonic() - start
    fresh = pair(out, "spilly.json")  # what a whole --no-cache run publishes
    (out / "spilly.json").write_bytes(old[0])  # back to the first pair
    manifest_path(out / "spilly.json").write_bytes(json.dumps(old[1]).encode())
    rng = random.Random(12)
    outcomes = set()
    # The window in which a kill lands in the command's work: a kill that came during
    # start-up moves its lower end up, one after the run had finished its upper end down,
    # so that a short run on a busy machine is still hit in the middle of its work.
    lo, hi = startup, max(whole, startup + 0.5)
    for i in range(12):
        if i >= 6 and 143 in outcomes:
            break
        proc = subprocess.Popen(
            cmd("400KB", i % 2 == 0), env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE
        )
        delay = rng.uniform(lo, hi)
        time.sleep(delay)
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=120)
        outcomes.add(proc.returncode)
        if proc.returncode == -signal.SIGTERM:
            lo = delay
        elif proc.returncode == 0:
            hi = max(delay, lo + 0.05)
        # -SIGTERM: the signal came during start-up (imports), before the command began
        # and before it could write anything; the checks below hold for it too.
        assert proc.returncode in (0, 143, -signal.SIGTERM), err.decode()
        if proc.returncode == 143:
            assert err.decode().splitlines() == [
                "error: terminated (SIGTERM); nothing was published by the unfinished step"
            ]
        data, doc = pair(out, "spilly.json")
        assert doc["sha256"] == sha(data)
        # Nothing published is ever wrong: the old pair or the fresh one, except that a run
        # that found the finest partial cached (left by an earlier run of this loop) says
        # so in its file counts.
        if doc.get("files") != fresh[1].get("files") and data == fresh[0]:
            assert doc["files"] == {"total": 1, "scanned": 0, "reused": 1}
            doc = {**doc, "files": fresh[1]["files"]}
        assert (data, doc) in (old, fresh)
        if proc.returncode == 143 and data != old[0]:
            # Only a signal after the payload's rename completes the new pair.
            assert doc != old[1]
        assert debris(out) == []
        assert list(tmpdir.iterdir()) == []
        if cache.is_dir():
            assert [p.name for p in cache.iterdir() if p.name.startswith(".")] == []
        (out / "spilly.json").write_bytes(old[0])
        manifest_path(out / "spilly.json").write_bytes(json.dumps(old[1]).encode())
    assert 143 in outcomes


def test_sigterm_inside_polars_python_code_is_raised_a_little_later(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # Raised inside a polars callback of native code, the exception would become a native
    # panic (backtrace, exit 1); so there the signal is sent again shortly, and raised
    # where the main thread runs other code.
    import types

    from reduce import cli

    sent: list[tuple[int, int]] = []
    monkeypatch.setattr(os, "kill", lambda pid, sig: sent.append((pid, sig)))
    monkeypatch.setattr(cli, "_RETRY_SECONDS", 0.01)

    def frame(path: str) -> types.SimpleNamespace:
        return types.SimpleNamespace(f_code=types.SimpleNamespace(co_filename=path))

    cli._on_sigterm(signal.SIGTERM, frame("/x/site-packages/polars/datatypes/classes.py"))
    cli._retry.join(timeout=5)
    assert sent == [(os.getpid(), signal.SIGTERM)]
    with pytest.raises(cli.Terminated):
        cli._on_sigterm(signal.SIGTERM, frame("/x/reduce/aggregate.py"))
