"""Reading audited files safely: regular files only, within a size cap, never blocking."""

from __future__ import annotations

import os
import stat
from pathlib import Path

from reduce.audit.model import MANIFEST_SUFFIX
from reduce.errors import AuditError

# The audit reads at most this many bytes of one file (a payload for a browser is far
# smaller; a larger file is refused rather than read into memory), and of one manifest.
READ_MAX_BYTES = 256 * 1024 * 1024
MANIFEST_MAX_BYTES = 16 * 1024 * 1024


def _read(path: Path, given: str, *, cap: int | None = None) -> bytes:
    """The bytes of a regular file (or of a link to one), at most ``cap`` (default
    :data:`READ_MAX_BYTES`) of them. A FIFO, device, socket or folder is refused without
    opening it for reading in a way that could block (``O_NONBLOCK``), so the audit never
    hangs on a pipe or reads an endless device."""
    limit = READ_MAX_BYTES if cap is None else cap
    try:
        before = os.stat(path)
        if not stat.S_ISREG(before.st_mode):
            raise AuditError(
                f"{given}: not a regular file ({_file_kind(before.st_mode)}); the "
                "audit reads only regular files and links to them"
            )
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | os.O_CLOEXEC)
        try:
            st = os.fstat(fd)
            if not stat.S_ISREG(st.st_mode) or (st.st_dev, st.st_ino) != (
                before.st_dev,
                before.st_ino,
            ):
                raise AuditError(f"{given}: changed while being opened; audit it again")
            if st.st_size > limit:
                raise AuditError(
                    f"{given}: {st.st_size:,} bytes, over the audit's limit of "
                    f"{limit:,} bytes per file; is it a payload?"
                )
            chunks = []
            left = limit + 1
            while left > 0:
                chunk = os.read(fd, min(left, 1 << 20))
                if not chunk:
                    break
                chunks.append(chunk)
                left -= len(chunk)
            data = b"".join(chunks)
            if len(data) > limit:
                raise AuditError(
                    f"{given}: grew over the audit's limit of {limit:,} bytes while being read"
                )
            return data
        finally:
            os.close(fd)
    except FileNotFoundError:
        raise AuditError(f"{given}: no such file or folder") from None
    except OSError as exc:
        raise AuditError(f"{given}: cannot read ({exc.strerror or exc})") from None


def _file_kind(mode: int) -> str:
    for test, name in (
        (stat.S_ISFIFO, "a FIFO"),
        (stat.S_ISCHR, "a character device"),
        (stat.S_ISBLK, "a block device"),
        (stat.S_ISSOCK, "a socket"),
        (stat.S_ISDIR, "a folder"),
    ):
        if test(mode):
            return name
    return "not a plain file"


def _links_outside(path: Path) -> bool:
    """Whether ``path`` is a link whose target lies outside the link's own folder."""
    if not path.is_symlink():
        return False
    try:
        path.resolve().relative_to(path.parent.resolve())
        return False
    except (ValueError, OSError):
        return True


def _read_manifest(path: Path) -> tuple[Path, bytes | None, str | None]:
    """The manifest beside ``path``: (its path, its bytes or None if absent, a problem).
    Manifests are regular files written by reduce: a link is reported, never followed."""
    man = _manifest_of(path)
    try:
        st = os.lstat(man)
    except FileNotFoundError:
        return man, None, None
    except OSError as exc:
        return man, None, f"manifest {man.name}: cannot read ({exc.strerror or exc})"
    if not stat.S_ISREG(st.st_mode):
        kind = "a link" if stat.S_ISLNK(st.st_mode) else _file_kind(st.st_mode)
        return (
            man,
            None,
            (
                f"manifest {man.name}: is {kind}, not a regular file; reduce "
                "writes manifests as regular files"
            ),
        )
    try:
        return man, _read(man, str(man), cap=MANIFEST_MAX_BYTES), None
    except AuditError as exc:
        return man, None, f"manifest {man.name}: {exc.message.split(': ', 1)[-1]}"


def _manifest_of(path: Path) -> Path:
    """The manifest beside a payload: ``x.json.manifest.json`` (see reduce.publish); a
    manifest of the older name ``x.manifest.json`` is read when only that one exists."""
    current = path.with_name(path.name + MANIFEST_SUFFIX)
    legacy = path.with_name(path.stem + MANIFEST_SUFFIX)
    if not current.exists() and legacy.exists():
        return legacy
    return current
