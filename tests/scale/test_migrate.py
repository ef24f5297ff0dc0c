"""``migrate``: a laptop archive moved to a company catalogue, proved at both ends.

The copy is checked independently of the code that made it: rows are read back with plain
SQL from both databases and compared value for value, the objects in the bucket are fetched
with boto3 and hashed with ``hashlib``, and ``verify`` runs on the result.
"""

from __future__ import annotations

import hashlib
import json
import os
import stat

import pytest
from sqlalchemy import create_engine, func, select, text

from archive.errors import IntegrityError, Refused
from archive.scale.migrate import migrate_archive
from archive.store.archive import CONFIG_NAME, Archive
from archive.store.models import Base, LedgerEvent, StoredObject
from archive.store.verify import verify_archive
from tests.support.cli import invoke
from tests.support.scale import populate, s3_key

pytestmark = pytest.mark.slow


def _dump(url: str) -> dict[str, list[tuple]]:
    """Every catalog row of every table, as raw database values, ordered by primary key."""
    engine = create_engine(url)
    out = {}
    try:
        with engine.connect() as conn:
            for table in Base.metadata.sorted_tables:
                cols = ", ".join(f'"{c.name}"' for c in table.columns)
                order = ", ".join(f'"{c.name}"' for c in table.primary_key.columns)
                rows = conn.execute(text(f'SELECT {cols} FROM "{table.name}" ORDER BY {order}'))
                out[table.name] = [tuple(_plain(v) for v in r) for r in rows]
    finally:
        engine.dispose()
    return out


def _plain(value):
    """A raw database value in one comparable form across SQLite and PostgreSQL."""
    from datetime import UTC, datetime

    if isinstance(value, str) and len(value) == 26 and value[10] == " ":
        value = datetime.fromisoformat(value)  # SQLite keeps timestamps as text
    if isinstance(value, datetime):
        return (value if value.tzinfo else value.replace(tzinfo=UTC)).astimezone(UTC)
    if isinstance(value, bool):
        return int(value)
    return value


@pytest.mark.postgres
def test_sqlite_and_folder_to_postgres_and_s3(tmp_path, small_scenario, pg_url, s3_url, s3_env):
    root = tmp_path / "arc"
    arc = Archive.init(root, actor="field-laptop")
    survey_id = populate(arc, small_scenario, n_logs=2)
    old_config = (root / CONFIG_NAME).read_bytes()
    old_db = arc.db_url
    before = _dump(old_db)
    with arc.session() as s:
        hashes = sorted(s.scalars(select(StoredObject.hash)))
    report = migrate_archive(arc, pg_url, s3_url)
    arc.close()

    assert report.source_verify.ok and report.target_verify.ok
    assert report.objects == len(hashes) and report.tables["raw_files"] == 2
    # Every row, keys, hashes and ledger included, is the same value in PostgreSQL.
    after = _dump(pg_url)
    for table, rows in before.items():
        if table in ("ledger_events", "ledger_head"):
            continue
        assert after[table] == rows, table
    assert after["ledger_events"][:-1] == before["ledger_events"]
    assert before["ledger_head"][0][2] == report.head  # (id, seq, hash)
    # The source catalog is untouched.
    assert _dump(old_db) == before

    # Every object is in the bucket under its name, and its bytes hash to that name.
    client = s3_env.client()
    for h in hashes:
        bucket, key = s3_key(s3_url, h)
        assert hashlib.sha256(client.get_object(Bucket=bucket, Key=key)["Body"].read()
                              ).hexdigest() == h

    # The archive now opens on the new places, verifies, and its last event is the move.
    assert (root / (CONFIG_NAME + ".before-migrate")).read_bytes() == old_config
    moved = Archive.open(root, actor="office")
    try:
        assert moved.db_url == pg_url and moved.objects_url == s3_url
        check = verify_archive(moved)
        assert check.ok, check.problems
        assert check.objects_checked == len(hashes) and not check.dangling
        with moved.session() as s:
            last = s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq.desc())).first()
            n_events = s.scalar(select(func.count()).select_from(LedgerEvent))
        assert last.action == "archive.migrate" and last.hash == report.event_hash
        assert n_events == len(before["ledger_events"]) + 1
        payload = json.loads(last.payload)
        assert payload["head"] == report.head and payload["to"]["objects"] == s3_url

        # Work goes on in the new catalogue: ids continue after the copied ones.
        from archive.survey.inputs import load_input
        from archive.survey.surveys import create_survey

        second = create_survey(moved, "Kestrel Flats 3D infill", "EPSG:32614")
        assert second.id == survey_id + 1
        v = load_input(moved, survey_id, "stations", small_scenario.preplot)
        assert v.version.version == 2 and v.version.id == before["input_versions"][-1][0] + 1
        assert verify_archive(moved).ok
    finally:
        moved.close()


def test_sqlite_to_sqlite_and_folder_to_folder_by_command(tmp_path, small_scenario, runner):
    root = tmp_path / "arc"
    arc = Archive.init(root, actor="field-laptop")
    populate(arc, small_scenario, n_logs=2)
    before = _dump(arc.db_url)
    arc.close()
    new_db = tmp_path / "office" / "catalog.sqlite"
    new_objects = tmp_path / "office" / "objects"
    result = invoke(runner, root, "migrate", "--to-db", f"sqlite:///{new_db}",
                    "--to-objects", str(new_objects), "--json")
    assert result.exit_code == 0, result.output
    out = json.loads(result.stdout)
    assert out["source_ok"] and out["target_ok"]
    assert out["target"]["objects"] == str(new_objects)
    after = _dump(f"sqlite:///{new_db}")
    assert after["ledger_events"][:-1] == before["ledger_events"]
    assert all(after[t] == before[t] for t in before if not t.startswith("ledger"))
    # Objects arrived as read-only files named by their hash.
    for (h, *_rest) in after["objects"]:
        path = new_objects / h[:2] / h[2:4] / h
        assert hashlib.sha256(path.read_bytes()).hexdigest() == h
        assert not os.stat(path).st_mode & stat.S_IWUSR
    result = invoke(runner, root, "verify")
    assert result.exit_code == 0 and "archive OK" in result.output
    result = invoke(runner, root, "history")
    assert result.exit_code == 0 and "archive.migrate" in result.output


def test_refuses_a_target_that_already_holds_a_catalog(tmp_path, small_scenario):
    other = Archive.init(tmp_path / "other", actor="office")
    other.close()
    root = tmp_path / "arc"
    arc = Archive.init(root, actor="field-laptop")
    config = (root / CONFIG_NAME).read_bytes()
    try:
        with pytest.raises(Refused, match="already holds catalog rows"):
            migrate_archive(arc, other.db_url, str(tmp_path / "o2"))
    finally:
        arc.close()
    assert (root / CONFIG_NAME).read_bytes() == config
    assert not (root / (CONFIG_NAME + ".before-migrate")).exists()


def test_refuses_to_move_an_archive_that_does_not_verify(tmp_path, runner):
    root = tmp_path / "arc"
    arc = Archive.init(root, actor="field-laptop")
    h, size = arc.objects.put_bytes(b"$GPGGA raw log\r\n")
    with arc.transaction() as tx:
        arc.register_object(tx, h, size, "raw")
        arc.log(tx, "test.object", {"raw": h})
    path = arc.objects.local_path(h)
    os.chmod(path, 0o644)
    path.write_bytes(b"$GPGGA changed\r\n")
    target = tmp_path / "office.sqlite"
    with pytest.raises(IntegrityError, match="hash-mismatch"):
        migrate_archive(arc, f"sqlite:///{target}", str(tmp_path / "o2"))
    arc.close()
    assert not (tmp_path / "o2").exists()
    result = invoke(runner, root, "migrate", "--to-db", f"sqlite:///{target}")
    assert result.exit_code == 3 and "does not verify" in result.stderr
