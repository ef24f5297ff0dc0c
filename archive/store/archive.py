"""The archive: a catalog database, an object store and a ledger, opened together.

An archive is a folder holding ``nodekeep.toml`` (where the catalog and objects live), by
default a SQLite catalog ``catalog.sqlite`` and an ``objects/`` folder beside it. The catalog
may instead be a PostgreSQL database and the objects an S3-compatible bucket.

Write pattern (the custody rule): put objects first, then open one transaction that inserts
the rows referencing them, registers the objects and appends the ledger event::

    h, size = arc.objects.put_file(path)
    with arc.transaction() as tx:
        arc.register_object(tx, h, size, "raw")
        tx.add(row)
        arc.log(tx, "load.fixes", {"raw": h}, survey_id=survey.id, rows=[row])
"""

from __future__ import annotations

import getpass
import os
import tomllib
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, select
from sqlalchemy.dialects.sqlite import insert as sqlite_insert
from sqlalchemy.orm import Session

from archive.errors import ArchiveNotFound, ReadOnly, UsageError
from archive.store import ledger
from archive.store.db import make_engine, mask_url, sqlite_disk_full, sqlite_read_only, sqlite_url
from archive.store.models import LedgerEvent, StoredObject, Survey, utcnow
from archive.store.objects import ObjectStore

CONFIG_NAME = "nodekeep.toml"
ENV_ARCHIVE = "NODEKEEP_ARCHIVE"
ENV_ACTOR = "NODEKEEP_ACTOR"


def default_actor() -> str:
    """The actor recorded in the ledger: NODEKEEP_ACTOR, else the OS user."""
    actor = os.environ.get(ENV_ACTOR)
    if actor:
        return actor
    try:
        return getpass.getuser()
    except Exception:  # noqa: BLE001 - no user database (containers)
        return f"uid-{os.getuid()}"


def locate(start: str | Path | None = None) -> Path:
    """Find an archive folder: the given one, then NODEKEEP_ARCHIVE, then up from the cwd."""
    if start is not None:
        p = Path(start)
        if (p / CONFIG_NAME).is_file():
            return p.resolve()
        raise ArchiveNotFound(f"at {p}")
    env = os.environ.get(ENV_ARCHIVE)
    if env:
        p = Path(env)
        if (p / CONFIG_NAME).is_file():
            return p.resolve()
        raise ArchiveNotFound(f"at {p} (from {ENV_ARCHIVE})")
    here = Path.cwd().resolve()
    for folder in (here, *here.parents):
        if (folder / CONFIG_NAME).is_file():
            return folder
    raise ArchiveNotFound(f"in {here} or any folder above it")


def _quote(value: str) -> str:
    return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'


class Archive:
    """An open archive. Use :meth:`init` or :meth:`open`; close with :meth:`close`."""

    def __init__(self, root: Path, config: dict[str, Any], *, actor: str | None = None,
                 read_only: bool = False) -> None:
        self.root = root
        self.config = config
        self.actor = actor or default_actor()
        self.read_only = read_only
        self.refusal: str | None = "opened read-only" if read_only else None
        self.db_url = self._resolve_db(config["db"])
        self.objects_url = self._resolve_objects(config["objects"])
        self.full_disk = sqlite_disk_full(self.db_url)
        """Why the catalog cannot be written (its disk is full), or None; reads still work."""
        self.engine: Engine = make_engine(self.db_url, read_only=read_only)
        self.objects = ObjectStore(self.objects_url, read_only=read_only)
        self.objects.describe = self._object_owner

    # -- creation and opening -----------------------------------------------------------
    def _resolve_db(self, db: str) -> str:
        if db.startswith("sqlite:///") and not db.startswith("sqlite:////"):
            rel = db.removeprefix("sqlite:///")
            return sqlite_url(self.root / rel)
        return db

    def _resolve_objects(self, objects: str) -> str:
        if "://" in objects:
            return objects
        return str((self.root / objects).resolve())

    @classmethod
    def init(cls, root: str | Path, *, db_url: str | None = None, objects_url: str | None = None,
             actor: str | None = None) -> Archive:
        """Create a new archive in ``root`` (created if needed) and migrate its catalog."""
        from archive.store import migrate

        root = Path(root)
        if (root / CONFIG_NAME).exists():
            raise UsageError(f"{root} already holds a nodekeep archive")
        root.mkdir(parents=True, exist_ok=True)
        config = {
            "format": 1,
            "db": db_url or "sqlite:///catalog.sqlite",
            "objects": objects_url or "objects",
        }
        arc = cls(root.resolve(), config, actor=actor)
        if arc.objects.is_local:
            arc.objects.root.mkdir(parents=True, exist_ok=True)
        before = migrate.current_revision(arc.engine)
        if before is not None:
            arc.close()
            raise UsageError(
                f"the database {mask_url(arc.db_url)} already holds a nodekeep catalog",
                hint="use an empty database; if an earlier 'nodekeep init' was interrupted "
                     "before it wrote nodekeep.toml, remove the half-made catalog and run "
                     "init again",
            )
        migrate.upgrade(arc.engine)
        with arc.transaction() as tx:
            arc.log(tx, "archive.init", {"format": 1, "schema": migrate.head_revision(),
                                         "db_backend": arc.engine.dialect.name})
        text = "\n".join(
            ["# nodekeep archive: where its catalog and objects live", "[archive]",
             f"format = {config['format']}", f"db = {_quote(config['db'])}",
             f"objects = {_quote(config['objects'])}", ""]
        )
        tmp = root / (CONFIG_NAME + ".tmp")
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, root / CONFIG_NAME)
        return arc

    @classmethod
    def open(cls, root: str | Path | None = None, *, actor: str | None = None,
             check_schema: bool = True, read_only: bool = False) -> Archive:
        """Open an existing archive (see :func:`locate`), checking its schema revision."""
        from archive.store import migrate

        folder = locate(root)
        with open(folder / CONFIG_NAME, "rb") as fh:
            config = tomllib.load(fh)["archive"]
        arc = cls(folder, config, actor=actor, read_only=read_only)
        try:
            if check_schema:
                migrate.check_schema(arc.engine)
            arc._settle_read_only()
        except Exception as exc:
            arc.close()
            from archive.store.faults import world_fault

            fault = world_fault(exc, arc.catalog_name)
            if fault is None or fault is exc:
                raise
            raise fault from exc
        return arc

    @property
    def catalog_name(self) -> str:
        """The catalog as a user knows it: its file for SQLite, else the password-masked URL."""
        if self.engine.dialect.name == "sqlite":
            from sqlalchemy.engine import make_url

            return make_url(self.db_url).database or mask_url(self.db_url)
        return mask_url(self.db_url)

    # -- who may write ------------------------------------------------------------------
    def _settle_read_only(self) -> None:
        """Find out whether this archive can be written here; if not, every write (object
        or catalog) is refused at once with the reason (:class:`ReadOnly`)."""
        if self.refusal is None:
            self.refusal = self._cannot_write()
        if self.refusal is not None:
            self.read_only = True
            self.objects.read_only = True
            self.objects.refusal = (str(self.root), self.refusal)

    def _cannot_write(self) -> str | None:
        """Why this archive cannot be written here, or None: a SQLite catalog on a full disk,
        a SQLite catalog file or folder without write permission, a PostgreSQL user without write privileges on the ledger
        (granted SELECT only), a read-only session or standby server, an object folder
        without write permission."""
        from sqlalchemy import text

        if self.full_disk:
            return self.full_disk
        if self.engine.dialect.name == "sqlite" and sqlite_read_only(self.db_url):
            return f"the catalog {self.engine.url.database} or its folder is not writable"
        if self.engine.dialect.name == "postgresql":
            with self.engine.connect() as conn:
                user, may, session_ro, standby = conn.execute(text(
                    "SELECT current_user, CASE WHEN to_regclass('ledger_head') IS NULL "
                    "THEN true ELSE has_table_privilege('ledger_head', 'UPDATE') AND "
                    "has_table_privilege('ledger_events', 'INSERT') END, "
                    "current_setting('transaction_read_only'), pg_is_in_recovery()")).one()
            if standby:
                return "the PostgreSQL server is a read-only standby"
            if session_ro == "on":
                return "the PostgreSQL session is read-only"
            if not may:
                return f"the PostgreSQL user {user} may read the catalog, not write it"
        root = self.objects.root
        if root is not None and root.exists() and not os.access(root, os.W_OK | os.X_OK):
            return f"the object folder {root} is not writable"
        return None

    def require_writable(self, what: str = "this command") -> None:
        """Refuse (:class:`ReadOnly`) when the archive cannot be written here: called by
        commands that change it before they do any work."""
        if self.read_only:
            raise self._read_only_error(what)

    def _read_only_error(self, what: str) -> ReadOnly:
        hint = ("nothing was recorded; free space on that disk and run the command again "
                "(reading commands still work)") if self.full_disk else None
        return ReadOnly(str(self.root), self.refusal or "opened read-only", what=what,
                        hint=hint)

    def close(self) -> None:
        """Release database connections."""
        self.engine.dispose()

    def __enter__(self) -> Archive:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _object_owner(self, h: str) -> str | None:
        from archive.store.owners import object_owner

        return object_owner(self, h)

    # -- sessions -----------------------------------------------------------------------
    @contextmanager
    def transaction(self) -> Iterator[Session]:
        """A write transaction: committed on success, rolled back on any exception."""
        if self.read_only:
            raise self._read_only_error("this change")
        with (
            self.engine.connect().execution_options(nodekeep_write=True) as conn,
            Session(bind=conn, expire_on_commit=False) as session,
        ):
            try:
                conn.begin()
            except Exception as exc:
                refusal = self._storage_refusal(exc)
                if refusal is None:
                    raise
                raise refusal from exc
            try:
                yield session
                session.flush()
                conn.commit()
            except BaseException as exc:
                conn.rollback()
                refusal = self._storage_refusal(exc)
                if refusal is not None:
                    raise refusal from exc
                raise

    def _storage_refusal(self, exc: BaseException) -> Exception | None:
        """A clear error when the catalog's storage refused a write (disk full, read-only)."""
        from sqlalchemy.exc import DBAPIError

        from archive.errors import StorageError

        if not isinstance(exc, DBAPIError):
            return None
        orig = exc.orig
        text = str(orig).strip().splitlines()[0] if str(orig).strip() else type(orig).__name__
        sqlstate = getattr(orig, "sqlstate", None)
        low = text.lower()
        if ("disk is full" in low or "readonly database" in low or "read-only" in low
                or sqlstate in ("53100", "25006", "42501")):  # PostgreSQL: disk full,
            # read-only transaction, insufficient privilege
            return StorageError(
                f"the catalog {mask_url(self.db_url)} refused the write: {text}",
                hint="this change was not recorded; free space or make the catalog "
                     "writable and run the command again")
        return None

    @contextmanager
    def session(self) -> Iterator[Session]:
        """A read-only session (nothing it does is committed)."""
        # Closing (not rolling back) ends the read transaction and keeps loaded rows usable.
        with Session(self.engine, expire_on_commit=False, autoflush=False) as session:
            yield session

    # -- custody helpers ----------------------------------------------------------------
    def log(self, session: Session, action: str, payload: dict[str, Any], *,
            survey_id: int | None = None, rows: list[Any] | None = None) -> LedgerEvent:
        """Append a ledger event in ``session``'s transaction (see :func:`ledger.append`)."""
        return ledger.append(session, actor=self.actor, action=action, payload=payload,
                             survey_id=survey_id, rows=rows)

    def log_many(self, session: Session,
                 events: list[tuple[str, dict[str, Any], int | None, list[Any] | None]],
                 ) -> list[LedgerEvent]:
        """Append many ledger events ``(action, payload, survey_id, rows)`` in order in
        ``session``'s transaction, taking the writers' lock once (:func:`ledger.append_many`)."""
        return ledger.append_many(session, actor=self.actor, events=events)

    def register_object(self, session: Session, h: str, size: int, kind: str) -> None:
        """Record in the catalog that object ``h`` is referenced (idempotent)."""
        values = {"hash": h, "size": size, "kind": kind, "created_at": utcnow()}
        if self.engine.dialect.name == "postgresql":
            from sqlalchemy.dialects.postgresql import insert as pg_insert

            stmt = pg_insert(StoredObject).values(**values).on_conflict_do_nothing()
        else:
            stmt = sqlite_insert(StoredObject).values(**values).on_conflict_do_nothing()
        session.execute(stmt)

    def register_objects(self, session: Session, items: list[tuple[str, int, str]]) -> None:
        """:meth:`register_object` for many ``(hash, size, kind)`` at once, one statement
        run for all of them (the first of a repeated hash wins, as with single calls; the
        statement is the same whatever their number, so it is compiled once)."""
        seen: dict[str, tuple[str, int, str]] = {}
        for h, size, kind in items:
            seen.setdefault(h, (h, size, kind))
        if not seen:
            return
        now = utcnow()
        values = [{"hash": h, "size": size, "kind": kind, "created_at": now}
                  for h, size, kind in seen.values()]
        insert = sqlite_insert
        if self.engine.dialect.name == "postgresql":  # its dialect loads when it is the one
            from sqlalchemy.dialects.postgresql import insert as pg_insert

            insert = pg_insert
        session.connection().execute(
            insert(StoredObject.__table__).on_conflict_do_nothing(), values)

    def survey(self, session: Session, name: str | None = None) -> Survey:
        """The survey called ``name``, or the only survey when ``name`` is None."""
        if name is not None:
            found = session.execute(select(Survey).where(Survey.name == name)).scalar_one_or_none()
            if found is None:
                names = session.execute(select(Survey.name)).scalars().all()
                raise UsageError(f"no survey named {name!r}",
                                 hint=f"known surveys: {', '.join(names) or 'none'}")
            return found
        surveys = session.execute(select(Survey).order_by(Survey.id)).scalars().all()
        if len(surveys) == 1:
            return surveys[0]
        if not surveys:
            raise UsageError("the archive has no survey yet",
                             hint="create one with 'nodekeep survey create NAME --crs EPSG:NNNN'")
        raise UsageError("the archive holds several surveys; choose one with --survey",
                         hint="known surveys: " + ", ".join(s.name for s in surveys))

    def describe(self) -> dict[str, Any]:
        """Where this archive's parts live (database URL with any password masked)."""
        return {"root": str(self.root), "db": mask_url(self.db_url), "objects": self.objects_url,
                "actor": self.actor}
