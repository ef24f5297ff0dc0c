"""Database engines for the catalog: SQLite by default (WAL, foreign keys, busy timeout),
PostgreSQL by URL. Write transactions on SQLite take the write lock at BEGIN (IMMEDIATE) so
concurrent writers queue instead of failing half-way."""

from __future__ import annotations

import re
from pathlib import Path

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url

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


def make_engine(url: str) -> Engine:
    """Create an engine with the catalog's connection settings for its backend."""
    u = make_url(url)
    if u.get_backend_name() == "sqlite":
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
    return create_engine(url, pool_pre_ping=True)
