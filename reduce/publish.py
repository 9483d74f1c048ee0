"""Publishing: payload and manifest written atomically, never outside the output folder.

This module owns every write of a payload. Each file is written to a temporary file in the
same folder (``.NAME.PID.tmp``), flushed to disk, then renamed over the old one (a rename
within one file system is atomic), so a reader sees the old file or the new one, never a
torn one. The manifest of payload ``x.json`` is ``x.json.manifest.json`` (named after the
whole file name, so ``x.json`` and ``x.csv`` never share one).

A payload and its manifest are two files, and no single rename swaps both. The commit is
therefore journalled: both temporary files are written and synced, then a small journal
(``.x.json.reduce-commit``) naming them is written (atomically), then the two renames happen,
then the journal is removed. If the process dies between the renames, the journal is still
there, and any later ``reduce run`` or ``reduce audit`` touching that folder finishes the
commit first (:func:`recover`), so the pair always ends up agreeing.

The journal is data found on disk, so it is trusted only as far as it says exactly what this
module writes: the payload named by the journal's own file name, its manifest, and their
two temporary files with one process id, all plain regular files in the folder, the
temporary manifest naming the temporary payload's checksum. Anything else is refused
(:class:`~reduce.errors.OutputError`, exit 2) and the journal is left as it is.

One lock per output folder (an ``fcntl.flock`` on ``.reduce.lock`` in it) is held from before
the first temporary file to after the last rename, and while an interrupted commit is
completed; a second run waits up to :data:`LOCK_WAIT_SECONDS` (``$REDUCE_LOCK_WAIT``) for
it, then fails naming the folder and the holder's process id. Readers that take the lock
shared (:func:`reading`, as the audit does) never see a payload beside another run's
manifest.

An existing file at the payload path is replaced only if it is one of ours (a manifest beside
it names it, or it is a JSON payload whose ``format`` starts with ``reduce.``).
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import hashlib
import os
import re
import stat
import time
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import orjson

from reduce._util.procs import process_alive
from reduce.contract import MANIFEST_FORMAT as CONTRACT_MANIFEST_FORMAT
from reduce.errors import OutputError

MANIFEST_FORMAT = CONTRACT_MANIFEST_FORMAT
MANIFEST_SUFFIX = ".manifest.json"
_JOURNAL_SUFFIX = ".reduce-commit"
LOCK_NAME = ".reduce.lock"
# How long a run waits for another run publishing into the same folder (seconds); a
# publish holds the lock for the time it takes to write and sync two files.
LOCK_WAIT_SECONDS = 120.0
LOCK_WAIT_ENV = "REDUCE_LOCK_WAIT"
_JOURNAL_MAX_BYTES = 64 * 1024
_MANIFEST_MAX_BYTES = 64 * 1024 * 1024
# Temporary files of ours: ".<final name>.<pid>.tmp"; only those whose final name has one of
# these endings are removed as debris (a user's own ".notes.123.tmp" is left alone).
_TMP_RE = re.compile(r"\.(?P<final>.+)\.(?P<pid>[0-9]{1,10})\.tmp")
# Pre-compressed siblings of a payload, written in its commit: x.json.gz, x.json.br.
SIBLING_SUFFIXES = (".gz", ".br")
_OUR_ENDINGS = tuple(
    e + s for e in (".json", ".geojson", ".csv") for s in ("", *SIBLING_SUFFIXES)
) + (_JOURNAL_SUFFIX,)


def manifest_path(payload: Path) -> Path:
    """The manifest beside ``payload``: ``x.json`` -> ``x.json.manifest.json``."""
    return payload.with_name(f"{payload.name}{MANIFEST_SUFFIX}")


def _journal(payload: Path) -> Path:
    return payload.with_name(f".{payload.name}{_JOURNAL_SUFFIX}")


def _tmp_name(final: str, pid: int) -> str:
    return f".{final}.{pid}.tmp"


def resolve_output(folder: Path, file_name: str) -> Path:
    """The payload path ``folder/file_name``; refuses names that would leave the folder."""
    if (
        not file_name
        or file_name in (".", "..")
        or "/" in file_name
        or "\\" in file_name
        or "\0" in file_name
    ):
        raise OutputError(
            f"{folder}: output file name {file_name!r} must be a plain file "
            "name inside the output folder"
        )
    target = (folder / file_name).resolve()
    if target.parent != folder.resolve():
        raise OutputError(
            f"{folder}: output file {file_name!r} resolves outside the output "
            "folder; write inside it"
        )
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
            raise OutputError(
                f"{folder}: cannot create the output folder ({e.strerror}); choose another --out"
            ) from None
    else:
        at = folder
        while not at.exists() and at.parent != at:
            at = at.parent
        if not at.is_dir():
            why = "File exists" if at == folder else "Not a directory"
            raise OutputError(
                f"{folder}: cannot create the output folder ({why}); choose another --out"
            )
        if at != folder:
            if not os.access(at, os.W_OK | os.X_OK):
                raise OutputError(
                    f"{folder}: cannot create the output folder (Permission "
                    "denied); choose another --out"
                )
            return
    if not os.access(folder, os.W_OK | os.X_OK):
        raise OutputError(
            f"{folder}: the output folder is not writable; fix its permissions "
            "or choose another --out"
        )
    for j in journals(folder):
        _plan(j)  # a journal the commit would refuse fails the run now, not after the scan
    for p in (path, manifest_path(path)):
        if p.is_dir():
            raise OutputError(f"{p}: is a folder; choose another output path")
    if path.exists() and not _is_ours(path):
        raise OutputError(
            f"{path}: exists and was not written by reduce; move it away or "
            "choose another output path"
        )
    man = manifest_path(path)
    if man.exists() and not _is_manifest(man):
        raise OutputError(f"{man}: exists and is not a reduce manifest; move it away")


def _write_tmp(path: Path, data: bytes) -> Path:
    tmp = path.with_name(_tmp_name(path.name, os.getpid()))
    try:
        # O_EXCL|O_NOFOLLOW: never write through a link or into a file planted at our name.
        with contextlib.suppress(FileNotFoundError):
            if stat.S_ISREG(os.lstat(tmp).st_mode):
                tmp.unlink()  # our own leftover (same pid: a pid reused after a crash)
        fd = os.open(
            tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW | os.O_CLOEXEC, 0o644
        )
        with open(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
    except OSError as e:
        with contextlib.suppress(OSError):
            if stat.S_ISREG(os.lstat(tmp).st_mode):
                tmp.unlink()
        raise OutputError(
            f"{path.parent}: cannot write ({e.strerror or e}); check free space and permissions"
        ) from None
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    return tmp


def _fsync_dir(folder: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


# --------------------------------------------------------------------------------------------
# The folder lock
# --------------------------------------------------------------------------------------------


def lock_wait() -> float:
    """Seconds a run waits for the folder lock: ``$REDUCE_LOCK_WAIT`` or the default."""
    text = os.environ.get(LOCK_WAIT_ENV)
    if text:
        try:
            value = float(text)
            if value >= 0:
                return value
        except ValueError:
            pass
        raise OutputError(
            f"${LOCK_WAIT_ENV}: {text!r} is not a number of seconds; set it to e.g. 30 or unset it"
        )
    return LOCK_WAIT_SECONDS


def _holder(fd: int) -> str:
    with contextlib.suppress(OSError, ValueError):
        text = os.pread(fd, 32, 0).decode("ascii", "replace").strip()
        if text.isdigit():
            return f"pid {int(text)}"
    return "pid unknown"


def _open_lock(folder: Path, *, write: bool) -> int | None:
    """The lock file's descriptor (made if absent when ``write``), or None for a reader of a
    folder without a lock file (never published into by this version: nothing to wait for).
    A reader never creates a file in the folder it reads."""
    path = folder / LOCK_NAME
    flags = os.O_NOFOLLOW | os.O_CLOEXEC | (os.O_RDWR | os.O_CREAT if write else os.O_RDONLY)
    try:
        return os.open(path, flags, 0o644)
    except OSError as e:
        if e.errno == errno.ELOOP:
            raise OutputError(f"{path}: is a link, not reduce's lock file; remove it") from None
        if write:
            raise OutputError(
                f"{folder}: cannot create the lock file {LOCK_NAME} "
                f"({e.strerror}); fix the folder's permissions"
            ) from None
        return None


@contextlib.contextmanager
def folder_lock(folder: Path, *, shared: bool = False, wait: float | None = None) -> Iterator[None]:
    """Hold the folder's lock (exclusive to publish or recover, shared to read a payload
    with its manifest), waiting up to ``wait`` seconds (default :func:`lock_wait`)."""
    fd = _open_lock(folder, write=not shared)
    if fd is None:
        yield
        return
    try:
        deadline = time.monotonic() + (lock_wait() if wait is None else wait)
        mode = fcntl.LOCK_SH if shared else fcntl.LOCK_EX
        pause = 0.01
        while True:
            try:
                fcntl.flock(fd, mode | fcntl.LOCK_NB)
                break
            except OSError as e:
                if not isinstance(e, BlockingIOError):  # a file system without locks
                    raise OutputError(
                        f"{folder}: cannot lock {LOCK_NAME} ({e.strerror}); "
                        "publish to a local folder"
                    ) from None
                if time.monotonic() >= deadline:
                    raise OutputError(
                        f"{folder}: another reduce run ({_holder(fd)}) holds the output "
                        f"folder's lock; waited {wait if wait is not None else lock_wait():g} "
                        f"s (${LOCK_WAIT_ENV}); try again when it has finished"
                    ) from None
                time.sleep(pause)
                pause = min(pause * 2, 0.2)
        if not shared:
            with contextlib.suppress(OSError):
                os.ftruncate(fd, 0)
                os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        yield
    finally:
        os.close(fd)  # releases the lock


@contextlib.contextmanager
def reading(folder: Path, *, wait: float | None = None) -> Iterator[None]:
    """Read a payload and its manifest as one pair: no commit happens meanwhile."""
    with folder_lock(folder, shared=True, wait=wait):
        yield


# --------------------------------------------------------------------------------------------
# Recovery of an interrupted commit
# --------------------------------------------------------------------------------------------


def journals(folder: Path) -> list[Path]:
    """The commit journals in ``folder`` (interrupted commits), sorted."""
    with contextlib.suppress(OSError):
        return sorted(p for p in folder.glob(f".*{_JOURNAL_SUFFIX}") if p.name != _JOURNAL_SUFFIX)
    return []


def _refuse(journal: Path, entry: object, why: str) -> OutputError:
    return OutputError(
        f"{journal}: commit journal entry {entry!r} is not one reduce writes "
        f"({why}); nothing was moved: remove the journal if reduce did not "
        "write it"
    )


def _regular(path: Path) -> bool | None:
    """True for a regular file (not a link), False for anything else, None if absent."""
    try:
        return stat.S_ISREG(os.lstat(path).st_mode)
    except FileNotFoundError:
        return None


def _plan(journal: Path) -> list[tuple[Path, Path]]:
    """The renames a journal asks for, after checking it says exactly what :func:`publish`
    writes; raises :class:`OutputError` naming the bad entry otherwise."""
    folder = journal.parent
    payload_name = journal.name[1 : -len(_JOURNAL_SUFFIX)]
    if payload_name in ("", ".", "..") or not journal.name.startswith("."):
        raise _refuse(journal, journal.name, "not the journal of a payload name")
    if not _regular(journal):
        raise _refuse(journal, journal.name, "the journal is not a regular file")
    try:
        if os.lstat(journal).st_size > _JOURNAL_MAX_BYTES:
            raise _refuse(journal, journal.name, "too large for a journal")
        plan = orjson.loads(journal.read_bytes())
    except (OSError, orjson.JSONDecodeError) as e:
        raise _refuse(journal, journal.name, f"unreadable: {e}") from None
    moves = plan.get("moves") if isinstance(plan, dict) else None
    if (
        not isinstance(plan, dict)
        or set(plan) != {"moves"}
        or not isinstance(moves, list)
        or not 2 <= len(moves) <= 2 + len(SIBLING_SUFFIXES)
    ):
        raise _refuse(
            journal,
            plan if not isinstance(plan, dict) else plan.get("moves"),
            "expected the payload, its pre-compressed siblings and its manifest",
        )
    # The payload first, the manifest last, siblings (x.json.gz, x.json.br) between.
    middle = [m[1] if isinstance(m, list) and len(m) == 2 else None for m in moves[1:-1]]
    siblings = [payload_name + s for s in SIBLING_SUFFIXES]
    for dst in middle:
        if dst not in siblings or middle.count(dst) > 1:
            raise _refuse(
                journal,
                dst,
                f"expected a pre-compressed sibling ({' or '.join(map(repr, siblings))}), once",
            )
    finals = (payload_name, *middle, payload_name + MANIFEST_SUFFIX)
    pid = None
    out: list[tuple[Path, Path]] = []
    for move, final in zip(moves, finals, strict=True):
        if not (
            isinstance(move, list) and len(move) == 2 and all(isinstance(x, str) for x in move)
        ):
            raise _refuse(journal, move, "expected [temporary file, final name]")
        src, dst = move
        m = _TMP_RE.fullmatch(src)
        if dst != final:
            raise _refuse(journal, dst, f"expected {final!r}")
        if m is None or m.group("final") != final or (pid is not None and m["pid"] != pid):
            raise _refuse(
                journal,
                src,
                f"expected a temporary file {_tmp_name(final, 0)!r} with one process id for both",
            )
        pid = m["pid"]
        out.append((folder / src, folder / dst))
    (tmp_pay, pay), tmp_man = out[0], out[-1][0]
    kinds = {p: _regular(p) for move in out for p in move}
    for p, kind in kinds.items():
        if kind is False:
            raise _refuse(journal, p.name, "not a regular file")
    if kinds[tmp_pay] and not kinds[tmp_man]:
        raise _refuse(journal, tmp_man.name, "missing while the payload is not yet renamed")
    if kinds[tmp_man]:
        source = tmp_pay if kinds[tmp_pay] else pay
        try:
            if os.lstat(tmp_man).st_size > _MANIFEST_MAX_BYTES:
                raise _refuse(journal, tmp_man.name, "too large for a manifest")
            doc = orjson.loads(tmp_man.read_bytes())
            digest = hashlib.sha256(source.read_bytes()).hexdigest() if kinds[source] else None
        except (OSError, orjson.JSONDecodeError) as e:
            raise _refuse(journal, tmp_man.name, f"unreadable: {e}") from None
        if (
            not isinstance(doc, dict)
            or doc.get("format") != MANIFEST_FORMAT
            or doc.get("payload") != payload_name
        ):
            raise _refuse(journal, tmp_man.name, f"not the manifest of {payload_name!r}")
        if doc.get("sha256") != digest:
            raise _refuse(journal, tmp_man.name, f"its sha256 is not that of {source.name!r}")
    return out


def _recover_locked(folder: Path) -> list[Path]:
    done: list[Path] = []
    for j in journals(folder):
        moves = _plan(j)
        for src, dst in moves:
            if _regular(src):
                os.replace(src, dst)
        _fsync_dir(folder)
        j.unlink(missing_ok=True)
        done.append(moves[0][1])
    with contextlib.suppress(OSError):
        for stale in folder.glob(".*.tmp"):
            # Temporary files of a run that died before writing its journal were never
            # published: remove them, unless their writer is still alive.
            m = _TMP_RE.fullmatch(stale.name)
            if m is None or not m["final"].endswith(_OUR_ENDINGS) or not _regular(stale):
                continue
            pid = int(m["pid"])
            if pid == os.getpid() or not process_alive(pid):
                stale.unlink(missing_ok=True)
    return done


def recover(folder: Path, *, wait: float | None = None) -> list[Path]:
    """Finish any interrupted commit in ``folder`` (under its lock) and remove temporary
    files of dead runs; returns the payloads it completed. A journal that does not say
    exactly what :func:`publish` writes raises :class:`OutputError` and is left alone."""
    if not folder.is_dir():
        return []
    if not journals(folder) and not any(folder.glob(".*.tmp")):
        return []
    with folder_lock(folder, wait=wait):
        return _recover_locked(folder)


# --------------------------------------------------------------------------------------------
# Publishing
# --------------------------------------------------------------------------------------------


def publish(
    path: Path,
    payload: bytes,
    manifest: Mapping[str, Any],
    *,
    extras: Mapping[str, bytes] | None = None,
) -> None:
    """Write ``payload`` at ``path`` and its manifest beside it, as one journalled commit.

    ``extras`` maps the payload's pre-compressed siblings (``x.json.gz``, ``x.json.br``: the
    payload's name plus one of :data:`SIBLING_SUFFIXES`) to their bytes; they are written,
    synced and renamed in the same commit (after the payload, before the manifest).
    A failure of any kind (a full disk, a signal) before the first rename removes every
    temporary file and leaves the old files; after it, the commit is completed.
    """
    folder = path.parent
    extra_paths: list[tuple[Path, bytes]] = []
    for name, data in (extras or {}).items():
        if name not in {path.name + s for s in SIBLING_SUFFIXES}:
            raise OutputError(
                f"{folder}: {name!r} is not a pre-compressed sibling of {path.name!r}"
            )
        p = resolve_output(folder, name)
        if p.is_dir():
            raise OutputError(f"{p}: is a folder; move it away")
        extra_paths.append((p, data))
    check_target(path)  # makes the folder, so its lock file can be made
    with folder_lock(folder):
        _recover_locked(folder)
        check_target(path)
        _commit(path, payload, manifest, extra_paths)


def _commit(
    path: Path, payload: bytes, manifest: Mapping[str, Any], extras: list[tuple[Path, bytes]]
) -> None:
    folder = path.parent
    man = manifest_path(path)
    man_bytes = orjson.dumps(dict(manifest), option=orjson.OPT_INDENT_2) + b"\n"
    journal = _journal(path)
    pid = os.getpid()
    tmp_payload = path.with_name(_tmp_name(path.name, pid))
    tmp_manifest = man.with_name(_tmp_name(man.name, pid))
    tmp_extras = [(p.with_name(_tmp_name(p.name, pid)), p) for p, _ in extras]
    jtmp = journal.with_name(_tmp_name(journal.name, pid))
    # The payload's move stays first and the manifest's last (see _plan).
    moves = [(tmp_payload, path), *tmp_extras, (tmp_manifest, man)]
    renamed = 0
    renaming = journalled = False
    try:
        _write_tmp(path, payload)
        for p, data in extras:
            _write_tmp(p, data)
        _write_tmp(man, man_bytes)
        plan = {"moves": [[t.name, f.name] for t, f in moves]}
        _write_tmp(journal, orjson.dumps(plan))
        os.replace(jtmp, journal)
        journalled = True
        _fsync_dir(folder)
        renaming = True
        with _signals_held():  # the renames are not cut short by a signal's exception
            for t, f in moves:
                os.replace(t, f)
                renamed += 1
        _fsync_dir(folder)
        journal.unlink(missing_ok=True)
    except BaseException as e:
        if renaming:
            # What was renamed, from the files themselves: an exception can come between a
            # rename and the count that follows it.
            renamed = next((i for i, (t, _) in enumerate(moves) if t.exists()), len(moves))
        if 0 < renamed < len(moves):
            # The payload is in place: complete the commit rather than leave it mismatched.
            for t, f in moves[renamed:]:
                with contextlib.suppress(OSError):
                    os.replace(t, f)
            renamed = next((i for i, (t, _) in enumerate(moves) if t.exists()), len(moves))
        if renamed == len(moves):  # the commit is complete: its journal has done its work
            with contextlib.suppress(OSError):
                journal.unlink(missing_ok=True)
        if renamed == 0:
            for p in (*(t for t, _ in moves), jtmp, *((journal,) if journalled else ())):
                with contextlib.suppress(OSError):
                    p.unlink(missing_ok=True)
        if isinstance(e, OSError) and not isinstance(e, OutputError):
            raise OutputError(
                f"{folder}: cannot publish ({e.strerror or e}); check free space and permissions"
            ) from None
        raise


@contextlib.contextmanager
def _signals_held() -> Iterator[None]:
    """SIGTERM and SIGINT held back until the block ends: their handlers then run (as if
    the signal came then), after the renames of a commit, never between two of them.
    Python runs signal handlers in the main thread only; elsewhere nothing is changed."""
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        yield
        return
    came: list[int] = []

    def hold(signum: int, frame: object) -> None:
        came.append(signum)

    previous = {s: signal.signal(s, hold) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        yield
    finally:
        for s, h in previous.items():
            signal.signal(s, h)
        for num in dict.fromkeys(came):  # each signal once, in the order they came
            h = previous[signal.Signals(num)]
            if callable(h):
                h(num, None)
            elif h == signal.SIG_DFL:
                os.kill(os.getpid(), num)


def sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()
