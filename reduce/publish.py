"""Publishing: payload and manifest written atomically, never outside the output folder.

This module owns every write of a payload. Each file is written to a temporary file in the
same folder, flushed to disk, then renamed over the old one (a rename within one file system
is atomic), so a reader sees the old file or the new one, never a torn one.

A payload and its manifest are two files, and no single rename swaps both. The commit is
therefore journalled: both temporary files are written and synced, then a small journal
naming them is written (atomically), then the two renames happen, then the journal is
removed. If the process dies between the renames, the journal is still there, and any later
``reduce run`` or ``reduce audit`` touching that folder finishes the commit first
(:func:`recover`), so the pair always ends up agreeing.

An existing file at the payload path is replaced only if it is one of ours (a manifest beside
it names it, or it is a JSON payload whose ``format`` starts with ``reduce.``).
"""

from __future__ import annotations

import contextlib
import hashlib
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import orjson

from reduce.errors import OutputError

MANIFEST_FORMAT = "reduce.manifest/1"
_JOURNAL_SUFFIX = ".reduce-commit"


def manifest_path(payload: Path) -> Path:
    return payload.with_name(f"{payload.stem}.manifest.json")


def _journal(payload: Path) -> Path:
    return payload.with_name(f".{payload.name}{_JOURNAL_SUFFIX}")


def resolve_output(folder: Path, file_name: str) -> Path:
    """The payload path ``folder/file_name``; refuses names that would leave the folder."""
    if not file_name or file_name in (".", "..") or "/" in file_name or "\\" in file_name \
            or "\0" in file_name:
        raise OutputError(f"{folder}: output file name {file_name!r} must be a plain file "
                          "name inside the output folder")
    target = (folder / file_name).resolve()
    if target.parent != folder.resolve():
        raise OutputError(f"{folder}: output file {file_name!r} resolves outside the output "
                          "folder; write inside it")
    return folder / file_name


def _is_ours(path: Path) -> bool:
    man = manifest_path(path)
    with contextlib.suppress(OSError, orjson.JSONDecodeError, AttributeError):
        if man.is_file():
            doc = orjson.loads(man.read_bytes())
            if doc.get("format") == MANIFEST_FORMAT and doc.get("payload") == path.name:
                return True
    with contextlib.suppress(OSError, orjson.JSONDecodeError, AttributeError):
        if path.suffix == ".json" and path.stat().st_size < 512 * 1024 * 1024:
            head = path.read_bytes()
            doc = orjson.loads(head)
            if isinstance(doc, dict) and str(doc.get("format", "")).startswith("reduce."):
                return True
    return False


def _is_manifest(man: Path) -> bool:
    with contextlib.suppress(OSError, orjson.JSONDecodeError):
        doc = orjson.loads(man.read_bytes())
        return isinstance(doc, dict) and doc.get("format") == MANIFEST_FORMAT
    return False


def check_target(path: Path, *, create: bool = True) -> None:
    """Fail before any work is lost if ``path`` cannot be written or is not ours.

    With ``create=False`` (the check before a scan) a missing output folder is not made,
    only checked to be creatable, so a run that fails later leaves no empty folder behind.
    """
    folder = path.parent
    if create:
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as e:
            raise OutputError(f"{folder}: cannot create the output folder ({e.strerror}); "
                              "choose another --out") from None
    else:
        at = folder
        while not at.exists() and at.parent != at:
            at = at.parent
        if not at.is_dir():
            why = "File exists" if at == folder else "Not a directory"
            raise OutputError(f"{folder}: cannot create the output folder ({why}); choose "
                              "another --out")
        if at != folder:
            if not os.access(at, os.W_OK | os.X_OK):
                raise OutputError(f"{folder}: cannot create the output folder (Permission "
                                  "denied); choose another --out")
            return
    if not os.access(folder, os.W_OK | os.X_OK):
        raise OutputError(f"{folder}: the output folder is not writable; fix its permissions "
                          "or choose another --out")
    for p in (path, manifest_path(path)):
        if p.is_dir():
            raise OutputError(f"{p}: is a folder; choose another output path")
    if path.exists() and not _is_ours(path):
        raise OutputError(f"{path}: exists and was not written by reduce; move it away or "
                          "choose another output path")
    man = manifest_path(path)
    if man.exists() and not _is_manifest(man):
        raise OutputError(f"{man}: exists and is not a reduce manifest; move it away")


def _write_tmp(path: Path, data: bytes) -> Path:
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
    except OSError as e:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise OutputError(f"{path.parent}: cannot write ({e.strerror}); check free space and "
                          "permissions") from None
    return tmp


def _fsync_dir(folder: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def recover(folder: Path) -> list[Path]:
    """Finish any interrupted commit in ``folder``; returns the payloads it completed."""
    done: list[Path] = []
    if not folder.is_dir():
        return done
    for j in sorted(folder.glob(f".*{_JOURNAL_SUFFIX}")):
        try:
            plan = orjson.loads(j.read_bytes())
            moves = [(folder / a, folder / b) for a, b in plan["moves"]]
        except (OSError, orjson.JSONDecodeError, KeyError, TypeError, ValueError):
            j.unlink(missing_ok=True)
            continue
        for src, dst in moves:
            if src.exists():
                os.replace(src, dst)
        _fsync_dir(folder)
        j.unlink(missing_ok=True)
        done.append(moves[0][1])
    for stale in folder.glob(".*.tmp"):
        # Temporary files of a run that died before writing its journal were never
        # published: remove them, unless their writer is still alive.
        if not _alive(stale):
            stale.unlink(missing_ok=True)
    return done


def _alive(tmp: Path) -> bool:
    try:
        pid = int(tmp.name.rsplit(".", 2)[-2])
    except (ValueError, IndexError):
        return False
    return pid != os.getpid() and process_alive(pid)


def process_alive(pid: int) -> bool:
    """Whether a process with this id runs (one of another user's counts as running)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def publish(path: Path, payload: bytes, manifest: Mapping[str, Any], *,
            extras: Mapping[str, bytes] | None = None) -> None:
    """Write ``payload`` at ``path`` and its manifest beside it, as one journalled commit.

    ``extras`` maps further file names in the same folder (e.g. ``x.json.gz``) to their
    bytes; they are written, synced and renamed in the same commit (after the payload,
    before the manifest).
    """
    folder = path.parent
    recover(folder)
    check_target(path)
    extra_paths = [(resolve_output(folder, name), data) for name, data in (extras or {}).items()]
    for p, _ in extra_paths:
        if p.is_dir():
            raise OutputError(f"{p}: is a folder; move it away")
    man = manifest_path(path)
    man_bytes = orjson.dumps(dict(manifest), option=orjson.OPT_INDENT_2) + b"\n"
    tmp_extras = [(_write_tmp(p, data), p) for p, data in extra_paths]
    tmp_payload = _write_tmp(path, payload)
    tmp_manifest = _write_tmp(man, man_bytes)
    journal = _journal(path)
    # The payload's move stays first: recover() reports the first move as the payload.
    plan = {"moves": [[tmp_payload.name, path.name], *[[t.name, p.name] for t, p in tmp_extras],
                      [tmp_manifest.name, man.name]]}
    jtmp = _write_tmp(journal, orjson.dumps(plan))
    os.replace(jtmp, journal)
    _fsync_dir(folder)
    os.replace(tmp_payload, path)
    for t, p in tmp_extras:
        os.replace(t, p)
    os.replace(tmp_manifest, man)
    _fsync_dir(folder)
    journal.unlink(missing_ok=True)


def sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()
