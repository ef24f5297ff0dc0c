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
import os
import re
import tempfile
import threading
from pathlib import Path

import pyarrow as pa
import pyarrow.compute as pc

from archive.errors import Refused, UsageError

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


def temp_beside(target: Path, data: bytes) -> Path:
    """Write ``data`` to a fsynced temporary file in ``target``'s folder, with the umask's
    permissions; returns its path (rename it onto ``target`` with :func:`os.replace`)."""
    fd, tmp = tempfile.mkstemp(dir=target.parent, prefix=f".{target.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fchmod(fh.fileno(), new_file_mode())
            os.fsync(fh.fileno())
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    return Path(tmp)


def write_file(target: Path, data: bytes) -> None:
    """Write ``target`` atomically (temporary file beside it, fsync, rename)."""
    tmp = temp_beside(target, data)
    try:
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        raise


def check_target(path: Path, force: bool) -> None:
    """Refuse an output path that cannot be written: a folder, an existing file without
    ``force``, a missing or unwritable parent folder. Called before any work is stored."""
    if path.is_dir():
        raise UsageError(f"{path} is a folder, not a file name",
                         hint="give --to a file name, e.g. --to FOLDER/receivers.sps")
    if path.exists() and not force:
        raise Refused(f"{path} already exists",
                      hint="pass --force to overwrite it (earlier deliveries stay in the "
                           "archive by hash), or choose another --to")
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
