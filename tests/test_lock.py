"""One lock per output folder: concurrent runs publish one after the other, never mixed.

``reduce.publish`` holds an ``fcntl.flock`` on ``.reduce.lock`` in the output folder from
before the first temporary file to after the last rename (and while it completes an
interrupted commit). Readers that take it shared (``publish.reading``, as the audit does)
never see a payload beside another run's manifest. A run that cannot get the lock within
``$REDUCE_LOCK_WAIT`` seconds exits 2 with one line naming the folder and the holder's pid.

The concurrent runs are child processes whose rename of the payload is followed by a
deliberate pause, so the window between the two renames of a commit, where a second run
without the lock would interleave, is wide on any machine.
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest
from click.testing import CliRunner

from reduce.cli import main
from reduce.publish import folder_lock, manifest_path, publish, reading
from tests import _builders as builders
from tests._builders import project

REPO = Path(__file__).resolve().parents[1]

# A run of the command line whose payload renames into $SLOW_FOLDER pause for a moment.
SLOW_RUN = textwrap.dedent("""
    import os, sys, time
    real = os.replace
    folder = os.environ["SLOW_FOLDER"]
    def slow(src, dst, *a, **k):
        real(src, dst, *a, **k)
        d = str(dst)
        if d.startswith(folder) and d.endswith(".json") and not d.endswith(".manifest.json"):
            time.sleep(0.3)
    os.replace = slow
    from reduce.cli import main
    main(sys.argv[1:], prog_name="reduce")
""")

# Holds the folder's lock until its stdin closes.
HOLD = textwrap.dedent("""
    import sys
    from pathlib import Path
    from reduce.publish import folder_lock
    with folder_lock(Path(sys.argv[1])):
        print("held", flush=True)
        sys.stdin.read()
""")


def env(**extra: str) -> dict[str, str]:
    e = dict(os.environ)
    e["PYTHONPATH"] = os.pathsep.join([str(REPO), e.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    e.pop("CI", None)
    e.update(extra)
    return e


def sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def hold_lock(folder: Path) -> subprocess.Popen[str]:
    proc = subprocess.Popen(
        [sys.executable, "-c", HOLD, str(folder)],
        env=env(),
        text=True,
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
    )
    assert proc.stdout is not None and proc.stdout.readline() == "held\n"
    return proc


def release(proc: subprocess.Popen[str]) -> None:
    assert proc.stdin is not None
    proc.stdin.close()
    proc.wait(timeout=60)


def check_pair(folder: Path, name: str) -> bytes | None:
    """Under the shared lock: the payload, after checking its manifest names its sha256."""
    with reading(folder):
        payload, man = folder / name, manifest_path(folder / name)
        if not payload.exists():
            return None
        data = payload.read_bytes()
        doc = json.loads(man.read_bytes())
    assert doc["sha256"] == sha(data), "a payload beside another run's manifest"
    assert doc["payload"] == name
    return data


@pytest.mark.slow
@pytest.mark.parametrize("budgets", [("20KB", "60KB"), ("15KB", "30KB", "80KB")])
def test_concurrent_runs_into_one_folder_never_mix_payload_and_manifest(
    tmp_path: Path, budgets: tuple[str, ...]
) -> None:
    recipe = project(tmp_path)
    out = tmp_path / "out"
    script = tmp_path / "slow_run.py"
    script.write_text(SLOW_RUN)
    procs = [
        subprocess.Popen(
            [
                sys.executable,
                str(script),
                "run",
                str(recipe),
                "--quiet",
                "--budget",
                b,
                "--out",
                str(out),
            ],
            env=env(SLOW_FOLDER=str(out)),
            cwd=tmp_path,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
        )
        for b in budgets
    ]
    checks = 0
    seen: set[bytes] = set()
    while any(p.poll() is None for p in procs):
        if out.is_dir():
            data = check_pair(out, "hexmap.json")
            if data is not None:
                seen.add(data)
                checks += 1
        time.sleep(0.005)
    for p in procs:
        assert p.returncode == 0, p.stderr.read().decode() if p.stderr else ""
    final = check_pair(out, "hexmap.json")
    assert final is not None and checks >= 1
    # Nothing published is ever wrong: every payload seen is what a fresh --no-cache run
    # with one of the budgets publishes.
    import reduce

    fresh = set()
    for i, b in enumerate(budgets):
        res = reduce.run(recipe, out_dir=tmp_path / f"fresh{i}", budget=b, use_cache=False)
        assert res.path is not None
        fresh.add(res.path.read_bytes())
    assert seen | {final} <= fresh
    assert not list(out.glob(".*.tmp")) and not list(out.glob(".*.reduce-commit"))


def test_second_run_waits_then_names_the_folder_and_holder(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    recipe = project(tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    holder = hold_lock(out)
    try:
        monkeypatch.setenv("REDUCE_LOCK_WAIT", "0.2")
        from reduce.cli import main

        res = CliRunner().invoke(main, ["run", str(recipe), "--quiet", "--no-cache"])
    finally:
        release(holder)
    assert res.exit_code == 2, res.output
    assert res.stderr.splitlines() == [
        f"error: {out}: another reduce run (pid {holder.pid}) holds the output folder's lock; "
        "waited 0.2 s ($REDUCE_LOCK_WAIT); try again when it has finished"
    ]
    assert sorted(p.name for p in out.iterdir()) == [".reduce.lock"]  # nothing written


def test_publish_waits_for_the_lock_and_then_publishes(tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    holder = hold_lock(out)
    data = b'{"format": "reduce.columns/1"}'
    try:
        with pytest.raises(Exception, match="holds the output folder's lock"):
            with folder_lock(out, wait=0.05):
                pass
    finally:
        release(holder)
    publish(
        out / "p.json",
        data,
        {"format": "reduce.manifest/1", "payload": "p.json", "sha256": sha(data)},
    )
    assert check_pair(out, "p.json") == data


def _interrupted_commit(out: Path) -> bytes:
    """A folder where a publish died between its two renames (its pid no longer runs)."""
    builders.write_payload(out / "p.json", builders.columns_payload(meta={"source": "old"}))
    new = builders.dump(builders.columns_payload(meta={"source": "new"}))
    (out / "p.json").write_bytes(new)  # the payload's rename happened
    tm = ".p.json.manifest.json.999999999.tmp"
    (out / tm).write_bytes(builders.dump(builders.manifest_for(out / "p.json")))
    (out / ".p.json.reduce-commit").write_bytes(
        json.dumps(
            {"moves": [[".p.json.999999999.tmp", "p.json"], [tm, "p.json.manifest.json"]]}
        ).encode()
    )
    assert json.loads(manifest_path(out / "p.json").read_bytes())["sha256"] != sha(new)
    return new


def test_audit_completes_an_interrupted_commit_and_says_so(tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    new = _interrupted_commit(out)
    res = CliRunner().invoke(main, ["audit", str(out), "--quiet"])
    assert res.stderr.splitlines() == [
        f"{out / '.p.json.reduce-commit'}: completed an interrupted commit of p.json before "
        "auditing"
    ]
    assert res.exit_code == 0
    assert check_pair(out, "p.json") == new
    assert not list(out.glob(".p.json.reduce-commit"))


def test_audit_reports_a_refused_journal_as_one_finding(tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    _interrupted_commit(out)
    journal = out / ".p.json.reduce-commit"
    journal.write_bytes(
        json.dumps({"moves": [["../x", "p.json"], ["y", "p.json.manifest.json"]]}).encode()
    )
    res = CliRunner().invoke(main, ["audit", str(out), "--quiet"])
    assert res.exit_code == 1
    assert journal.exists()
    lines = [line for line in res.stderr.splitlines() if line.startswith(str(journal))]
    assert lines == [
        f"{journal}: interrupted commit, not completed: {journal}: commit journal "
        "entry '../x' is not one reduce writes (expected a temporary file "
        "'.p.json.0.tmp' with one process id for both); nothing was moved: remove "
        "the journal if reduce did not write it"
    ]


def test_audit_waits_for_a_run_holding_the_lock_then_says_so(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    out = tmp_path / "out"
    out.mkdir()
    _interrupted_commit(out)
    holder = hold_lock(out)
    try:
        monkeypatch.setenv("REDUCE_LOCK_WAIT", "0.1")
        res = CliRunner().invoke(main, ["audit", str(out / "p.json"), "--quiet"])
    finally:
        release(holder)
    journal = out / ".p.json.reduce-commit"
    assert journal.exists()  # not completed under another run's lock
    # The audit cannot read the pair while another run holds the lock: one error line.
    assert res.exit_code == 2
    assert res.stderr.splitlines() == [
        f"error: {out}: another reduce run (pid {holder.pid}) holds the output folder's lock; "
        "waited 0.1 s ($REDUCE_LOCK_WAIT); try again when it has finished"
    ]
