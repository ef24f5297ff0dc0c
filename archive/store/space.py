"""Free space on the file system holding a path (for "disk full" decisions and messages)."""

from __future__ import annotations

import os
from pathlib import Path

FULL_BYTES = 64 * 1024
"""Less free space than this and the disk counts as full: SQLite cannot even open a
write-ahead-logged catalog for reading there (it must create its shared-memory file)."""


def free_bytes(path: str | Path) -> int | None:
    """Bytes free for this user on the file system holding ``path`` (its nearest existing
    folder), or None when the file system cannot say."""
    folder = os.path.abspath(path)
    while folder and not os.path.isdir(folder):
        parent = os.path.dirname(folder)
        if parent == folder:
            break
        folder = parent
    try:
        st = os.statvfs(folder or ".")
    except OSError:
        return None
    return st.f_bavail * st.f_frsize
