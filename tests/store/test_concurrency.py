"""Concurrent writers keep one unbroken ledger chain."""

from __future__ import annotations

import multiprocessing as mp

from sqlalchemy import func, select

from archive.store.archive import Archive
from archive.store.models import LedgerEvent
from archive.store.verify import verify_archive


def _writer(root: str, n: int, tag: int) -> None:
    arc = Archive.open(root, actor=f"writer-{tag}")
    try:
        for i in range(n):
            h, size = arc.objects.put_bytes(f"{tag}-{i}".encode())
            with arc.transaction() as tx:
                arc.register_object(tx, h, size, "test")
                arc.log(tx, "test.write", {"h": h})
    finally:
        arc.close()


def test_four_processes_append_without_forking(any_arc: Archive):
    ctx = mp.get_context("spawn")
    procs = [ctx.Process(target=_writer, args=(str(any_arc.root), 10, t)) for t in range(4)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(120)
        assert p.exitcode == 0
    with any_arc.session() as s:
        n = s.scalar(select(func.count()).select_from(LedgerEvent).where(
            LedgerEvent.action == "test.write"))
    assert n == 40
    report = verify_archive(any_arc)
    assert report.ok, report.problems
    assert report.objects_checked == 40
