"""Schema migrations run by the library (alembic), from the scripts shipped in the package.

In a checkout the scripts are the top-level ``migrations/`` folder; an installed wheel carries
the same files as ``archive.migrations``.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING

from sqlalchemy import Engine, text

from archive.errors import SchemaAhead, SchemaBehind

if TYPE_CHECKING:
    from alembic.config import Config

HEAD = "0003"
"""The newest revision of the shipped scripts, for the check every command makes when it
opens an archive: a catalog at this revision is current without importing alembic (a
tenth of a second) or reading the scripts. tests/store/test_migrations.py checks it is the
scripts' head; any other revision goes the full way through alembic."""



def script_location() -> str:
    """Folder of the alembic scripts: inside the installed package, else the checkout's."""
    try:
        loc = resources.files("archive.migrations")
        path = Path(str(loc))
        if (path / "env.py").is_file():
            return str(path)
    except ModuleNotFoundError:
        pass
    checkout = Path(__file__).resolve().parents[2] / "migrations"
    return str(checkout)


def alembic_config(engine: Engine | None = None) -> Config:
    """An alembic Config pointing at the shipped scripts (and at ``engine`` when given)."""
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", script_location())
    if engine is not None:
        cfg.attributes["engine"] = engine
    return cfg


def head_revision() -> str:
    """The newest revision this nodekeep knows."""
    from alembic.script import ScriptDirectory

    return ScriptDirectory.from_config(alembic_config()).get_current_head()


def current_revision(engine: Engine) -> str | None:
    """The revision the catalog is at (None for an empty database)."""
    from alembic.runtime.migration import MigrationContext

    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def upgrade(engine: Engine, revision: str = "head", *, actor: str | None = None
            ) -> tuple[str | None, str]:
    """Migrate the catalog to ``revision``; returns (before, after).

    An upgrade of a catalog that has a ledger is itself a state change: one
    ``archive.upgrade`` event (from, to) is appended by ``actor`` (default: NODEKEEP_ACTOR,
    else the OS user), whoever calls this, the command line or a library user. A new, empty
    database gets its tables and no event (the archive's creation records itself).
    """
    from alembic import command

    before = current_revision(engine)
    command.upgrade(alembic_config(engine), revision)
    after = current_revision(engine) or ""
    if before is not None and before != after:
        from sqlalchemy.orm import Session

        from archive.store import ledger
        from archive.store.archive import default_actor

        with Session(engine) as session, session.begin():
            ledger.append(session, actor=actor or default_actor(), action="archive.upgrade",
                          payload={"from": before, "to": after})
    return before, after


def _recorded_revision(engine: Engine) -> str | None:
    """The revision in the catalog's ``alembic_version`` table (None when it has none)."""
    from sqlalchemy.exc import SQLAlchemyError

    try:
        with engine.connect() as conn:
            rows = conn.execute(text("SELECT version_num FROM alembic_version")).all()
    except SQLAlchemyError:
        return None
    return rows[0][0] if len(rows) == 1 else None


def check_schema(engine: Engine) -> None:
    """Raise SchemaBehind / SchemaAhead unless the catalog is at this nodekeep's head."""
    if _recorded_revision(engine) == HEAD:
        return
    from alembic.script import ScriptDirectory

    current = current_revision(engine)
    head = head_revision()
    if current == head:
        return
    known = {s.revision for s in ScriptDirectory.from_config(alembic_config()).walk_revisions()}
    if current is not None and current not in known:
        raise SchemaAhead(current)
    raise SchemaBehind(current, head)
