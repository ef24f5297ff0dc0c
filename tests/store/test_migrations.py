"""Migrations: the schema they build matches the models; saved catalogs upgrade to head."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import create_engine

from archive.store import migrate
from archive.store.archive import Archive
from archive.store.db import make_engine
from archive.store.models import Base
from archive.store.verify import verify_archive

SAVED = Path(__file__).parent / "saved"


def _no_drift(engine) -> list:
    with engine.connect() as conn:
        ctx = MigrationContext.configure(conn, opts={"compare_type": True})
        return compare_metadata(ctx, Base.metadata)


def test_migrations_match_models(any_arc: Archive):
    """The equivalent of 'alembic check': autogenerate finds no difference."""
    assert _no_drift(any_arc.engine) == []
    assert migrate.current_revision(any_arc.engine) == migrate.head_revision()


def test_every_revision_upgrades_to_head(tmp_path):
    script = ScriptDirectory.from_config(migrate.alembic_config())
    revisions = [r.revision for r in script.walk_revisions()][::-1]
    for rev in revisions:
        engine = make_engine(f"sqlite:///{tmp_path / (rev + '.sqlite')}")
        migrate.upgrade(engine, rev)
        assert migrate.current_revision(engine) == rev
        migrate.upgrade(engine)
        assert _no_drift(engine) == []
        engine.dispose()


@pytest.mark.parametrize("saved", sorted(p.name for p in SAVED.iterdir() if p.is_dir()))
def test_saved_archive_upgrades_and_verifies(tmp_path, saved):
    """One archive saved at each released revision opens after 'nodekeep upgrade'."""
    root = tmp_path / saved
    shutil.copytree(SAVED / saved, root)
    arc = Archive.open(root, check_schema=False)
    try:
        migrate.upgrade(arc.engine)
        assert migrate.current_revision(arc.engine) == migrate.head_revision()
        assert verify_archive(arc).ok
    finally:
        arc.close()
    Archive.open(root).close()


def test_script_location_is_shipped_in_package():
    loc = Path(migrate.script_location())
    assert (loc / "env.py").is_file()
    assert any(p.name.startswith("0001") for p in (loc / "versions").iterdir())


def test_plain_engine_sees_head(tmp_path):
    arc = Archive.init(tmp_path / "a")
    arc.close()
    engine = create_engine(f"sqlite:///{tmp_path / 'a' / 'catalog.sqlite'}")
    assert migrate.current_revision(engine) == migrate.head_revision()
    engine.dispose()


def test_a_library_upgrade_is_ledgered(tmp_path):
    """Upgrading through the library (not only through 'nodekeep upgrade') appends the
    archive.upgrade event, so the custody record does not depend on who called it."""
    from sqlalchemy import select

    from archive.store.models import LedgerEvent

    root = tmp_path / "rev0001"
    shutil.copytree(SAVED / "rev0001", root)
    arc = Archive.open(root, check_schema=False)
    try:
        before, after = migrate.upgrade(arc.engine, actor="library caller")
        assert (before, after) == ("0001", migrate.head_revision())
        with arc.session() as s:
            ev = s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq.desc())).first()
        assert (ev.action, ev.actor) == ("archive.upgrade", "library caller")
        assert '"from":"0001"' in ev.payload and verify_archive(arc).ok
        assert migrate.upgrade(arc.engine) == (after, after)  # nothing to do, nothing ledgered
        with arc.session() as s:
            assert s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq.desc())).first() \
                .seq == ev.seq
    finally:
        arc.close()


def test_the_fast_schema_check_knows_the_scripts_head():
    """The revision an archive is checked against without alembic is the scripts' head."""
    from archive.store import migrate

    assert migrate.head_revision() == migrate.HEAD
