"""Files written for people (deliveries, lineage manifests, reports): whole or not at all.

A file is written to a temporary name in its target folder, flushed and fsynced, given the
permissions a new file gets from the user's umask (``0666 & ~umask``: team-readable when the
umask says so, unlike the owner-only mode of a temporary file), and renamed onto its target
by the caller once everything it depends on is recorded. A failure removes the temporary
file, so no half-written file is ever left under the target's name.

Text that people open in a spreadsheet is kept from being run as a formula (the "CSV
injection" class described by OWASP): a text cell beginning with ``=``, ``+``, ``-``, ``@``,
a tab or a carriage return gets a leading apostrophe, which spreadsheets read as "this is
text" (:func:`spreadsheet_text`, :func:`spreadsheet_column`). A cell that is a plain number
(``-12.5``, ``+3``) is a number, not a formula, and stays as it is; so does every numeric
column, negative values included.
"""

from __future__ import annotations

import contextlib
import errno
import os
import re
import tempfile
import threading
import time
from pathlib import Path

import pyarrow as pa
import pyarrow.compute as pc

from archive.errors import Refused, StorageError, UsageError
from archive.store.space import free_bytes

# errno values of a file system that refuses a write: no space, quota, read-only.
STORAGE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS}

FORMULA_START = "=+-@\t\r"
"""Characters that make a spreadsheet read a cell as a formula (OWASP, CSV Injection)."""
_FORMULA = r"^[=+\-@\t\r]"
_PLAIN_NUMBER = r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$"

_UMASK_LOCK = threading.Lock()


def _umask() -> int:
    """The process umask: read from /proc where the kernel shows it (Linux 4.7 and later),
    else by setting and restoring it under a lock (os.umask can only be read that way)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    with _UMASK_LOCK:
        mask = os.umask(0o022)
        os.umask(mask)
    return mask


def new_file_mode() -> int:
    """The mode a new regular file gets under the process umask (``0o666 & ~umask``)."""
    return 0o666 & ~_umask()


STALE_SECONDS = 600
"""A temporary file of this program older than this is left over from a failed or killed
write (a write holds its temporary file for seconds) and is swept from the folder."""

_TEMP_NAME = re.compile(r"^\..+\.[A-Za-z0-9_]{8}\.tmp$")  # .{target name}.{mkstemp}.tmp


def sweep_stale(folder: Path, *, now: float | None = None) -> list[Path]:
    """Remove this program's temporary files in ``folder`` older than :data:`STALE_SECONDS`
    (left by a write that was killed or failed before it could clean up); returns them."""
    now = time.time() if now is None else now
    gone: list[Path] = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return gone
    for entry in entries:
        if not _TEMP_NAME.match(entry.name):
            continue
        try:
            if entry.is_file(follow_symlinks=False) and \
                    now - entry.stat(follow_symlinks=False).st_mtime > STALE_SECONDS:
                os.unlink(entry.path)
                gone.append(Path(entry.path))
        except OSError:
            continue
    return gone


def storage_refusal(exc: OSError, target: Path, needed: int) -> StorageError | None:
    """A one-line :class:`StorageError` for a write the file system refused (no space, quota,
    read-only), naming the file and the bytes it needed; None for any other OSError."""
    if exc.errno not in STORAGE_ERRNOS:
        return None
    free = free_bytes(target.parent)
    room = f", {free:,} free" if free is not None else ""
    return StorageError(
        f"cannot write {target}: {exc.strerror or 'refused by the file system'} "
        f"({needed:,} bytes needed{room})",
        hint="nothing was left behind under that name; free space or choose another folder "
             "and run the command again")


def temp_beside(target: Path, data: bytes) -> Path:
    """Write ``data`` to a fsynced temporary file in ``target``'s folder, with the umask's
    permissions; returns its path (rename it onto ``target`` with :func:`os.replace`).

    Stale temporaries of earlier failed writes in that folder are swept first; a write the
    file system refuses removes its own temporary file and raises :class:`StorageError`."""
    sweep_stale(target.parent)
    try:
        fd, tmp = tempfile.mkstemp(dir=target.parent, prefix=f".{target.name}.", suffix=".tmp")
    except OSError as exc:
        refusal = storage_refusal(exc, target, len(data))
        if refusal is None:
            raise
        raise refusal from exc
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fchmod(fh.fileno(), new_file_mode())
            os.fsync(fh.fileno())
    except BaseException as exc:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        refusal = storage_refusal(exc, target, len(data)) if isinstance(exc, OSError) else None
        if refusal is not None:
            raise refusal from exc
        raise
    return Path(tmp)


def write_file(target: Path, data: bytes) -> None:
    """Write ``target`` atomically (temporary file beside it, fsync, rename)."""
    tmp = temp_beside(target, data)
    try:
        os.replace(tmp, target)
    except BaseException as exc:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        refusal = storage_refusal(exc, target, len(data)) if isinstance(exc, OSError) else None
        if refusal is not None:
            raise refusal from exc
        raise


def check_target(path: Path, force: bool, kept: str = "") -> None:
    """Refuse an output path that cannot be written: a folder, an existing file without
    ``force``, a missing or unwritable parent folder. Called before any work is stored.
    ``kept`` says what the archive keeps of an overwritten file (a delivery keeps its bytes
    by hash; a report or a provenance file is written again from the archive)."""
    if path.is_dir():
        raise UsageError(f"{path} is a folder, not a file name",
                         hint="give --to a file name, e.g. --to FOLDER/receivers.sps")
    if path.exists() and not force:
        raise Refused(f"{path} already exists",
                      hint="pass --force to overwrite it" + (f" ({kept})" if kept else "")
                           + ", or choose another --to")
    parent = path.parent
    if not parent.is_dir():
        raise UsageError(f"the folder {parent} does not exist",
                         hint="create it first or choose another --to")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise UsageError(f"the folder {parent} is not writable",
                         hint="choose a folder you may write to with --to")


def spreadsheet_text(text: str) -> str:
    """``text`` as a spreadsheet will show it rather than evaluate it: a leading apostrophe
    when it begins with a formula character (:data:`FORMULA_START`) and is not a plain
    number; anything else unchanged."""
    if text and text[0] in FORMULA_START and not re.match(_PLAIN_NUMBER, text):
        return "'" + text
    return text


def spreadsheet_column(values: pa.Array | pa.ChunkedArray) -> pa.Array | pa.ChunkedArray:
    """:func:`spreadsheet_text` over a string column (nulls stay null); other types are
    returned unchanged."""
    if not (pa.types.is_string(values.type) or pa.types.is_large_string(values.type)):
        return values
    risky = pc.and_(pc.match_substring_regex(values, _FORMULA),
                    pc.invert(pc.match_substring_regex(values, _PLAIN_NUMBER)))
    fixed = pc.binary_join_element_wise(pa.scalar("'", values.type), values, "")
    return pc.if_else(pc.fill_null(risky, False), fixed, values)
