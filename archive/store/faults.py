"""Faults of the world, told as what happened and what to do.

A damaged catalog file, a full disk, a dropped database connection or a missing optional
module is not a bug of nodekeep and not a mistake in the request: :func:`world_fault` turns
the exception such a fault raises (from SQLite, the PostgreSQL driver, the operating system
or the importer) into a :class:`~archive.errors.NodekeepError` with one line of text and the
documented exit code (3 for a damaged catalog, 5 for the environment). Anything it does not
recognise stays an internal error (exit 70), kept for real bugs.
"""

from __future__ import annotations

import errno

from archive.errors import CatalogDamaged, EnvironmentProblem, NodekeepError, StorageError

# SQLite's words for a damaged database file (sqlite3 error texts; SQLITE_CORRUPT, SQLITE_NOTADB).
_DAMAGED = ("malformed", "file is not a database", "database corrupt", "could not decode to utf-8",
            "disk image is malformed")
# PostgreSQL server or network gone: SQLSTATE classes 08 (connection exception), 57P
# (operator intervention: admin shutdown, crash shutdown, cannot connect now) and the
# driver's own words when the socket closed under it.
_DROPPED_STATES = ("08", "57P")
_DROPPED_WORDS = ("server closed the connection", "terminating connection", "connection refused",
                  "could not connect", "connection is closed", "connection to server",
                  "consuming input failed", "ssl syscall error", "connection timed out",
                  "no route to host", "lost synchronization")
_OPTIONAL = {"psycopg": "postgres", "psycopg2": "postgres", "psycopg_binary": "postgres",
             "dask": "scale", "distributed": "scale"}
_SPACE_ERRNOS = {errno.ENOSPC, errno.EDQUOT}


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0].strip() if text else type(exc).__name__


def world_fault(exc: BaseException, catalog: str | None = None) -> NodekeepError | None:
    """The one-line error for a fault of the world behind ``exc``, or None when ``exc`` is
    not one (a bug). ``catalog`` names the catalog (a path or a password-masked URL)."""
    from sqlalchemy.exc import DBAPIError

    where = catalog or "database"
    if isinstance(exc, NodekeepError):
        return exc
    if isinstance(exc, DBAPIError):
        orig = exc.orig if exc.orig is not None else exc
        text = _first_line(orig)
        low = text.lower()
        sqlstate = str(getattr(orig, "sqlstate", "") or "")
        if any(w in low for w in _DAMAGED):
            return CatalogDamaged(where, text)
        if exc.connection_invalidated or sqlstate.startswith(_DROPPED_STATES) \
                or any(w in low for w in _DROPPED_WORDS):
            return EnvironmentProblem(
                f"lost the connection to the catalog {where}: {text}",
                hint="check that the database server is running and reachable, then run the "
                     "command again; the step that was cut off was not recorded")
        if "disk is full" in low or "disk i/o error" in low or sqlstate == "53100" \
                or "unable to open database file" in low:
            return StorageError(
                f"the catalog {where} could not be used: {text}",
                hint="free space on its disk (or check the disk) and run the command again; "
                     "nothing was recorded by the step that failed")
        return None
    if isinstance(exc, ModuleNotFoundError):
        root = (exc.name or "").split(".")[0]
        extra = _OPTIONAL.get(root)
        if extra is None:
            return None
        return EnvironmentProblem(
            f"this needs the Python module {root}, which is not installed",
            hint=f"install the extra: pip install 'nodekeep[{extra}]'")
    if isinstance(exc, OSError) and exc.errno in _SPACE_ERRNOS:
        name = f" writing {exc.filename}" if exc.filename else ""
        return StorageError(f"no space left on the device{name}",
                            hint="free space and run the command again; nothing was recorded "
                                 "by the step that failed")
    if isinstance(exc, OSError) and exc.errno == errno.EIO:
        name = f" on {exc.filename}" if exc.filename else ""
        return EnvironmentProblem(f"input/output error{name} (a failing disk or network "
                                  "file system)", hint="check the disk and run the command again")
    return None
