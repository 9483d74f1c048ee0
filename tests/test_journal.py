"""The commit journal can only do what ``reduce.publish`` itself writes.

A journal is a file found in the output folder, so anyone who can write there can plant one.
These tests plant hostile journals (paths leaving the folder, absolute paths, links, entries
of another payload, a manifest that does not match) and check that the next publish refuses
with one line naming the journal and the bad entry, moves nothing, and touches no file
outside the folder; and that a genuine interrupted commit is still completed.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import pytest
from click.testing import CliRunner

from reduce.cli import main
from reduce.errors import OutputError
from reduce.publish import LOCK_NAME, manifest_path, publish, recover
from tests._builders import project

DEAD_PID = 999_999_999  # above any pid Linux hands out (pid_max is at most 2^22, from memory)


def sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def manifest_of(name: str, data: bytes) -> bytes:
    return json.dumps(
        {"format": "reduce.manifest/1", "payload": name, "sha256": sha(data)}
    ).encode()


def snapshot(root: Path) -> dict[str, bytes | str]:
    """Every entry under ``root`` (links as their target text), the lock file aside."""
    out: dict[str, bytes | str] = {}
    for p in sorted(root.rglob("*")):
        if p.name == LOCK_NAME:
            continue
        rel = str(p.relative_to(root))
        if p.is_symlink():
            out[rel] = f"-> {os.readlink(p)}"
        elif p.is_file():
            out[rel] = p.read_bytes()
        else:
            out[rel] = "dir"
    return out


@pytest.fixture
def scene(tmp_path: Path) -> tuple[Path, Path, Path]:
    """An output folder with a published pair, and a folder of files outside it."""
    out = tmp_path / "out"
    out.mkdir()
    payload = out / "p.json"
    old = b'{"format": "reduce.columns/1", "old": true}'
    publish(payload, old, {"format": "reduce.manifest/1", "payload": "p.json", "sha256": sha(old)})
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "secret.txt").write_bytes(b"keep me\n")
    (outside / "victim.json").write_bytes(b"do not replace me\n")
    return tmp_path, out, payload


def plant(out: Path, moves: object, name: str = ".p.json.reduce-commit") -> Path:
    j = out / name
    j.write_bytes(json.dumps({"moves": moves}).encode())
    return j


def hostile_cases(root: Path) -> dict[str, tuple[object, str]]:
    """name -> (moves, the entry the refusal must name)."""
    outside = root / "outside"
    t, tm = f".p.json.{DEAD_PID}.tmp", f".p.json.manifest.json.{DEAD_PID}.tmp"
    return {
        "src-leaves-the-folder": (
            [["../outside/secret.txt", "p.json"], [tm, "p.json.manifest.json"]],
            "../outside/secret.txt",
        ),
        "dst-leaves-the-folder": (
            [[t, "../outside/victim.json"], [tm, "p.json.manifest.json"]],
            "../outside/victim.json",
        ),
        "absolute-src": (
            [[str(outside / "secret.txt"), "p.json"], [tm, "p.json.manifest.json"]],
            str(outside / "secret.txt"),
        ),
        "absolute-dst": (
            [[t, str(outside / "victim.json")], [tm, "p.json.manifest.json"]],
            str(outside / "victim.json"),
        ),
        "another-payload-name": (
            [[".q.json.1.tmp", "q.json"], [".q.json.manifest.json.1.tmp", "q.json.manifest.json"]],
            "q.json",
        ),
        "two-process-ids": (
            [[t, "p.json"], [".p.json.manifest.json.7.tmp", "p.json.manifest.json"]],
            ".p.json.manifest.json.7.tmp",
        ),
        "three-moves": ([[t, "p.json"], [tm, "p.json.manifest.json"], ["a", "b"]], "moves"),
    }


@pytest.mark.parametrize(
    "case",
    [
        "src-leaves-the-folder",
        "dst-leaves-the-folder",
        "absolute-src",
        "absolute-dst",
        "another-payload-name",
        "two-process-ids",
        "three-moves",
    ],
)
def test_hostile_journal_is_refused_and_nothing_moves(
    scene: tuple[Path, Path, Path], case: str
) -> None:
    root, out, payload = scene
    moves, entry = hostile_cases(root)[case]
    # Temporary files of the planted form exist, so only the checks can stop the moves.
    (out / f".p.json.{DEAD_PID}.tmp").write_bytes(b"planted payload")
    (out / f".p.json.manifest.json.{DEAD_PID}.tmp").write_bytes(
        manifest_of("p.json", b"planted payload")
    )
    journal = plant(out, moves)
    before = snapshot(root)
    with pytest.raises(OutputError) as err:
        publish(payload, b'{"new": 1}', {"format": "reduce.manifest/1", "payload": "p.json"})
    message = err.value.message
    assert str(journal) in message and (entry if entry != "moves" else "") in message
    assert "\n" not in message
    assert snapshot(root) == before


def test_link_as_temporary_file_is_refused(scene: tuple[Path, Path, Path]) -> None:
    root, out, payload = scene
    secret = root / "outside" / "secret.txt"
    t, tm = f".p.json.{DEAD_PID}.tmp", f".p.json.manifest.json.{DEAD_PID}.tmp"
    (out / t).symlink_to(secret)
    (out / tm).write_bytes(manifest_of("p.json", secret.read_bytes()))
    journal = plant(out, [[t, "p.json"], [tm, "p.json.manifest.json"]])
    before = snapshot(root)
    with pytest.raises(OutputError, match=f"{journal}: commit journal entry '{t}'"):
        recover(out)
    assert snapshot(root) == before
    assert not payload.is_symlink()


def test_journal_that_is_a_link_is_refused(scene: tuple[Path, Path, Path]) -> None:
    root, out, payload = scene
    fake = root / "outside" / "plan.json"
    fake.write_bytes(
        json.dumps(
            {
                "moves": [
                    [f".p.json.{DEAD_PID}.tmp", "p.json"],
                    [f".p.json.manifest.json.{DEAD_PID}.tmp", "p.json.manifest.json"],
                ]
            }
        ).encode()
    )
    (out / ".p.json.reduce-commit").symlink_to(fake)
    before = snapshot(root)
    with pytest.raises(OutputError, match="the journal is not a regular file"):
        recover(out)
    assert snapshot(root) == before


def test_journal_pairing_a_payload_with_a_wrong_manifest_is_refused(
    scene: tuple[Path, Path, Path],
) -> None:
    root, out, _ = scene
    t, tm = f".p.json.{DEAD_PID}.tmp", f".p.json.manifest.json.{DEAD_PID}.tmp"
    (out / t).write_bytes(b"new payload")
    (out / tm).write_bytes(manifest_of("p.json", b"some other payload"))
    plant(out, [[t, "p.json"], [tm, "p.json.manifest.json"]])
    before = snapshot(root)
    with pytest.raises(OutputError, match="its sha256 is not that of"):
        recover(out)
    assert snapshot(root) == before


def test_journal_that_is_not_json_is_refused_and_kept(scene: tuple[Path, Path, Path]) -> None:
    root, out, _ = scene
    (out / ".p.json.reduce-commit").write_bytes(b"rm -rf /")
    before = snapshot(root)
    with pytest.raises(OutputError, match="unreadable"):
        recover(out)
    assert snapshot(root) == before


def test_genuine_interrupted_commit_is_completed(scene: tuple[Path, Path, Path]) -> None:
    _, out, payload = scene
    new = b'{"format": "reduce.columns/1", "new": true}'
    t, tm = f".p.json.{DEAD_PID}.tmp", f".p.json.manifest.json.{DEAD_PID}.tmp"
    # Killed after the payload's rename, before the manifest's: the payload is new already.
    payload.write_bytes(new)
    (out / tm).write_bytes(manifest_of("p.json", new))
    plant(out, [[t, "p.json"], [tm, "p.json.manifest.json"]])
    assert recover(out) == [payload]
    assert json.loads(manifest_path(payload).read_bytes())["sha256"] == sha(new)
    assert sorted(p.name for p in out.iterdir()) == [LOCK_NAME, "p.json", "p.json.manifest.json"]


def test_only_our_temporary_files_are_swept(scene: tuple[Path, Path, Path]) -> None:
    root, out, _ = scene
    (out / f".p.json.{DEAD_PID}.tmp").write_bytes(b"debris of a killed run")
    (out / f".notes.{DEAD_PID}.tmp").write_bytes(b"a user's file")
    (out / f".q.json.{DEAD_PID}.tmp").symlink_to(root / "outside" / "secret.txt")
    recover(out)
    names = sorted(p.name for p in out.iterdir())
    assert f".p.json.{DEAD_PID}.tmp" not in names
    assert f".notes.{DEAD_PID}.tmp" in names and f".q.json.{DEAD_PID}.tmp" in names
    assert (root / "outside" / "secret.txt").read_bytes() == b"keep me\n"


def test_run_refuses_a_planted_journal_with_one_line(tmp_path: Path) -> None:
    recipe = project(tmp_path)
    (tmp_path / "out").mkdir()
    (tmp_path / "victim.txt").write_text("keep me\n")
    journal = plant(
        tmp_path / "out",
        [
            ["../victim.txt", "hexmap.json"],
            [".hexmap.json.manifest.json.1.tmp", "hexmap.json.manifest.json"],
        ],
        name=".hexmap.json.reduce-commit",
    )
    before = snapshot(tmp_path)
    res = CliRunner().invoke(main, ["run", str(recipe), "--quiet", "--no-cache"])
    assert res.exit_code == 2, res.output
    lines = res.stderr.splitlines()
    assert len(lines) == 1
    assert lines[0].startswith(
        f"error: {journal}: commit journal entry '../victim.txt' is not one reduce writes"
    )
    assert snapshot(tmp_path) == before


def test_journal_naming_a_sibling_outside_the_folder_or_of_another_name_is_refused(
    scene: tuple[Path, Path, Path],
) -> None:
    # Pre-compressed siblings (p.json.gz, p.json.br) may ride in the commit; nothing else.
    root, out, _ = scene
    t, tm = f".p.json.{DEAD_PID}.tmp", f".p.json.manifest.json.{DEAD_PID}.tmp"
    tgz = f".p.json.gz.{DEAD_PID}.tmp"
    (out / t).write_bytes(b"planted payload")
    (out / tgz).write_bytes(b"planted gzip")
    (out / tm).write_bytes(manifest_of("p.json", b"planted payload"))
    for bad in ("../outside/victim.json", "p.json.zip", "q.json.gz"):
        journal = plant(out, [[t, "p.json"], [tgz, bad], [tm, "p.json.manifest.json"]])
        before = snapshot(root)
        with pytest.raises(OutputError) as err:
            recover(out)
        assert str(journal) in err.value.message and repr(bad) in err.value.message
        assert snapshot(root) == before
        journal.unlink()


def test_interrupted_commit_with_siblings_is_completed(scene: tuple[Path, Path, Path]) -> None:
    _, out, payload = scene
    new = b'{"format": "reduce.columns/1", "new": true}'
    t, tm = f".p.json.{DEAD_PID}.tmp", f".p.json.manifest.json.{DEAD_PID}.tmp"
    tgz, tbr = f".p.json.gz.{DEAD_PID}.tmp", f".p.json.br.{DEAD_PID}.tmp"
    # Killed after the payload's and the gzip sibling's renames: brotli and manifest remain.
    payload.write_bytes(new)
    (out / "p.json.gz").write_bytes(b"new gzip")
    (out / tbr).write_bytes(b"new brotli")
    (out / tm).write_bytes(manifest_of("p.json", new))
    plant(
        out, [[t, "p.json"], [tgz, "p.json.gz"], [tbr, "p.json.br"], [tm, "p.json.manifest.json"]]
    )
    assert recover(out) == [payload]
    assert (out / "p.json.br").read_bytes() == b"new brotli"
    assert json.loads(manifest_path(payload).read_bytes())["sha256"] == sha(new)
    assert sorted(p.name for p in out.iterdir()) == [
        LOCK_NAME,
        "p.json",
        "p.json.br",
        "p.json.gz",
        "p.json.manifest.json",
    ]
