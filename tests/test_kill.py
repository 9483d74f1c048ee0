"""Atomic publish under SIGKILL: a reader sees the old payload or the new one, never a torn one.

``reduce.publish`` writes payload and manifest to temporary files, journals the two renames,
renames, then removes the journal; ``recover(folder)`` completes a commit whose journal is
still there (README, DEVELOPERS.md). These tests kill writers with SIGKILL (which cannot be
caught, so no clean-up code runs) at many moments and check the folder after each kill:

- before ``recover``: the payload is byte-for-byte one of the payloads ever published (never
  a mix or a prefix), the manifest is complete JSON, and where the manifest's checksum does
  not match the payload, a commit journal is there to complete it;
- after ``recover``: the payload is the old or the new one, the manifest's sha256 is the
  payload's, and no journal or temporary file is left.

Three writers are killed: ``python -m reduce run`` at random moments of a whole run; a loop
publishing alternating payloads A and B (which spends most of its time writing and renaming,
so kills land in the commit window); and one publish killed deterministically before each
file-system step it takes (every fsync, rename and unlink), so every window is hit at least
once whatever the timing of the machine.
"""

from __future__ import annotations

import hashlib
import json
import os
import random
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from reduce.publish import recover
from tests._builders import events

pytestmark = pytest.mark.slow

REPO = Path(__file__).resolve().parents[1]
JOURNAL_GLOB = ".*.reduce-commit"


def env() -> dict[str, str]:
    e = dict(os.environ)
    e["PYTHONPATH"] = os.pathsep.join([str(REPO), e.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    e.pop("CI", None)
    return e


def sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def check_folder(folder: Path, name: str, published: set[bytes], old: bytes, new: bytes) -> bool:
    """Check the folder right after a kill, recover it, check again; True if the kill left
    a commit half done (a journal to complete)."""
    payload = folder / name
    manifest = folder / (name + ".manifest.json")
    journal = list(folder.glob(JOURNAL_GLOB))
    # Before recover(): whatever a reader would see now.
    data = payload.read_bytes()
    assert data in published, f"torn payload: {len(data)} bytes, not a published payload"
    doc = json.loads(manifest.read_bytes())  # complete JSON, never a prefix
    if doc["sha256"] != sha(data):
        assert journal, "manifest and payload disagree and no journal can complete the commit"
    recover(folder)
    data = payload.read_bytes()
    assert data in (old, new), "after recover the payload is neither the old nor the new one"
    assert json.loads(manifest.read_bytes())["sha256"] == sha(data)
    assert not list(folder.glob(JOURNAL_GLOB))
    assert not [p.name for p in folder.glob(".*.tmp")]
    return bool(journal)


# --------------------------------------------------------------------------------------------
# 1. The command line killed at random moments of a whole run
# --------------------------------------------------------------------------------------------

RECIPE = """
name = "killed"

[source]
path = "events.parquet"
time = "ts"
lat = "lat"
lon = "lon"

[group]
hex = { levels = [8, 7, 6] }
time = { levels = ["1h", "1d"] }
category = { column = "kind" }

[measures]
reports = "count"
observers = { distinct = "who" }
severity = { mean = "sev" }

[prune]
top = { k = [4, 2], by = "reports" }

[output]
path = "unused/killed.json"
digits = 4
"""

VARIANTS = ((), ("--set", "output.digits=1"))  # two different payloads at the same path


def cli(tmp: Path, out: Path, variant: int) -> subprocess.Popen[bytes]:
    return subprocess.Popen(
        [
            sys.executable,
            "-m",
            "reduce",
            "run",
            str(tmp / "recipe.toml"),
            "--out",
            str(out),
            "--no-cache",
            "--quiet",
            *VARIANTS[variant],
        ],
        cwd=tmp,
        env=env(),
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )


def test_cli_run_killed_at_random_moments_leaves_old_or_new_payload(tmp_path: Path) -> None:
    events(n=20000).write_parquet(tmp_path / "events.parquet")
    (tmp_path / "recipe.toml").write_text(textwrap.dedent(RECIPE))
    expected: list[bytes] = []
    durations = []
    for v in range(2):  # the payload each variant publishes, and how long a run takes
        ref = tmp_path / f"ref{v}"
        t0 = time.perf_counter()
        proc = cli(tmp_path, ref, v)
        _, err = proc.communicate(timeout=60)
        durations.append(time.perf_counter() - t0)
        assert proc.returncode == 0, err.decode()
        expected.append((ref / "killed.json").read_bytes())
    assert expected[0] != expected[1]
    published = set(expected)

    out = tmp_path / "out"
    proc = cli(tmp_path, out, 0)
    proc.communicate(timeout=60)
    assert proc.returncode == 0
    current = expected[0]
    rng = random.Random(1729)
    span = max(durations) * 1.15
    for _ in range(18):
        v = 1 - expected.index(current)  # publish the other payload
        proc = cli(tmp_path, out, v)
        time.sleep(rng.uniform(0.0, span))  # spread over the whole run, write included
        proc.send_signal(signal.SIGKILL)
        proc.communicate(timeout=60)
        check_folder(out, "killed.json", published, old=current, new=expected[v])
        current = (out / "killed.json").read_bytes()
    # The folder is still usable: a normal run after all these kills publishes.
    proc = cli(tmp_path, out, 0)
    proc.communicate(timeout=60)
    assert proc.returncode == 0
    assert (out / "killed.json").read_bytes() == expected[0]


# --------------------------------------------------------------------------------------------
# 2. A loop publishing A, B, A, B ... killed at random moments
# --------------------------------------------------------------------------------------------

PUBLISH_LOOP = """
import sys
from pathlib import Path
from reduce.publish import publish, sha256

folder, a, b, first = Path(sys.argv[1]), sys.argv[2], sys.argv[3], int(sys.argv[4])
payloads = [Path(a).read_bytes(), Path(b).read_bytes()]
print("ready", flush=True)
i = first
while True:
    data = payloads[i % 2]
    publish(folder / "p.json", data,
            {"format": "reduce.manifest/1", "payload": "p.json", "sha256": sha256(data)})
    i += 1
"""


def payload_bytes(fill: str, n: int) -> bytes:
    return b'{"format": "reduce.columns/1", "fill": "' + fill.encode() * n + b'"}'


def test_publish_loop_killed_at_random_moments_is_never_torn(tmp_path: Path) -> None:
    from reduce.publish import publish

    a, b = payload_bytes("a", 1_500_000), payload_bytes("b", 700_000)
    (tmp_path / "a.bin").write_bytes(a)
    (tmp_path / "b.bin").write_bytes(b)
    script = tmp_path / "loop.py"
    script.write_text(PUBLISH_LOOP)
    out = tmp_path / "out"
    out.mkdir()
    publish(
        out / "p.json", a, {"format": "reduce.manifest/1", "payload": "p.json", "sha256": sha(a)}
    )
    rng = random.Random(31337)
    for i in range(40):
        proc = subprocess.Popen(
            [
                sys.executable,
                str(script),
                str(out),
                str(tmp_path / "a.bin"),
                str(tmp_path / "b.bin"),
                str(i % 2),
            ],
            env=env(),
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
        )
        assert proc.stdout is not None
        assert proc.stdout.readline() == b"ready\n", proc.stderr.read() if proc.stderr else ""
        time.sleep(rng.uniform(0.0, 0.12))
        proc.send_signal(signal.SIGKILL)
        proc.communicate(timeout=30)
        assert proc.returncode == -signal.SIGKILL
        old = (out / "p.json").read_bytes()
        new = b if old == a else a
        # About a quarter of these kills land inside the commit (journal present) on a 2-core
        # machine; how many depends on its timing, so the deterministic test below is what
        # guarantees every window is hit.
        check_folder(out, "p.json", {a, b}, old=old, new=new)


# --------------------------------------------------------------------------------------------
# 3. One publish killed before each of its file-system steps
# --------------------------------------------------------------------------------------------

KILL_AT_STEP = """
import os, signal, sys
from pathlib import Path

folder, new, step = Path(sys.argv[1]), Path(sys.argv[2]).read_bytes(), int(sys.argv[3])
from reduce.publish import publish, sha256

count = 0
def killing(real):
    def step_then(*args, **kwargs):
        global count
        count += 1
        if count == step:
            os.kill(os.getpid(), signal.SIGKILL)
        return real(*args, **kwargs)
    return step_then

for name in ("fsync", "replace", "unlink"):
    setattr(os, name, killing(getattr(os, name)))
publish(folder / "p.json", new,
        {"format": "reduce.manifest/1", "payload": "p.json", "sha256": sha256(new)})
print(count, flush=True)
"""


def test_publish_killed_before_each_step_recovers_to_old_or_new(tmp_path: Path) -> None:
    from reduce.publish import publish

    a, b = payload_bytes("a", 50_000), payload_bytes("b", 20_000)
    (tmp_path / "b.bin").write_bytes(b)
    script = tmp_path / "step.py"
    script.write_text(KILL_AT_STEP)

    def attempt(step: int) -> subprocess.CompletedProcess[bytes]:
        out = tmp_path / f"out{step}"
        out.mkdir()
        publish(
            out / "p.json",
            a,
            {"format": "reduce.manifest/1", "payload": "p.json", "sha256": sha(a)},
        )
        return subprocess.run(
            [sys.executable, str(script), str(out), str(tmp_path / "b.bin"), str(step)],
            env=env(),
            capture_output=True,
            timeout=60,
        )

    # Step 0 never kills: it counts the steps of a whole publish.
    done = attempt(0)
    assert done.returncode == 0, done.stderr.decode()
    steps = int(done.stdout)
    assert steps >= 8  # 3 file fsyncs, 2 folder fsyncs, 3 renames, 1 unlink at least
    outcomes = {}
    half_done = 0
    for step in range(1, steps + 1):
        proc = attempt(step)
        assert proc.returncode == -signal.SIGKILL, proc.stderr.decode()
        out = tmp_path / f"out{step}"
        half_done += check_folder(out, "p.json", {a, b}, old=a, new=b)
        outcomes[step] = (out / "p.json").read_bytes() == b
    # Early kills keep the old payload, late ones give the new one, and some kill landed
    # between the two renames (journal present) and was completed by recover().
    assert outcomes[1] is False
    assert outcomes[steps] is True
    assert half_done >= 1
