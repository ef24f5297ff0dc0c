"""A large NMEA log read once from disk, three things at a time.

While the parsing thread streams through the file chunk by chunk, a second thread reads it
too (from the page cache), hashing it and writing the raw copy, and a third writes the fix
tables to Parquet. Every fix carries the raw file's hash, so the tables wait for it in a
queue of bounded size (a few million rows; the hash is ready long before that on any disk
this runs on); the memory used stays bounded whatever the size of the log. The compiled
scanner and the Parquet and hashing code release the interpreter lock, so the threads use
the cores of the machine.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import os
import queue
import threading
from typing import Any

import numpy as np

from archive.ingest import workers
from archive.ingest.parse_file import (
    PENDING_ROWS,
    TABLE_OPTIONS,
    _guard,
    _known,
    _not_a_log,
    _reference,
    _Storage,
    _table_object,
)
from archive.store.objects import STORAGE_ERRNOS


class _HashCopy(threading.Thread):
    """Reads a file once more, hashing it and writing its copy (the raw object to be)."""

    def __init__(self, path: str, tmp: str, sync: bool) -> None:
        super().__init__(daemon=True)
        self.path, self.tmp, self.sync = path, tmp, sync
        self.hash: str | None = None
        self.size = 0
        self.error: BaseException | None = None
        self.done = threading.Event()

    def run(self) -> None:
        try:
            digest = hashlib.sha256()
            with open(self.path, "rb") as src, open(self.tmp, "wb") as dst:
                while block := src.read(8 << 20):
                    digest.update(block)
                    dst.write(block)
                    self.size += len(block)
                if self.sync:
                    dst.flush()
                    os.fsync(dst.fileno())
            self.hash = digest.hexdigest()
        except BaseException as exc:  # noqa: BLE001 - handed to the parsing thread
            self.error = exc
        finally:
            self.done.set()

    def result(self) -> str:
        """The hash, once the thread is done (its error re-raised)."""
        self.done.wait()
        if self.error is not None:
            raise self.error
        assert self.hash is not None
        return self.hash


class _Writer(threading.Thread):
    """Writes fix tables to a Parquet file in order, off the parsing thread."""

    def __init__(self, path: str) -> None:
        import pyarrow.parquet as pq

        from archive.ingest.schema import FIX_STORAGE_SCHEMA
        super().__init__(daemon=True)
        self.writer = pq.ParquetWriter(path, FIX_STORAGE_SCHEMA, **TABLE_OPTIONS)
        self.queue: queue.Queue = queue.Queue(maxsize=4)
        self.error: BaseException | None = None

    def run(self) -> None:
        try:
            while (table := self.queue.get()) is not None:
                if self.error is None:
                    self.writer.write_table(table)
        except BaseException as exc:  # noqa: BLE001 - handed to the parsing thread
            self.error = exc
            while self.queue.get() is not None:
                pass
        finally:
            self.writer.close()

    def finish(self) -> None:
        """Write what is queued and close the file (its error re-raised)."""
        self.queue.put(None)
        self.join()
        if self.error is not None:
            raise self.error


def _with_hash(table, raw_hash: str):
    from archive.ingest.arrow_build import constant_dictionary
    from archive.ingest.schema import FIX_STORAGE_SCHEMA

    i = FIX_STORAGE_SCHEMA.get_field_index("raw_hash")
    return table.set_column(i, FIX_STORAGE_SCHEMA.field("raw_hash"),
                            constant_dictionary(raw_hash, table.num_rows))


def _fsync_file(path: str) -> None:
    with open(path, "rb") as fh:
        os.fsync(fh.fileno())


def _hash_file(path: str) -> tuple[str, int]:
    digest = hashlib.sha256()
    size = 0
    with open(path, "rb") as fh:
        while block := fh.read(8 << 20):
            digest.update(block)
            size += len(block)
    return digest.hexdigest(), size


def parse_large(task: dict[str, Any], store, seen: dict[str, Any],
                written: list[str]) -> dict[str, Any]:
    """Parse a large NMEA log into temporary objects (see the module docstring); the
    result is that of :func:`archive.ingest.parse_file.parse_file`."""
    path = task["path"]
    sync = task.get("sync", True)
    raw_tmp = str(_guard(store.temporary))
    written.append(raw_tmp)
    copier = _HashCopy(path, raw_tmp, sync)
    copier.start()
    workers.ready()  # the copy runs while a new process loads the reader
    fixes_tmp = str(_guard(store.temporary))
    written.append(fixes_tmp)
    writer = _Writer(fixes_tmp)
    writer.start()
    try:
        return _stream(task, store, seen, written, copier, writer, raw_tmp, fixes_tmp)
    except OSError as exc:
        if exc.errno in STORAGE_ERRNOS:
            raise _Storage(f"cannot write to the object store: {exc.strerror}") from exc
        raise


def _stream(task: dict[str, Any], store, seen: dict[str, Any], written: list[str],
            copier: _HashCopy, writer: _Writer, raw_tmp: str, fixes_tmp: str
            ) -> dict[str, Any]:
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    from archive.ingest.nmea import file_chunks_parallel, merge_days
    from archive.ingest.result import sort_fixes
    from archive.ingest.rollover import apply_plan, plan_rollover, reference_days, refused_rejects

    path = task["path"]
    sync = task.get("sync", True)
    counts = {"n_lines": 0, "n_accepted": 0, "n_rejected": 0, "n_ignored": 0, "n_fixes": 0,
              "n_valid": 0}
    n_no_quality = 0
    reasons: dict[str, int] = {}
    ignored: dict[str, int] = {}
    days: dict[int, list[int]] = {}
    rejects: list[pa.Table] = []
    pending: list[pa.Table] = []
    pending_rows = 0
    raw_hash: str | None = None
    in_order = True
    t_first_us = t_last_us = None
    date = dt.date.fromisoformat(task["date"]) if task.get("date") else None
    try:
        for ch in file_chunks_parallel(path, node=task["node"], raw_hash="", date=date):
            for k in ("n_lines", "n_accepted", "n_rejected", "n_ignored"):
                counts[k] += getattr(ch, k)
            for k, v in ch.ignored.items():
                ignored[k] = ignored.get(k, 0) + v
            merge_days(days, ch.days)
            if ch.rejects.num_rows:
                rejects.append(ch.rejects)
                for d in pc.value_counts(ch.rejects.column("reason")).to_pylist():
                    reasons[d["values"]] = reasons.get(d["values"], 0) + int(d["counts"])
                if sum(t.num_rows for t in rejects) > 200_000:
                    rejects = [pa.concat_tables(rejects).combine_chunks()]
            if ch.fixes.num_rows:
                counts["n_fixes"] += ch.fixes.num_rows
                counts["n_valid"] += int(pc.sum(ch.fixes.column("valid")).as_py() or 0)
                n_no_quality += _true_count(ch.fixes.column("no_quality"))
                mm = pc.min_max(pc.cast(ch.fixes.column("time"), pa.int64())).as_py()
                if t_last_us is not None and mm["min"] < t_last_us:
                    in_order = False
                t_first_us = mm["min"] if t_first_us is None else min(t_first_us, mm["min"])
                t_last_us = mm["max"] if t_last_us is None else max(t_last_us, mm["max"])
                pending.append(ch.fixes)
                pending_rows += ch.fixes.num_rows
            if raw_hash is None and (copier.done.is_set() or pending_rows > PENDING_ROWS):
                raw_hash = copier.result()
                if _known(raw_hash):
                    break
            if raw_hash is not None:
                for t in pending:
                    writer.queue.put(_with_hash(t, raw_hash))
                pending, pending_rows = [], 0
        if raw_hash is None:
            raw_hash = copier.result()
        if not _known(raw_hash):
            for t in pending:
                writer.queue.put(_with_hash(t, raw_hash))
    finally:
        writer.finish()
        copier.done.wait()
    raw = {"tmp": raw_tmp, "hash": raw_hash, "size": copier.size}
    if _known(raw_hash):
        return {"ok": True, "status": "already", "raw": {**raw, "tmp": None}}
    if store.exists(raw_hash):
        os.unlink(raw_tmp)
        raw["tmp"] = None
    seen["raw"] = raw
    seen["counts"] = dict(counts)
    seen["rejects"] = dict(sorted(reasons.items()))
    if counts["n_fixes"] == 0:
        raise _not_a_log(path, counts["n_lines"], reasons, task["format"])
    notes: list[dict[str, Any]] = []
    plan = plan_rollover(days, reference_days(_reference(task)),
                         task.get("reference_text") or "the survey")
    if plan.changes or not in_order:
        table = pq.read_table(fixes_tmp)
        if plan.changes:
            table, lines = apply_plan(table, plan)
            data = np.memmap(path, dtype=np.uint8, mode="r")
            extra = refused_rejects(lines, data)
            if extra.num_rows:
                rejects.append(extra)
                reasons["rollover"] = reasons.get("rollover", 0) + extra.num_rows
            n = int(lines.size)
            counts["n_fixes"] -= n
            counts["n_accepted"] -= n
            counts["n_rejected"] += n
            counts["n_valid"] = int(pc.sum(table.column("valid")).as_py() or 0)
            n_no_quality = _true_count(table.column("no_quality"))
            notes = plan.notes
            if counts["n_fixes"] == 0:
                raise _not_a_log(path, counts["n_lines"], reasons, task["format"])
            mm = pc.min_max(pc.cast(table.column("time"), pa.int64())).as_py()
            t_first_us, t_last_us = mm["min"], mm["max"]
        else:
            table = sort_fixes(table)
        _guard(pq.write_table, table, fixes_tmp, **TABLE_OPTIONS)
    if sync:
        _fsync_file(fixes_tmp)
    fh, fsize = _hash_file(fixes_tmp)
    fixes = {"tmp": fixes_tmp, "hash": fh, "size": fsize}
    rejects_obj = None
    if rejects:
        rtable = pa.concat_tables(rejects).combine_chunks()
        if plan.undecided:
            rtable = rtable.sort_by("raw_line")
        rejects_obj = _guard(_table_object, store, rtable, sync)
        written.append(rejects_obj["tmp"])
    epoch = dt.datetime(1970, 1, 1, tzinfo=dt.UTC)
    return {"ok": True, "status": "parsed", "raw": raw, "fixes": fixes,
            "rejects_obj": rejects_obj, **counts,
            "t_first": epoch + dt.timedelta(microseconds=t_first_us),
            "t_last": epoch + dt.timedelta(microseconds=t_last_us),
            "rejects": dict(sorted(reasons.items())), "ignored": dict(sorted(ignored.items())),
            "notes": notes, "n_no_quality": n_no_quality}


def _true_count(column) -> int:
    import pyarrow as pa
    import pyarrow.compute as pc

    return int(pc.sum(column.cast(pa.int64())).as_py() or 0)
