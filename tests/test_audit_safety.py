"""The audit reads only regular files, within a size cap, and shows no content of others.

``reduce audit`` is pointed at folders other people (or other programs) write into: a FIFO
must not make it wait forever, a link to a device must not be read without end, and a link
to a file outside the folder (a system file, say) must not have its content printed in the
report. A link to a regular file in the same folder is audited like the file itself.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from reduce import audit as audit_mod
from reduce.audit import files as audit_files
from reduce.cli import main
from tests import _builders as builders

REPO = Path(__file__).resolve().parents[1]


def run_cli(*args: str) -> subprocess.CompletedProcess[str]:
    """The audit in a child process, so that a hang fails the test instead of blocking it."""
    env = dict(os.environ, PYTHONPATH=str(REPO))
    env.pop("CI", None)
    return subprocess.run(
        [sys.executable, "-m", "reduce", "audit", *args],
        env=env,
        capture_output=True,
        text=True,
        timeout=120,
    )


def test_fifo_in_a_folder_is_refused_without_blocking(tmp_path: Path) -> None:
    builders.write_payload(tmp_path / "data" / "a.json")
    os.mkfifo(tmp_path / "data" / "b.json")
    done = run_cli(str(tmp_path / "data"))
    assert done.returncode == 2
    assert done.stderr.splitlines() == [
        f"error: {tmp_path / 'data' / 'b.json'}: not a regular file (a FIFO); the audit "
        "reads only regular files and links to them"
    ]


def test_link_to_an_endless_device_is_refused(tmp_path: Path) -> None:
    (tmp_path / "zero.json").symlink_to("/dev/zero")
    done = run_cli(str(tmp_path / "zero.json"))
    assert done.returncode == 2
    assert done.stderr.splitlines() == [
        f"error: {tmp_path / 'zero.json'}: not a regular file (a character device); the audit "
        "reads only regular files and links to them"
    ]


@pytest.mark.parametrize("fmt", [[], ["--json"], ["--markdown"]])
def test_link_to_a_file_outside_the_folder_shows_no_content(tmp_path: Path, fmt: list[str]) -> None:
    outside = tmp_path / "system"
    outside.mkdir()
    (outside / "accounts").write_text("SECRETUSER:x:0:0:SECRETHOME\nother:x:1:1:/x\n")
    data = tmp_path / "data"
    data.mkdir()
    (data / "users.csv").symlink_to(outside / "accounts")
    (data / "users.json").symlink_to(outside / "accounts")
    res = CliRunner().invoke(main, ["audit", str(data), *fmt])
    assert res.exit_code == 0, res.output
    assert "SECRET" not in res.stdout and "SECRET" not in res.stderr
    assert "a link to a file outside its folder: sizes only" in res.stdout


def test_link_to_a_regular_file_in_the_folder_is_audited(tmp_path: Path) -> None:
    payload = builders.write_payload(tmp_path / "x.json")
    (tmp_path / "latest.json").symlink_to(payload.name)
    report = audit_mod.audit_paths([tmp_path / "latest.json"])
    assert report.files[0].kind == "columns" and report.files[0].rows == 3


def test_file_over_the_size_cap_is_refused(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = builders.write_payload(tmp_path / "x.json")
    monkeypatch.setattr(audit_files, "READ_MAX_BYTES", 100)
    size = path.stat().st_size
    res = CliRunner().invoke(main, ["audit", str(path)])
    assert res.exit_code == 2
    assert res.stderr.splitlines() == [
        f"error: {path}: {size:,} bytes, over the audit's limit of 100 bytes per file; is it "
        "a payload?"
    ]


def test_manifest_that_is_a_link_is_reported_not_read(tmp_path: Path) -> None:
    path = builders.write_payload(tmp_path / "x.json", manifest=False)
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    (outside / "m.json").write_text('{"format": "SECRET"}')
    (tmp_path / "x.json.manifest.json").symlink_to(outside / "m.json")
    f = audit_mod.audit_paths([path]).files[0]
    assert f.problems == (
        "manifest x.json.manifest.json: is a link, not a regular file; "
        "reduce writes manifests as regular files",
    )
