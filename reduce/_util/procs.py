"""Processes: whether the run that left a file behind still runs."""

from __future__ import annotations

import os


def process_alive(pid: int) -> bool:
    """Whether a process with this id runs (one of another user's counts as running)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True
