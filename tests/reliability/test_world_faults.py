"""Faults of the world, injected: a damaged catalog, a changed or lost object, a full disk,
a dropped database connection, a missing optional module.

Each case asserts what a user must see: one line starting ``error:`` (never "internal
error", never a traceback or SQL text), the documented exit code (3 damaged data, 5
environment or storage), nothing partial left behind, earlier data unchanged, and ``verify``
telling the truth about the archive afterwards.
"""

from __future__ import annotations

import json
import os
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest
from sqlalchemy import func, select

from archive.store.archive import Archive
from archive.store.history import ledger_head
from archive.store.models import Delivery, RawFile, Run
from archive.store.objects import fanout
from tests.reliability.harness import cli_argv, run

DAMAGED, ENVIRONMENT = 3, 5


def one_line(done: subprocess.CompletedProcess, code: int, *words: str) -> str:
    """The command failed with ``code`` and one line naming ``words``; returns that line."""
    assert done.returncode == code, (done.returncode, done.stdout, done.stderr)
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), done.stderr
    assert "internal error" not in done.stderr + done.stdout and "Traceback" not in done.stderr
    assert "SELECT" not in done.stderr and "INSERT" not in done.stderr
    for w in words:
        assert w in lines[0], (w, lines[0])
    return lines[0]


def counts(root: Path) -> dict[str, object]:
    with Archive.open(root) as arc, arc.session() as s:
        return {"head": ledger_head(arc)["hash"],
                "runs": s.scalar(select(func.count()).select_from(Run)),
                "deliveries": s.scalar(select(func.count()).select_from(Delivery))}


def verify_json(root: Path, *extra: str) -> dict:
    done = run(cli_argv(root, "verify", "--json", "--quiet", *extra))
    assert "internal error" not in done.stderr and "Traceback" not in done.stderr, done.stderr
    data = json.loads(done.stdout)
    unreachable = any(p["kind"] == "unreadable-catalog" and "lost the connection" in p["detail"]
                      for p in data["problems"])
    assert done.returncode == (0 if data["ok"] else ENVIRONMENT if unreachable else DAMAGED)
    return data


def first_log(root: Path) -> RawFile:
    with Archive.open(root) as arc, arc.session() as s:
        return s.scalars(select(RawFile).order_by(RawFile.id).limit(1)).one()


def station_of(scenario, node: str) -> tuple[str, str]:
    """(line, point) where the scenario deployed ``node`` first."""
    for row in scenario.deployments.read_text().splitlines()[1:]:
        serial, line, point = row.split(",")[:3]
        if serial == node:
            return line, point
    raise AssertionError(f"node {node} is not in the deployment log")


def flip(path: Path, offset: int) -> None:
    os.chmod(path, 0o644)
    data = bytearray(path.read_bytes())
    data[offset] ^= 0x01
    path.write_bytes(bytes(data))


# -- the catalog damaged (SQLite: the file itself) -------------------------------------
@pytest.fixture
def sqlite_copy(tmp_path: Path, scenario) -> Path:
    from tests.support.reliability import fill_archive

    return fill_archive(tmp_path / "archive", None, scenario, deliver_to=tmp_path / "out")


def sql(catalog: Path, statement: str, *params: object) -> list[tuple]:
    """Run one statement on the catalog with Python's own sqlite3 module (outside nodekeep)."""
    conn = sqlite3.connect(catalog, isolation_level=None)
    try:
        return conn.execute(statement, params).fetchall()
    finally:
        conn.close()


def _rootpage(catalog: Path, name: str) -> int:
    return sql(catalog, "SELECT rootpage FROM sqlite_schema WHERE name = ?", name)[0][0]


def _page_size(catalog: Path) -> int:
    sql(catalog, "PRAGMA wal_checkpoint(TRUNCATE)")
    return sql(catalog, "PRAGMA page_size")[0][0]


def test_byte_flipped_in_an_index_page(sqlite_copy: Path):
    catalog = sqlite_copy / "catalog.sqlite"
    before = counts(sqlite_copy)
    page_size = _page_size(catalog)
    page = _rootpage(catalog, "ix_raw_files_node")
    # a byte of the last key in the page's cell area (cells fill a b-tree page from its end)
    flip(catalog, (page - 1) * page_size + page_size - 3)
    # SQLite's own check sees it (sqlite3 module, outside nodekeep)
    assert sql(catalog, "PRAGMA integrity_check")[0][0] != "ok"
    data = verify_json(sqlite_copy, "--no-rehash")
    assert not data["ok"]
    named = [p for p in data["problems"] if p["kind"] == "damaged-catalog"]
    assert named and named[0]["subject"] == "index ix_raw_files_node", data["problems"]
    assert "REINDEX" in named[0]["detail"]
    # a command that happens to use the damaged index: never an internal error
    done = run(cli_argv(sqlite_copy, "logs", "--quiet"))
    assert "internal error" not in done.stderr and done.returncode in (0, DAMAGED)
    sql(catalog, "REINDEX")  # the rows were intact: rebuilding the index repairs it
    assert verify_json(sqlite_copy, "--no-rehash")["ok"]
    assert counts(sqlite_copy) == before


def test_byte_flipped_in_a_table_page(sqlite_copy: Path):
    catalog = sqlite_copy / "catalog.sqlite"
    page_size = _page_size(catalog)
    page = _rootpage(catalog, "surveys")
    data = bytearray(catalog.read_bytes())
    data[(page - 1) * page_size + 3] ^= 0xFF  # the page header's first-freeblock/cell count
    data[(page - 1) * page_size + 4] ^= 0xFF
    catalog.write_bytes(bytes(data))
    result = verify_json(sqlite_copy, "--no-rehash")
    assert not result["ok"]
    assert {p["kind"] for p in result["problems"]} <= {"damaged-catalog", "unreadable-catalog"}
    assert any("surveys" in p["subject"] or "catalog" in p["subject"]
               for p in result["problems"])
    one_line(run(cli_argv(sqlite_copy, "runs", "--quiet")), DAMAGED, "is damaged")


@pytest.mark.parametrize("damage", ["header", "truncated"])
def test_catalog_that_cannot_be_opened(sqlite_copy: Path, damage: str):
    catalog = sqlite_copy / "catalog.sqlite"
    data = catalog.read_bytes()
    if damage == "header":
        catalog.write_bytes(b"\0" * 16 + data[16:])
    else:
        catalog.write_bytes(data[: len(data) // 3])
    result = verify_json(sqlite_copy)
    assert [p["kind"] for p in result["problems"]] == ["unreadable-catalog"]
    assert "restore the catalog file from a backup" in result["problems"][0]["detail"]
    text = run(cli_argv(sqlite_copy, "verify"))
    assert text.returncode == DAMAGED and "PROBLEM unreadable-catalog" in text.stdout
    for argv in (["runs"], ["where", "1001", "5014"]):
        one_line(run(cli_argv(sqlite_copy, *argv, "--quiet")), DAMAGED,
                 "catalog", "is damaged")


def test_text_that_is_not_utf8(sqlite_copy: Path):
    log = first_log(sqlite_copy)
    sql(sqlite_copy / "catalog.sqlite",
        "UPDATE raw_files SET original_name = CAST(x'6c6f67ff2e6e6d6561' AS TEXT) WHERE id = ?",
        log.id)
    result = verify_json(sqlite_copy, "--no-rehash")
    subjects = {(p["kind"], p["subject"]) for p in result["problems"]}
    assert ("damaged-catalog", f"raw_files row {log.id}") in subjects
    assert ("altered-row", f"raw_files row {log.id}") in subjects  # and the ledger says so
    assert result["events_checked"] > 0  # the other checks still ran
    one_line(run(cli_argv(sqlite_copy, "logs", "--quiet")), DAMAGED,
             "is damaged", "not decode to UTF-8")


# -- stored objects changed or lost ----------------------------------------------------
@pytest.fixture
def copy(tmp_path: Path, full_template) -> Path:
    return full_template.clone(tmp_path / "archive")


def test_byte_flipped_in_a_fix_table(copy: Path, scenario):
    log = first_log(copy)
    line, point = station_of(scenario, log.node)
    before = counts(copy)
    flip(copy / "objects" / fanout(log.fixes_hash), 2000)
    done = run(cli_argv(copy, "solve", "--stations", f"{line}:{point}", "--quiet"))
    one_line(done, DAMAGED, log.fixes_hash[:16], f"fix table of node {log.node}",
             f"file {log.original_name}", "no longer matches its hash")
    assert counts(copy) == before  # no run recorded
    one_line(run(cli_argv(copy, "fixes", log.node, "--to", str(copy.parent / "f.csv"))),
             DAMAGED, f"node {log.node}")
    assert not (copy.parent / "f.csv").exists()
    problems = verify_json(copy)["problems"]
    assert [(p["kind"], p["subject"]) for p in problems] == [
        ("hash-mismatch", f"object {log.fixes_hash}")]


def test_truncated_fix_table(copy: Path):
    log = first_log(copy)
    path = copy / "objects" / fanout(log.fixes_hash)
    os.chmod(path, 0o644)
    path.write_bytes(path.read_bytes()[:100])
    for argv in (["fixes", log.node, "--to", str(copy.parent / "f.parquet")],
                 ["solve", "--quiet"]):
        line = one_line(run(cli_argv(copy, *argv)), DAMAGED, f"node {log.node}")
        assert "ArrowInvalid" not in line and "magic bytes" not in line


def test_deliver_with_a_raw_log_gone(copy: Path, tmp_path: Path):
    log = first_log(copy)
    before = counts(copy)
    (copy / "objects" / fanout(log.object_hash)).unlink()
    out = tmp_path / "deliveries"
    out.mkdir()
    done = run(cli_argv(copy, "deliver", "--format", "sps", "--to", str(out / "r.sps"),
                        "--recipient", "Harrow Basin Energy processing", "--allow-flags"))
    one_line(done, DAMAGED, log.object_hash[:16], f"raw log of node {log.node}",
             "missing from the object store")
    assert list(out.iterdir()) == []
    assert counts(copy) == before
    assert [p["kind"] for p in verify_json(copy)["problems"]] == ["missing"]


def test_reproduce_with_a_fix_table_gone(copy: Path):
    log = first_log(copy)
    with Archive.open(copy) as arc, arc.session() as s:
        run_id = s.scalars(select(Run.id)).first()
    (copy / "objects" / fanout(log.fixes_hash)).unlink()
    one_line(run(cli_argv(copy, "reproduce", run_id[:12], "--quiet")), DAMAGED,
             f"fix table of node {log.node}", "missing")


# -- out of space ------------------------------------------------------------------------
def _fill(folder: Path) -> Path:
    """Fill the file system holding ``folder`` to the last byte (unbuffered writes, in
    ever smaller pieces)."""
    ballast = folder / "ballast"
    with open(ballast, "wb", buffering=0) as fh:
        for size in (1 << 16, 1 << 12, 1):
            try:
                while True:
                    fh.write(b"\0" * size)
            except OSError:
                continue
    return ballast


def test_deliver_and_report_into_a_full_folder(copy: Path, tmpfs):
    out = tmpfs("out", "256k")
    before = counts(copy)
    _fill(out)
    deliver = run(cli_argv(copy, "deliver", "--format", "sps", "--to", str(out / "r.sps"),
                           "--recipient", "Harrow Basin Energy processing", "--allow-flags",
                           "--quiet"))
    line = one_line(deliver, ENVIRONMENT, f"cannot write {out / 'r.sps'}", "bytes needed",
                    "No space left on device")
    assert int(line.split("(")[1].split(" bytes")[0].replace(",", "")) > 1000
    report = run(cli_argv(copy, "report", "--to", str(out / "qc.html"), "--quiet"))
    one_line(report, ENVIRONMENT, f"cannot write {out / 'qc.html'}", "bytes needed")
    assert sorted(p.name for p in out.iterdir()) == ["ballast"]  # no temporary file left
    assert counts(copy) == before  # no delivery recorded
    data = verify_json(copy, "--no-rehash")
    assert data["ok"]  # the delivered bytes already stored are only dangling objects


def test_stale_temporaries_are_swept(copy: Path, tmp_path: Path):
    out = tmp_path / "out"
    out.mkdir()
    stale, fresh = out / ".r.sps.k2j4h5g6.tmp", out / ".other.csv.a1b2c3d4.tmp"
    stale.write_bytes(b"half a file")
    fresh.write_bytes(b"being written right now")
    old = time.time() - 3600
    os.utime(stale, (old, old))
    other = out / ".notes.txt"
    other.write_text("someone else's file")
    os.utime(other, (old, old))
    done = run(cli_argv(copy, "deliver", "--format", "sps", "--to", str(out / "r.sps"),
                        "--recipient", "Harrow Basin Energy processing", "--allow-flags",
                        "--quiet"))
    assert done.returncode == 0, done.stderr
    assert not stale.exists() and fresh.exists() and other.exists()


def test_catalog_disk_full_still_answers(tmp_path: Path, tmpfs, scenario):
    from tests.support.reliability import fill_archive

    disk = tmpfs("disk", "24m")
    root = fill_archive(disk / "archive", None, scenario, deliver_to=tmp_path / "out")
    before = counts(root)
    line, point = station_of(scenario, first_log(root).node)
    ballast = _fill(disk)
    assert os.statvfs(disk).f_bavail == 0
    data = verify_json(root)
    assert data["ok"] and data["head"] == before["head"]
    where = run(cli_argv(root, "where", line, point, "--json", "--quiet"))
    assert where.returncode == 0 and json.loads(where.stdout), where.stderr
    for argv in (["history", "--head"], ["trace", line, point], ["runs"], ["logs"]):
        done = run(cli_argv(root, *argv))
        assert done.returncode == 0 and "error" not in done.stderr, (argv, done.stderr)
    one_line(run(cli_argv(root, "edit", "reject", line, point, "--reason", "test")),
             ENVIRONMENT, "is full")
    later = str(sorted(scenario.logs)[-1])
    one_line(run(cli_argv(root, "load", "fixes", later, "--quiet")), ENVIRONMENT)
    ballast.unlink()
    assert counts(root) == before
    done = run(cli_argv(root, "load", "fixes", later, "--quiet"))
    assert done.returncode == 0, done.stderr
    assert verify_json(root)["ok"]


def test_full_disk_with_a_write_ahead_log_left(tmp_path: Path, tmpfs):
    """The catalog's disk filled while a writer kept its log: read in place, or from a
    private copy when SQLite cannot use its index file there."""
    from archive.store.db import make_engine

    disk = tmpfs("disk", "2m")
    path = disk / "catalog.sqlite"
    writer = sqlite3.connect(path, isolation_level=None)
    writer.execute("PRAGMA journal_mode=WAL")
    writer.execute("PRAGMA wal_autocheckpoint=0")
    writer.execute("CREATE TABLE t (x TEXT)")
    writer.executemany("INSERT INTO t VALUES (?)", [("a" * 500,)] * 200)
    _fill(disk)
    for shm in ("intact", "cut"):
        if shm == "cut":
            writer.close()  # cannot checkpoint onto a full disk: the log stays
            assert (disk / "catalog.sqlite-wal").stat().st_size > 0
            (disk / "catalog.sqlite-shm").write_bytes(b"")  # SQLite's index file unusable
        engine = make_engine(f"sqlite:///{path}")
        with engine.connect() as conn:
            assert conn.exec_driver_sql("SELECT count(*) FROM t").scalar() == 200
        engine.dispose()


# -- the database server, and missing modules ------------------------------------------
@pytest.mark.postgres
def test_connection_dropped_mid_write(tmp_path: Path, full_template, monkeypatch):
    """The server ends the session in the middle of a write (pg_terminate_backend)."""
    if full_template.pg_url is None:
        pytest.skip("PostgreSQL only")
    from click.testing import CliRunner
    from sqlalchemy import text

    from archive.store import ledger
    from tests.support.cli import invoke

    root = full_template.clone(tmp_path / "archive")
    before = counts(root)
    real = ledger.append_many  # every ledger write goes through it, one event or many

    def dropped(session, **kw):
        session.execute(text("SELECT pg_terminate_backend(pg_backend_pid())"))
        return real(session, **kw)

    monkeypatch.setattr(ledger, "append_many", dropped)
    result = invoke(CliRunner(), root, "edit", "reject", "1001", "5003", "--reason",
                    "cable cut by a tractor")
    monkeypatch.setattr(ledger, "append_many", real)
    assert result.exit_code == ENVIRONMENT, result.output
    err = result.stderr.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: lost the connection to the catalog")
    assert "SELECT" not in result.stderr and "internal error" not in result.stderr
    assert counts(root) == before
    assert verify_json(root, "--no-rehash")["ok"]


@pytest.mark.postgres
def test_server_not_reachable(tmp_path: Path, full_template):
    if full_template.pg_url is None:
        pytest.skip("PostgreSQL only")
    root = full_template.clone(tmp_path / "archive")
    cfg = root / "nodekeep.toml"
    cfg.write_text(cfg.read_text().replace("127.0.0.1:5432", "127.0.0.1:9"))
    for argv in (["runs"], ["verify"]):
        done = run(cli_argv(root, *argv, "--quiet"))
        assert done.returncode == ENVIRONMENT, done.stderr
        assert "internal error" not in done.stderr
        assert "lost the connection to the catalog" in done.stderr + done.stdout


HIDE_PSYCOPG = """
import sys
sys.modules["psycopg"] = None  # as if the PostgreSQL extra were not installed
from archive.cli.main import main
main(sys.argv[1:])
"""


def test_missing_postgres_module(tmp_path: Path):
    root = tmp_path / "archive"
    root.mkdir()
    (root / "nodekeep.toml").write_text(
        '[archive]\nformat = 1\ndb = "postgresql+psycopg://crew@db.example:5432/kestrel"\n'
        'objects = "objects"\n')
    done = run([sys.executable, "-c", HIDE_PSYCOPG, "-A", str(root), "runs"])
    one_line(done, ENVIRONMENT, "psycopg", "pip install 'nodekeep[postgres]'")


def test_object_store_fills_while_workers_write_fixes(tmp_path: Path, tmpfs):
    """Parsing processes write the fix tables; the store fills part way through the harvest:
    no good log is recorded as failed, and the re-run after freeing space loads them all."""
    from archive.store.models import LedgerEvent, StoredObject
    from tests.reliability.logs import write_logs
    from tests.support.reliability import make_survey_archive

    objects = tmpfs("objects", "3m")
    root = make_survey_archive(tmp_path / "archive", None)
    cfg = root / "nodekeep.toml"
    cfg.write_text(cfg.read_text().replace('objects = "objects"', f'objects = "{objects}"'))
    logs = write_logs(tmp_path / "logs", 12, 3000)  # 12 x 0.5 MB raw, plus fix tables
    done = run(cli_argv(root, "load", "fixes", "--workers", "2", "--quiet",
                        str(tmp_path / "logs")))
    one_line(done, ENVIRONMENT, "No space left on device")

    def state() -> tuple[int, int, set[str]]:
        with Archive.open(root) as arc, arc.session() as s:
            failed = s.scalar(select(func.count()).select_from(LedgerEvent)
                              .where(LedgerEvent.action == "load.fixes.failed"))
            loaded = s.scalar(select(func.count()).select_from(RawFile))
            kinds = set(s.scalars(select(StoredObject.kind)))
        return failed, loaded, kinds

    failed, loaded, _ = state()
    assert failed == 0 and loaded < len(logs)
    assert list((objects / "tmp").iterdir()) == []
    assert verify_json(root)["ok"]
    subprocess.run(["mount", "-o", "remount,size=40m", str(objects)], check=True)
    done = run(cli_argv(root, "load", "fixes", "--workers", "2", "--quiet",
                        str(tmp_path / "logs")))
    assert done.returncode == 0, done.stderr
    failed, loaded, kinds = state()
    assert failed == 0 and loaded == len(logs) and "raw-failed" not in kinds
    assert verify_json(root)["ok"]
