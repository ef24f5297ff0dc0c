"""Four ``nodekeep load fixes`` processes writing into one archive at the same time.

On SQLite (WAL, busy timeout, write lock taken at BEGIN) and on PostgreSQL (the ledger head
row locked by every writer): every log is present once, every load has its ledger event,
the chain is whole and no object is stored or registered twice.
"""

from __future__ import annotations

import subprocess
from pathlib import Path

import pytest
from sqlalchemy import func, select

from archive.store.archive import Archive
from archive.store.history import ledger_events
from archive.store.models import RawFile, StoredObject
from archive.store.verify import verify_archive
from tests.reliability.harness import REPO, ArchiveTemplate, child_env, cli_argv
from tests.reliability.logs import write_logs

PROCESSES, LOGS_EACH = 4, 3


def _start_all(argvs: list[list[str]]) -> list[subprocess.CompletedProcess]:
    env = child_env()
    procs = [subprocess.Popen(a, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                              env=env, cwd=REPO) for a in argvs]
    out = []
    for p, a in zip(procs, argvs, strict=True):
        stdout, stderr = p.communicate(timeout=300)
        out.append(subprocess.CompletedProcess(a, p.returncode, stdout, stderr))
    return out


def _check_archive(root: Path, n_logs: int) -> None:
    with Archive.open(root) as arc:
        report = verify_archive(arc)
        assert report.ok, report.problems
        assert report.dangling == []
        with arc.session() as s:
            raws = s.scalars(select(RawFile.object_hash)).all()
            n_objects = s.scalar(select(func.count()).select_from(StoredObject))
        events = ledger_events(arc, action="load.fixes")
        stored = list(arc.objects.iter_hashes())
    assert len(raws) == n_logs and len(set(raws)) == n_logs  # every log, once
    assert sorted(e["payload"]["raw"] for e in events) == sorted(raws)  # no event lost
    seqs = sorted(e["seq"] for e in events)
    assert len(set(seqs)) == len(seqs)
    assert len(stored) == len(set(stored)) == n_objects  # no object twice, none unregistered


@pytest.mark.slow
def test_four_processes_load_different_logs(template: ArchiveTemplate, tmp_path: Path):
    root = template.clone(tmp_path / "archive")
    folders = []
    for k in range(PROCESSES):
        write_logs(tmp_path / f"crew-{k}", LOGS_EACH, 1500, first=2000 + 100 * k)
        folders.append(tmp_path / f"crew-{k}")
    done = _start_all([cli_argv(root, "load", "fixes", "--workers", "1", str(f))
                       for f in folders])
    for d in done:
        assert d.returncode == 0, d.stderr
        assert f"{LOGS_EACH} loaded, 0 already in the archive, 0 failed" in d.stdout
    _check_archive(root, PROCESSES * LOGS_EACH)


@pytest.mark.slow
def test_four_processes_load_the_same_logs(template: ArchiveTemplate, tmp_path: Path):
    """The crew copies the same harvest from four machines: each log lands once, the other
    loads report it as already in the archive, and nothing fails."""
    root = template.clone(tmp_path / "archive")
    write_logs(tmp_path / "harvest", LOGS_EACH, 1500)
    done = _start_all([cli_argv(root, "load", "fixes", "--workers", "1",
                                str(tmp_path / "harvest"))] * PROCESSES)
    for d in done:
        assert d.returncode == 0, d.stderr
    loaded = sum(int(d.stdout.strip().splitlines()[-1].split()[0]) for d in done)
    assert loaded == LOGS_EACH
    _check_archive(root, LOGS_EACH)
