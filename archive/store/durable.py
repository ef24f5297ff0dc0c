"""Making writes durable: flushing a file's folder, many folders at once, a whole file system.

An object is durable once its bytes and its name survive a power loss: its bytes flushed
before it is renamed into place, its folder flushed after. :func:`syncfs` does both for
everything written to one file system, in one call (Linux): a loader of thousands of small
files flushes once per batch instead of once per file and folder, each of which waits for
a journal commit on a journalling file system.
"""

from __future__ import annotations

import errno
import functools
import os
import sys
from collections.abc import Iterable
from pathlib import Path


def fsync_dir(path: Path) -> None:
    """Flush a directory entry so a rename survives a power loss (no-op where unsupported)."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def fsync_folders(folders: Iterable[Path]) -> None:
    """:func:`fsync_dir` of each folder once; many are flushed side by side (a journalling
    file system commits concurrent flushes together, many times faster than one after the
    other)."""
    folders = sorted(set(folders))
    if len(folders) < 4:
        for folder in folders:
            fsync_dir(folder)
        return
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(min(16, len(folders)), thread_name_prefix="nodekeep-sync") as ex:
        list(ex.map(fsync_dir, folders))


@functools.cache
def _syncfs():
    """The C library's ``syncfs`` (Linux 2.6.39 and later), or None."""
    if not sys.platform.startswith("linux"):
        return None
    import ctypes

    try:
        fn = ctypes.CDLL(None, use_errno=True).syncfs
    except (OSError, AttributeError):
        return None
    fn.argtypes, fn.restype = [ctypes.c_int], ctypes.c_int
    return fn


def syncfs_available() -> bool:
    """True when :func:`syncfs` can be called here."""
    return _syncfs() is not None


def syncfs(path: str | Path) -> None:
    """Flush everything written so far to the file system holding ``path`` (data, names
    and folders, whichever process wrote them) with ``syncfs(2)``; it also flushes other
    data of that file system, if there is any. OSError when the file system reports a
    write error."""
    fn = _syncfs()
    if fn is None:
        raise OSError(errno.ENOSYS, "syncfs is not available here", str(path))
    fd = os.open(path, os.O_RDONLY)
    try:
        if fn(fd) != 0:
            import ctypes

            err = ctypes.get_errno() or errno.EIO
            raise OSError(err, os.strerror(err), str(path))
    finally:
        os.close(fd)
