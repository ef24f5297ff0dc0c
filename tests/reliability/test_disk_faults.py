"""Disk full and read-only archives: a write that cannot complete fails cleanly (a one-line
reason, exit code 5, nothing half-recorded) and ``verify`` passes afterwards.

Disk full is real where the tests may mount a small tmpfs (root on Linux), and injected
otherwise (``os.replace`` raising ENOSPC in a child process). Read-only is a tmpfs
remounted read-only, permissions taken away (tested as an unprivileged user), and
``Archive.open(read_only=True)``.
"""

from __future__ import annotations

import json
import os
import shutil
import stat
import subprocess
import sys
from pathlib import Path

import pytest

from archive.errors import ReadOnly
from archive.store.archive import Archive
from archive.store.history import ledger_head
from archive.store.verify import verify_archive
from tests.reliability.harness import cli_argv, run
from tests.reliability.logs import write_logs
from tests.support.cli import SURVEY_EPSG, SURVEY_NAME
from tests.support.reliability import make_survey_archive

STORAGE_ERROR = 5


def remount(where: Path, options: str) -> None:
    subprocess.run(["mount", "-o", f"remount,{options}", str(where)], check=True)


def _verify_ok(root: Path) -> dict:
    with Archive.open(root) as arc:
        report = verify_archive(arc)
        assert report.ok, report.problems
        return {"head": ledger_head(arc)["hash"], "dangling": report.dangling,
                "objects": report.objects_checked}


def _loaded(root: Path) -> set[str]:
    from sqlalchemy import select

    from archive.store.models import RawFile

    with Archive.open(root) as arc, arc.session() as s:
        return set(s.scalars(select(RawFile.node)))


def _assert_clean_failure(done: subprocess.CompletedProcess, reason: str) -> None:
    assert done.returncode == STORAGE_ERROR, (done.returncode, done.stderr)
    assert done.stderr.startswith("error: ") and reason in done.stderr, done.stderr
    assert "Traceback" not in done.stderr and "internal error" not in done.stderr


def test_object_store_full(tmp_path: Path, tmpfs):
    objects = tmpfs("objects", "1m")
    root = make_survey_archive(tmp_path / "archive", None)
    cfg = (root / "nodekeep.toml").read_text().replace('objects = "objects"',
                                                      f'objects = "{objects}"')
    (root / "nodekeep.toml").write_text(cfg)
    logs = write_logs(tmp_path / "logs", 4, 3000)  # 4 x 0.5 MB raw, plus fix tables
    done = run(cli_argv(root, "load", "fixes", "--workers", "1", str(tmp_path / "logs")))
    _assert_clean_failure(done, "No space left on device")
    assert list((objects / "tmp").iterdir()) == []  # no partial object left behind
    _verify_ok(root)
    remount(objects, "size=20m")  # space freed: the same command completes
    done = run(cli_argv(root, "load", "fixes", "--workers", "1", str(tmp_path / "logs")))
    assert done.returncode == 0, done.stderr
    assert _loaded(root) == {p.stem for p in logs}
    assert _verify_ok(root)["dangling"] == []


def test_catalog_disk_full(tmp_path: Path, tmpfs):
    catalog = tmpfs("catalog", "400k")
    root = make_survey_archive(tmp_path / "archive", f"sqlite:///{catalog}/catalog.sqlite")
    before = _verify_ok(root)
    logs = write_logs(tmp_path / "logs", 300, 10)
    done = run(cli_argv(root, "load", "fixes", "--workers", "1", str(tmp_path / "logs")))
    _assert_clean_failure(done, "database or disk is full")
    after = _verify_ok(root)  # what committed is whole; the rest left dangling objects only
    assert len(_loaded(root)) < len(logs)
    remount(catalog, "size=8m")
    done = run(cli_argv(root, "load", "fixes", "--workers", "1", str(tmp_path / "logs")))
    assert done.returncode == 0, done.stderr
    assert _loaded(root) == {p.stem for p in logs}
    final = _verify_ok(root)
    assert final["dangling"] == [] and before["head"] != after["head"] != final["head"]


INJECT = """
import errno, os, sys
real = os.replace
def full(src, dst, *a, **k):
    if "/objects/" in str(dst):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(dst))
    return real(src, dst, *a, **k)
os.replace = full
from archive.cli.main import main
main(sys.argv[1:])
"""


def test_disk_full_injected(tmp_path: Path):
    """Where no tmpfs can be mounted: the object rename fails with ENOSPC."""
    root = make_survey_archive(tmp_path / "archive", None)
    write_logs(tmp_path / "logs", 2, 200)
    before = _verify_ok(root)
    done = run([sys.executable, "-c", INJECT, "-A", str(root), "load", "fixes", "--workers",
                "1", str(tmp_path / "logs")])
    _assert_clean_failure(done, "No space left on device")
    after = _verify_ok(root)
    assert after["head"] == before["head"]  # nothing recorded
    assert list((root / "objects" / "tmp").iterdir()) == []
    done = run(cli_argv(root, "load", "fixes", "--workers", "1", str(tmp_path / "logs")))
    assert done.returncode == 0 and len(_loaded(root)) == 2


def test_read_only_media(tmp_path: Path, tmpfs):
    media = tmpfs("media", "20m")
    root = make_survey_archive(media / "archive", None)
    write_logs(tmp_path / "logs", 2, 200)
    write_logs(tmp_path / "later", 1, 200, first=3001)
    assert run(cli_argv(root, "load", "fixes", "--workers", "1",
                        str(tmp_path / "logs"))).returncode == 0
    before = _verify_ok(root)
    remount(media, "ro")
    done = run(cli_argv(root, "verify", "--json"))
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout)["ok"] and json.loads(done.stdout)["head"] == before["head"]
    assert run(cli_argv(root, "history", "--head")).stdout.startswith(before["head"])
    _assert_clean_failure(run(cli_argv(root, "load", "fixes", str(tmp_path / "later"))),
                          "is read-only here (the catalog")
    _assert_clean_failure(run(cli_argv(root, "survey", "create", "Second", "--crs",
                                       f"EPSG:{SURVEY_EPSG}")), "is read-only here")
    remount(media, "rw")
    assert _verify_ok(root)["head"] == before["head"]


def _without_override() -> list[str]:
    """Command prefix that makes permissions bind (root ignores them otherwise)."""
    if os.geteuid() != 0:
        return []
    setpriv = shutil.which("setpriv")
    if setpriv is None:
        pytest.skip("running as root without setpriv: permissions cannot be made to bind")
    return [setpriv, "--bounding-set", "-dac_override,-dac_read_search,-fowner"]


def test_permissions_taken_away(tmp_path: Path):
    """Objects folder and catalog made read-only with chmod."""
    root = make_survey_archive(tmp_path / "archive", None)
    logs = write_logs(tmp_path / "logs", 1, 200)
    later = write_logs(tmp_path / "later", 1, 200, first=3001)
    assert run(cli_argv(root, "load", "fixes", "--workers", "1", str(logs[0]))).returncode == 0
    before = _verify_ok(root)
    prefix = _without_override()
    try:
        for d, _, files in os.walk(root):
            for f in files:
                os.chmod(Path(d) / f, 0o444)
            os.chmod(d, 0o555)

        def as_user(*args: str) -> subprocess.CompletedProcess:
            return run(prefix + cli_argv(root, *args))

        done = as_user("verify")
        assert done.returncode == 0 and "archive OK" in done.stdout, done.stderr
        _assert_clean_failure(as_user("load", "fixes", "--workers", "1", str(later[0])),
                              "is read-only here (the catalog")
        _assert_clean_failure(as_user("survey", "create", "Second", "--crs",
                                      f"EPSG:{SURVEY_EPSG}"), "is read-only here")
    finally:
        for d, _, files in os.walk(root):
            os.chmod(d, stat.S_IRWXU)
            for f in files:
                os.chmod(Path(d) / f, stat.S_IRUSR | stat.S_IWUSR)
    assert _verify_ok(root)["head"] == before["head"]


def test_archive_opened_read_only(tmp_path: Path):
    from archive.ingest.load import load_fix_files
    from archive.survey.surveys import create_survey

    root = make_survey_archive(tmp_path / "archive", None)
    logs = write_logs(tmp_path / "logs", 1, 100)
    before = _verify_ok(root)
    with Archive.open(root, read_only=True) as arc:
        assert verify_archive(arc).ok
        with arc.session() as s:
            sid = arc.survey(s, SURVEY_NAME).id
        with pytest.raises(ReadOnly, match="is read-only here"):
            arc.objects.put_bytes(b"a field note")
        with pytest.raises(ReadOnly, match="is read-only here"):
            load_fix_files(arc, sid, logs, workers=1)
        with pytest.raises(ReadOnly, match="is read-only here"):
            create_survey(arc, "Second", f"EPSG:{SURVEY_EPSG}")
    after = _verify_ok(root)
    assert after == before and list((root / "objects").rglob("put-*")) == []
