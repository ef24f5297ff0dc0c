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
    immutable = media and not os.path.exists(path + "-wal")
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


def make_engine(url: str, *, read_only: bool = False) -> Engine:
    """Create an engine with the catalog's connection settings for its backend.

    A SQLite catalog opened ``read_only``, or whose file or folder is not writable (a
    read-only disk, an archive copied to read-only media), is opened without any write
    (see :func:`_read_only_engine`, a ``mode=ro`` URI): reading and ``verify`` work, writes
    are refused. A PostgreSQL catalog opened ``read_only`` runs every transaction read-only
    (``default_transaction_read_only``)."""
    u = make_url(url)
    if u.get_backend_name() == "sqlite":
        media = _read_only_sqlite(u.database or "")
        if read_only or media:
            return _read_only_engine(u.database or "", media=media)
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
    if read_only and u.get_backend_name() == "postgresql":
        # every transaction of the session is read-only: the server refuses any write
        return create_engine(url, pool_pre_ping=True,
                             connect_args={"options": "-c default_transaction_read_only=on"})
    return create_engine(url, pool_pre_ping=True)
