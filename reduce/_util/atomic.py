"""One atomic write: the bytes go to a temporary file beside the target (``.NAME.PID.tmp``),
then a rename puts them in place, so a reader sees the old file or the new one, never a torn
one. A failure of any kind removes the temporary file and re-raises.

(Publishing payloads does more: their temporary files are kept until a journalled commit
renames them together; see :mod:`reduce.publish`.)
"""

from __future__ import annotations

import contextlib
import os
from pathlib import Path


def temp_path(path: Path) -> Path:
    """The temporary name :func:`write_atomic` uses for ``path``."""
    return path.with_name(f".{path.name}.{os.getpid()}.tmp")


def write_atomic(path: Path, data: bytes, *, durable: bool = False) -> None:
    """Write ``data`` at ``path`` atomically; ``durable`` also syncs it to disk before the
    rename (for files a later run relies on)."""
    tmp = temp_path(path)
    try:
        tmp.write_bytes(data)
        if durable:
            with open(tmp, "rb+") as f:
                os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
