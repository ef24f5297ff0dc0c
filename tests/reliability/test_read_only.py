"""Read-only access: how a client, an auditor or a processing centre opens an archive.

Every query command answers on an archive the user cannot write; every command that would
change it fails with one line that says the archive is read-only (exit 5), before doing any
work, and leaves the catalog and the object store exactly as they were.

Three ways of being unable to write, because CI runs as root (which ignores file modes):

- SQLite opened with ``--read-only``: a ``mode=ro`` URI, in-process;
- SQLite with the catalog and object folder ``chmod a-w``, run as an unprivileged user
  (root's override capabilities dropped with ``setpriv``), in a child process;
- PostgreSQL through a role granted SELECT only on the catalog tables.
"""

from __future__ import annotations

import json
import os
import shutil
import stat
import sys
import uuid
from pathlib import Path

import pytest
from click.testing import CliRunner
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

from archive.cli.main import cli
from archive.store.archive import Archive
from archive.store.history import ledger_head
from tests.reliability.harness import ArchiveTemplate, child_env, run

STORAGE_ERROR = 5


@pytest.fixture
def copy(full_template: ArchiveTemplate, tmp_path: Path) -> Path:
    """A copy of the full archive (survey, inputs, logs, a run, an edit, a CSV delivery)."""
    return full_template.clone(tmp_path / "copy")


def _facts(root: Path, tmp_path: Path) -> dict:
    """A delivered station, the run and a copy of the delivered file of the archive."""
    from sqlalchemy import select

    from archive.store.models import Delivery

    with Archive.open(root) as arc:
        with arc.session() as s:
            d = s.scalars(select(Delivery).order_by(Delivery.id)).first()
        final = arc.objects.read_table(d.final_hash)
        delivered = tmp_path / "held" / d.file_name
        delivered.parent.mkdir()
        delivered.write_bytes(arc.objects.read_bytes(d.file_hash))
        (delivered.parent / (d.file_name + ".lineage.json")).write_bytes(
            arc.objects.read_bytes(d.manifest_hash))
        return {"line": f"{final['line'][0].as_py():g}", "point": f"{final['point'][0].as_py():g}",
                "run": d.run_id, "file": str(delivered), "head": ledger_head(arc)["hash"],
                "objects": sorted(arc.objects.iter_hashes())}


def queries(f: dict, report_to: Path) -> list[list[str]]:
    """Every query command, on the archive's delivered station, run and file."""
    station = [f["line"], f["point"]]
    return [["history"], ["history", "--head"], ["survey", "list"], ["runs"], ["logs"],
            ["inputs"], ["edits", "--all"], ["show", *station], ["where", *station],
            ["trace", *station], ["trace", "--file", f["file"]],
            ["diff", f["run"], f["run"]], ["qc"], ["verify"], ["verify", "--delivery", f["file"]],
            ["reproduce", f["run"]],
            ["report", "--to", str(report_to), "--max-clouds", "1"]]


def writes(f: dict, tmp_path: Path) -> list[list[str]]:
    """Commands that would change the archive."""
    return [["survey", "create", "Second Prospect", "--crs", "EPSG:32614"],
            ["edit", "reject", f["line"], f["point"], "--reason", "checking read-only"],
            ["solve", "--label", "again"],
            ["deliver", "--format", "sps", "--to", str(tmp_path / "again.sps"),
             "--recipient", "Harrow Basin Energy"],
            ["upgrade"]]


def _assert_unchanged(root: Path, f: dict) -> None:
    with Archive.open(root) as arc:
        assert ledger_head(arc)["hash"] == f["head"]
        assert sorted(arc.objects.iter_hashes()) == f["objects"]


def _assert_refused(code: int, stderr: str) -> None:
    assert code == STORAGE_ERROR, stderr
    lines = stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: the archive "), stderr
    assert "is read-only here" in lines[0] and "Traceback" not in stderr


def _run_all(argvs: list[list[str]], root: Path, *global_args: str) -> list[tuple[int, str]]:
    runner = CliRunner()
    out = []
    for argv in argvs:
        r = runner.invoke(cli, ["-A", str(root), *global_args, *argv])
        out.append((r.exit_code, r.stderr + (repr(r.exception) if r.exit_code not in
                                             (0, STORAGE_ERROR) else "")))
    return out


def test_every_query_works_and_every_write_is_refused(copy: Path, full_template, tmp_path):
    """SQLite: ``--read-only`` (URI ``mode=ro``); PostgreSQL: a role granted SELECT only."""
    f = _facts(copy, tmp_path)
    role = None
    if full_template.pg_url is None:
        where, extra, reason = copy, ("--read-only",), "(opened read-only)"
    else:
        where, extra = tmp_path / "client-view", ()
        role = _select_only_role(copy)
        reason = f"(the PostgreSQL user {role} may read the catalog, not write it)"
        _view(copy, where, role)
    try:
        asked = queries(f, tmp_path / "report.html")
        for argv, (code, err) in zip(asked, _run_all(asked, where, *extra), strict=True):
            assert code == 0, (argv, err)
        assert (tmp_path / "report.html").stat().st_size > 0
        for code, err in _run_all(writes(f, tmp_path), where, *extra):
            _assert_refused(code, err)
            assert reason in err
    finally:
        if role is not None:
            _drop_role(copy, role)
    _assert_unchanged(copy, f)
    assert not (tmp_path / "again.sps").exists()


def test_read_only_flag_from_the_environment(copy, full_template, monkeypatch):
    """``NODEKEEP_READ_ONLY=1`` as ``--read-only``; on PostgreSQL the server itself then
    refuses writes in the session, whatever the role may do."""
    monkeypatch.setenv("NODEKEEP_READ_ONLY", "1")
    r = CliRunner().invoke(cli, ["-A", str(copy), "survey", "create", "Second Prospect",
                                 "--crs", "EPSG:32614"])
    _assert_refused(r.exit_code, r.stderr)
    assert "(opened read-only)" in r.stderr
    with Archive.open(copy, read_only=True) as arc, arc.engine.connect() as c:
        if arc.engine.dialect.name == "postgresql":
            assert c.exec_driver_sql("SHOW transaction_read_only").scalar() == "on"
        else:
            assert c.exec_driver_sql("PRAGMA query_only").scalar() in (0, 1)
            with pytest.raises(Exception, match="readonly database"):
                c.exec_driver_sql("CREATE TABLE slipped_in (x INTEGER)")


def _url_of(root: Path) -> str:
    for line in (root / "nodekeep.toml").read_text(encoding="utf-8").splitlines():
        if line.startswith("db = "):
            return line.split("=", 1)[1].strip().strip('"')
    raise AssertionError("no db in nodekeep.toml")


def _select_only_role(root: Path) -> str:
    """A login role granted SELECT on the archive's catalog tables, nothing else."""
    role = f"nk_reader_{uuid.uuid4().hex[:8]}"
    engine = create_engine(_url_of(root), isolation_level="AUTOCOMMIT")
    try:
        with engine.connect() as c:
            c.execute(text(f'CREATE ROLE "{role}" LOGIN'))
            c.execute(text(f'GRANT USAGE ON SCHEMA public TO "{role}"'))
            c.execute(text(f'GRANT SELECT ON ALL TABLES IN SCHEMA public TO "{role}"'))
    finally:
        engine.dispose()
    return role


def _drop_role(root: Path, role: str) -> None:
    engine = create_engine(_url_of(root), isolation_level="AUTOCOMMIT")
    try:
        with engine.connect() as c:
            c.execute(text("SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
                           "WHERE usename = :r"), {"r": role})
            c.execute(text(f'DROP OWNED BY "{role}"'))
            c.execute(text(f'DROP ROLE "{role}"'))
    finally:
        engine.dispose()


def _view(root: Path, where: Path, role: str) -> None:
    """An archive folder of the reader's own: the same catalog, logged in as ``role``, and
    the same object folder."""
    url = make_url(_url_of(root)).set(username=role, password=None)
    where.mkdir()
    (where / "nodekeep.toml").write_text(
        "[archive]\nformat = 1\n"
        f'db = "{url.render_as_string(hide_password=False)}"\n'
        f'objects = "{(root / "objects").resolve()}"\n', encoding="utf-8")


DRIVER = """
import json, sys
from click.testing import CliRunner
from archive.cli.main import cli
root, argvs = sys.argv[1], json.loads(sys.argv[2])
out = []
for argv in argvs:
    r = CliRunner().invoke(cli, ["-A", root, *argv])
    out.append([r.exit_code, r.stderr])
print(json.dumps(out))
"""


def test_unprivileged_user_without_write_permission(full_template, copy, tmp_path):
    """As an operating-system user who may not write the archive's files (no
    ``--read-only``: the archive notices by itself). SQLite: catalog and objects
    ``chmod a-w``; PostgreSQL: the object folder ``chmod a-w`` and a SELECT-only role."""
    prefix: list[str] = []
    if os.geteuid() == 0:
        setpriv = shutil.which("setpriv")
        assert setpriv is not None, "root needs setpriv to make file permissions bind"
        prefix = [setpriv, "--bounding-set", "-dac_override,-dac_read_search,-fowner"]
    f = _facts(copy, tmp_path)
    where, role = copy, None
    reason = "or its folder is not writable"
    if full_template.pg_url is not None:
        role = _select_only_role(copy)
        where = tmp_path / "client-view"
        _view(copy, where, role)
        reason = f"the PostgreSQL user {role} may read the catalog, not write it"
    for d, _, files in os.walk(copy):
        for name in files:
            os.chmod(Path(d) / name, 0o444)
        os.chmod(d, 0o555)
    try:
        asked = [q for q in queries(f, tmp_path / "r.html") if q[0] != "report"] \
            + writes(f, tmp_path)
        done = run([*prefix, sys.executable, "-c", DRIVER, str(where), json.dumps(asked)],
                   env=child_env())
        assert done.returncode == 0, done.stderr
        results = json.loads(done.stdout)
    finally:
        for d, _, files in os.walk(copy):
            os.chmod(d, stat.S_IRWXU)
            for name in files:
                os.chmod(Path(d) / name, stat.S_IRUSR | stat.S_IWUSR)
        if role is not None:
            _drop_role(copy, role)
    n_queries = len(asked) - len(writes(f, tmp_path))
    for argv, (code, err) in zip(asked[:n_queries], results[:n_queries], strict=True):
        assert code == 0, (argv, err)
    for code, err in results[n_queries:]:
        _assert_refused(code, err)
        assert reason in err
    _assert_unchanged(copy, f)
