"""Database engines for the catalog: SQLite by default (WAL, foreign keys, busy timeout),
PostgreSQL by URL. Write transactions on SQLite take the write lock at BEGIN (IMMEDIATE) so
concurrent writers queue instead of failing half-way."""

from __future__ import annotations

import os
import re
import sqlite3
from pathlib import Path
from urllib.parse import quote

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.pool import NullPool

from archive.store.space import FULL_BYTES, free_bytes

BUSY_TIMEOUT_MS = 60_000


def mask_url(url: str) -> str:
    """A database URL safe to print: any password replaced by ***."""
    try:
        return make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - an unparsable URL is masked textually
        return re.sub(r"(://[^:/@]+:)[^@]*@", r"\1***@", url)


def sqlite_url(path: Path) -> str:
    """SQLAlchemy URL of a SQLite catalog file."""
    return f"sqlite:///{Path(path).resolve()}"


def sqlite_read_only(url: str) -> bool:
    """True when the SQLite catalog at ``url`` cannot be written here."""
    u = make_url(url)
    return u.get_backend_name() == "sqlite" and _read_only_sqlite(u.database or "")


def _read_only_sqlite(path: str) -> bool:
    """True when a SQLite catalog file cannot be written here (read-only media or file)."""
    if not path or path == ":memory:" or not os.path.exists(path):
        return False
    folder = os.path.dirname(os.path.abspath(path))
    return not (os.access(path, os.W_OK) and os.access(folder, os.W_OK))


def _read_only_engine(path: str, *, media: bool) -> Engine:
    """A SQLite engine that never writes (``mode=ro``). On read-only ``media`` without a
    write-ahead log left beside the file it is also ``immutable`` (SQLite cannot build its
    shared-memory index there, and nothing can change the file). Every write is refused by
    SQLite as 'attempt to write a readonly database'."""
    immutable = media and not _wal_frames(path)
    flags = "mode=ro&immutable=1" if immutable else "mode=ro"
    uri = f"file:{quote(os.path.abspath(path))}?{flags}"

    def connect() -> sqlite3.Connection:
        return sqlite3.connect(uri, uri=True, timeout=BUSY_TIMEOUT_MS / 1000,
                               isolation_level=None, check_same_thread=False)

    engine = create_engine("sqlite://", creator=connect, poolclass=NullPool)

    @event.listens_for(engine, "begin")
    def _on_begin(conn) -> None:
        immediate = conn.get_execution_options().get("nodekeep_write", False)
        conn.exec_driver_sql("BEGIN IMMEDIATE" if immediate else "BEGIN")

    return engine


def _wal_frames(path: str) -> bool:
    """True when a write-ahead log with content lies beside the catalog (an empty or absent
    log holds nothing the main file lacks, so the file alone can be read as immutable)."""
    try:
        return os.path.getsize(path + "-wal") > 0
    except OSError:
        return False


def _readable_ro(path: str) -> bool:
    """True when SQLite can read the catalog ``mode=ro`` here (with its log and index)."""
    try:
        conn = sqlite3.connect(f"file:{quote(os.path.abspath(path))}?mode=ro", uri=True)
        try:
            conn.execute("SELECT count(*) FROM sqlite_schema").fetchone()
        finally:
            conn.close()
    except sqlite3.Error:
        return False
    return True


def _snapshot(path: str) -> str:
    """Copy the catalog and its write-ahead log to a private temporary folder (on another
    disk: the system's temporary folder) and return the copy's path; removed at exit."""
    import atexit
    import shutil
    import tempfile

    from archive.errors import StorageError

    folder = tempfile.mkdtemp(prefix="nodekeep-catalog-")
    atexit.register(shutil.rmtree, folder, True)
    copy = os.path.join(folder, os.path.basename(path))
    try:
        shutil.copyfile(path, copy)
        shutil.copyfile(path + "-wal", copy + "-wal")
    except OSError as exc:
        shutil.rmtree(folder, True)
        raise StorageError(
            f"the disk holding the catalog {path} is full, and its write-ahead log cannot be "
            f"read in place nor copied to {tempfile.gettempdir()} ({exc.strerror})",
            hint="free some space on either disk and run the command again") from exc
    return copy


def _full_disk_engine(path: str) -> Engine:
    """A read-only engine for a catalog on a full disk: the file alone (immutable) when no
    write-ahead log content is left, else ``mode=ro`` when SQLite can still use its index
    file in place, else a private copy of file and log in the system's temporary folder."""
    if not _wal_frames(path):
        return _read_only_engine(path, media=True)
    if _readable_ro(path):
        return _read_only_engine(path, media=False)
    return _read_only_engine(_snapshot(path), media=False)


def sqlite_disk_full(url: str) -> str | None:
    """Why a SQLite catalog cannot be written here because its disk is full (with the bytes
    free), or None (another backend, a new file, room enough)."""
    u = make_url(url)
    path = u.database or ""
    if u.get_backend_name() != "sqlite" or not path or path == ":memory:" \
            or not os.path.exists(path):
        return None
    free = free_bytes(path)
    if free is None or free >= FULL_BYTES:
        return None
    return f"the disk holding the catalog {path} is full ({free:,} bytes free)"


def make_engine(url: str, *, read_only: bool = False) -> Engine:
    """Create an engine with the catalog's connection settings for its backend.

    A SQLite catalog opened ``read_only``, or whose file or folder is not writable (a
    read-only disk, an archive copied to read-only media), is opened without any write
    (see :func:`_read_only_engine`): reading and ``verify`` work, writes are refused. So is
    a catalog whose disk is full: SQLite cannot even open a write-ahead-logged database for
    reading there (it must create its shared-memory file), while a read-only, immutable
    connection can, so ``verify``, ``where``, ``trace`` and ``history`` still answer; a write
    is refused naming the full disk (:func:`sqlite_disk_full`).
    A PostgreSQL catalog opened ``read_only`` runs every transaction read-only
    (``default_transaction_read_only``)."""
    u = make_url(url)
    if u.get_backend_name() == "sqlite":
        path = u.database or ""
        media = _read_only_sqlite(path)
        if read_only or media:
            return _read_only_engine(path, media=media)
        if sqlite_disk_full(url) is not None:
            return _full_disk_engine(path)
        engine = create_engine(
            url,
            connect_args={"timeout": BUSY_TIMEOUT_MS / 1000, "isolation_level": None},
        )

        @event.listens_for(engine, "connect")
        def _on_connect(dbapi_conn, _record) -> None:  # pragma: no cover - trivial
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT_MS}")
            cur.execute("PRAGMA synchronous=FULL")
            cur.close()

        @event.listens_for(engine, "begin")
        def _on_begin(conn) -> None:
            immediate = conn.get_execution_options().get("nodekeep_write", False)
            conn.exec_driver_sql("BEGIN IMMEDIATE" if immediate else "BEGIN")

        return engine
    try:
        if read_only and u.get_backend_name() == "postgresql":
            # every transaction of the session is read-only: the server refuses any write
            return create_engine(url, pool_pre_ping=True,
                                 connect_args={"options": "-c default_transaction_read_only=on"})
        return create_engine(url, pool_pre_ping=True)
    except ModuleNotFoundError as exc:
        from archive.errors import EnvironmentProblem

        raise EnvironmentProblem(
            f"this catalog ({u.get_backend_name()}) needs the Python module {exc.name}, "
            "which is not installed",
            hint="install the PostgreSQL extra: pip install 'nodekeep[postgres]'") from None
