"""Moving an archive to a company catalogue: another database, another object store.

:func:`migrate_archive` copies a whole archive (typically a laptop's SQLite catalog and
object folder) to a PostgreSQL catalog and an S3-compatible bucket, and proves the copy:

1. the source is verified first (a damaged archive is not moved);
2. every catalogued object is streamed to the target store and re-hashed there on arrival;
3. the target catalog is created by the migrations, checked empty, then every table's rows
   are copied in foreign-key order with their primary keys, ledger events and hashes
   unchanged, from one consistent read of the source, in one target transaction;
4. the target is verified (objects re-hashed, chain walked, every ledgered row checked) and
   its ledger head must equal the source's;
5. an ``archive.migrate`` event is appended to the target ledger, and ``nodekeep.toml`` is
   rewritten to point at the new places (the old one kept as ``nodekeep.toml.before-migrate``).

Nothing in the source is changed or deleted: the old catalog and objects stay as they were.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import Connection, Engine, Integer, func, select, text
from sqlalchemy.engine import make_url

from archive.errors import IntegrityError, Refused, UsageError
from archive.progress import NoProgress, Progress
from archive.store import migrate as schema
from archive.store.archive import CONFIG_NAME, Archive
from archive.store.db import mask_url
from archive.store.models import Base, LedgerHead, StoredObject
from archive.store.objects import ObjectStore
from archive.store.verify import VerifyReport, verify_archive

BACKUP_SUFFIX = ".before-migrate"
BATCH_ROWS = 5000
COPY_THREADS = 4


@dataclass
class MigrateReport:
    """What :func:`migrate_archive` moved and proved."""

    source: dict[str, str]
    target: dict[str, str]
    tables: dict[str, int] = field(default_factory=dict)
    objects: int = 0
    bytes: int = 0
    dangling_left: int = 0
    head: str | None = None
    event_seq: int | None = None
    event_hash: str | None = None
    config: str = ""
    backup: str = ""
    source_verify: VerifyReport | None = None
    target_verify: VerifyReport | None = None

    def as_dict(self) -> dict[str, Any]:
        return {
            "source": self.source, "target": self.target, "tables": self.tables,
            "objects": self.objects, "bytes": self.bytes, "dangling_left": self.dangling_left,
            "head": self.head, "event": {"seq": self.event_seq, "hash": self.event_hash},
            "config": self.config, "backup": self.backup,
            "source_ok": bool(self.source_verify and self.source_verify.ok),
            "target_ok": bool(self.target_verify and self.target_verify.ok),
        }


def normalise_db_url(url: str) -> str:
    """A database URL that means the same place from any folder (SQLite paths made absolute)."""
    try:
        u = make_url(url)
    except Exception as exc:
        raise UsageError(f"not a database URL: {mask_url(url)}",
                         hint="e.g. postgresql+psycopg://user@host/dbname") from exc
    if u.get_backend_name() == "sqlite" and u.database and u.database != ":memory:":
        path = Path(u.database).expanduser().resolve()
        path.parent.mkdir(parents=True, exist_ok=True)
        return f"sqlite:///{path}"
    return url


def normalise_objects_url(url: str) -> str:
    """An object store URL that means the same place from any folder."""
    if "://" in url and not url.startswith("file://"):
        return url
    return str(Path(url.removeprefix("file://")).expanduser().resolve())


def _tables() -> list:
    """Catalog tables in foreign-key order (parents before children)."""
    return list(Base.metadata.sorted_tables)


def _count_rows(conn: Connection) -> dict[str, int]:
    return {t.name: conn.execute(select(func.count()).select_from(t)).scalar_one()
            for t in _tables()}


def _check_target_empty(engine: Engine) -> None:
    if schema.current_revision(engine) is None:
        return
    with engine.connect() as conn:
        filled = {k: v for k, v in _count_rows(conn).items() if v}
    if filled:
        raise Refused(
            f"the target database {mask_url(str(engine.url))} already holds catalog rows "
            f"({', '.join(f'{k} {v}' for k, v in sorted(filled.items()))})",
            hint="migrate into a new, empty database",
        )


def _copy_objects(hashes: list[tuple[str, int]], source: ObjectStore, target: ObjectStore,
                  progress: Progress) -> tuple[int, int]:
    """Stream each object to the target and re-hash it there; returns (count, bytes)."""

    def copy(item: tuple[str, int]) -> tuple[str, int]:
        h, size = item
        if not target.exists(h):
            with source.open(h) as fh:
                got, _ = target.put_stream(fh)
            if got != h:
                raise IntegrityError(f"object {h} read back from the source as {got}",
                                     hint="run 'nodekeep verify' on the source archive")
        if not target.check(h):
            raise IntegrityError(f"object {h} does not hash to its name in the target store "
                                 f"{target.url}", hint="check the target store, then retry")
        return h, size

    total = sum(size for _, size in hashes)
    progress.start(total, "bytes", "copy objects")
    done = 0
    with ThreadPoolExecutor(max_workers=COPY_THREADS) as pool:
        for h, size in pool.map(copy, hashes):
            done += size
            progress.advance(size, h[:12])
    progress.close()
    return len(hashes), done


def _reset_sequences(conn: Connection) -> None:
    """Move PostgreSQL id sequences past the copied keys (explicit keys do not advance them)."""
    if conn.dialect.name != "postgresql":
        return
    for table in _tables():
        pk = list(table.primary_key.columns)
        if len(pk) != 1 or not isinstance(pk[0].type, Integer):
            continue
        seq = conn.execute(text("SELECT pg_get_serial_sequence(:t, :c)"),
                           {"t": table.name, "c": pk[0].name}).scalar()
        if seq:
            conn.execute(text(f'SELECT setval(:s, COALESCE((SELECT max("{pk[0].name}") '
                              f'FROM "{table.name}"), 1), '
                              f'(SELECT max("{pk[0].name}") FROM "{table.name}") IS NOT NULL)'),
                         {"s": seq})


def _copy_rows(source: Engine, target: Engine, progress: Progress) -> tuple[dict[str, int], str | None]:
    """Copy every catalog row in one source snapshot and one target transaction.

    Returns the row count per table and the source ledger head hash of that snapshot.
    """
    with source.connect() as src, src.begin(), target.connect() as dst, dst.begin():
        counts = _count_rows(src)
        progress.start(sum(counts.values()), "rows", "copy catalog")
        for table in _tables():
            order = list(table.primary_key.columns)
            result = src.execution_options(yield_per=BATCH_ROWS).execute(
                select(table).order_by(*order))
            for part in result.partitions():
                dst.execute(table.insert(), [dict(r._mapping) for r in part])
                progress.advance(len(part), table.name)
        _reset_sequences(dst)
        copied = _count_rows(dst)
        if copied != counts:
            raise IntegrityError(f"row counts differ after the copy: source {counts}, "
                                 f"target {copied}")
        head = src.execute(select(LedgerHead.hash).where(LedgerHead.id == 1)).scalar()
    progress.close()
    return counts, head


def _config_text(config: dict[str, Any]) -> str:
    def q(v: Any) -> str:
        if isinstance(v, str):
            return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
        return str(v)

    lines = ["# nodekeep archive: where its catalog and objects live", "[archive]"]
    lines += [f"{k} = {q(v)}" for k, v in config.items()]
    return "\n".join(lines) + "\n"


def migrate_archive(arc: Archive, to_db: str, to_objects: str | None = None,
                    progress: Progress | None = None) -> MigrateReport:
    """Copy ``arc`` to the catalog ``to_db`` and the object store ``to_objects``, verified.

    ``to_objects`` None keeps the objects where they are (only the catalog moves). Refuses a
    target catalog that already holds rows, a source that does not verify, and an archive
    that changed while it was being copied. On success the archive's ``nodekeep.toml``
    points at the new places; the previous file is kept beside it.
    """
    progress = progress or NoProgress()
    to_db = normalise_db_url(to_db)
    to_objects = normalise_objects_url(to_objects) if to_objects else arc.objects_url
    config_path = arc.root / CONFIG_NAME
    backup_path = arc.root / (CONFIG_NAME + BACKUP_SUFFIX)
    if backup_path.exists():
        raise Refused(f"{backup_path} exists: this archive was migrated before",
                      hint="move that file aside to migrate again")
    if make_url(to_db) == make_url(arc.db_url):
        raise UsageError("the target database is the archive's own catalog",
                         hint="give a new, empty database with --to-db")
    report = MigrateReport(
        source={"db": mask_url(arc.db_url), "objects": arc.objects_url},
        target={"db": mask_url(to_db), "objects": to_objects},
        config=str(config_path), backup=str(backup_path),
    )
    report.source_verify = verify_archive(arc, progress=progress)
    if not report.source_verify.ok:
        kinds = sorted({p.kind for p in report.source_verify.problems})
        raise IntegrityError(f"the archive does not verify ({', '.join(kinds)}); not moving it",
                             hint="run 'nodekeep verify' and resolve the problems first")
    report.dangling_left = len(report.source_verify.dangling)

    target_config = dict(arc.config) | {"db": to_db, "objects": to_objects}
    target = Archive(arc.root, target_config, actor=arc.actor)
    try:
        _check_target_empty(target.engine)
        schema.upgrade(target.engine)
        with arc.session() as s:
            hashes = [(o.hash, o.size) for o in s.scalars(select(StoredObject)
                                                          .order_by(StoredObject.hash))]
        if target.objects_url != arc.objects_url:
            report.objects, report.bytes = _copy_objects(hashes, arc.objects, target.objects,
                                                         progress)
        report.tables, report.head = _copy_rows(arc.engine, target.engine, progress)
        if report.head != report.source_verify.head:
            raise Refused("the archive changed while it was being migrated",
                          hint="stop every writer, then migrate again into a new, empty database")
        report.target_verify = verify_archive(target, progress=progress)
        if not report.target_verify.ok or report.target_verify.head != report.head:
            kinds = sorted({p.kind for p in report.target_verify.problems}) or ["ledger head"]
            raise IntegrityError(f"the migrated copy does not verify ({', '.join(kinds)})",
                                 hint="the archive still points at its old catalog; "
                                      "drop the target database and migrate again")
        with target.transaction() as tx:
            event = target.log(tx, "archive.migrate", {
                "from": report.source, "to": report.target, "head": report.head,
                "row_counts": report.tables, "objects": report.objects, "bytes": report.bytes,
                "schema": schema.head_revision(),
            })
        report.event_seq, report.event_hash = event.seq, event.hash
    finally:
        target.close()

    backup_path.write_bytes(config_path.read_bytes())
    tmp = arc.root / (CONFIG_NAME + ".tmp")
    tmp.write_text(_config_text(target_config), encoding="utf-8")
    os.replace(tmp, config_path)
    return report
