"""Recording parsed logs: their objects named in the store and their catalog rows and ledger
events written in batched transactions (the second half of
:func:`archive.ingest.load.load_fix_files`).

Many files share one transaction (1, 2, 4, ... up to :data:`BATCH_FILES`, or what came in
:data:`BATCH_SECONDS`): the evidence stays per file (a ``raw_files`` row and a
``load.fixes`` ledger event each, in file order) and an interruption leaves every file
either fully recorded or not at all (its objects, at most, unreferenced, which ``verify``
lists as dangling). With deferred durability (small logs on a local store on Linux) the
parsing processes did not flush their objects: the file system is flushed once before the
batch's objects are named and once after, then the transaction commits, so a name never
points at bytes a power loss could lose. A file that did not parse keeps its raw bytes
(kind ``raw-failed``) and gets a ``load.fixes.failed`` event.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import select, update

from archive.errors import StorageError
from archive.ingest.formats import log_format
from archive.store.archive import Archive
from archive.store.models import LedgerHead, RawFile, StoredObject, utcnow

BATCH_FILES = 64  # most files per transaction; the first batches are 1, 2, 4, ... files
BATCH_SECONDS = 2.0


@dataclass
class FileOutcome:
    """What happened to one file: ``loaded``, ``already`` (same bytes loaded before) or
    ``failed`` (with ``error``)."""

    path: str
    status: str
    node: str | None = None
    raw_hash: str | None = None
    size: int = 0
    raw_file_id: int | None = None
    error: str | None = None
    n_lines: int = 0
    n_accepted: int = 0
    n_rejected: int = 0
    n_ignored: int = 0
    n_fixes: int = 0
    n_valid: int = 0
    t_first: dt.datetime | None = None
    t_last: dt.datetime | None = None
    rejects: dict[str, int] = field(default_factory=dict)
    ignored: dict[str, int] = field(default_factory=dict)
    notes: list[dict[str, Any]] = field(default_factory=list)


def _objects(res: dict[str, Any]) -> list[dict[str, Any]]:
    return [o for o in (res.get("raw"), res.get("fixes"), res.get("rejects_obj")) if o]


def discard_result(res: dict[str, Any]) -> None:
    """Remove the temporary files of a result that will not be recorded."""
    for o in _objects(res):
        if o.get("tmp"):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(o["tmp"])


class Recorder:
    """Names the objects of parsed files and records the files in batched transactions."""

    def __init__(self, arc: Archive, survey_id: int, fmt: str, profile_hash: str | None,
                 date: dt.date | None, node_pattern: str | None,
                 deferred: bool = False) -> None:
        self.arc, self.survey_id, self.fmt = arc, survey_id, fmt
        self.deferred = deferred  # the parsing processes left the flushing to flush()
        self.profile_hash, self.date, self.node_pattern = profile_hash, date, node_pattern
        self.batch: list[tuple[FileOutcome, dict[str, Any]]] = []
        self.adopted: list[str] = []
        self.pending: list[dict[str, Any]] = []  # objects to name at the next flush
        self.in_call: set[str] = set()
        self.started = time.monotonic()
        self.limit = 1  # files of the next transaction: doubles up to BATCH_FILES
        self.profile_size: int | None = None

    def add(self, o: FileOutcome, res: dict[str, Any]) -> None:
        """Take the result of one file (in the order the files were given)."""
        if res.get("fatal"):
            discard_result(res)
            reason = res["error"].split(": ")[-1].split(" (")[0]
            raise StorageError(f"cannot write to the object store {self.arc.objects_url}: "
                               f"{reason}",
                               hint="this write was not recorded; free space or make the "
                                    "folder writable and run the command again")
        raw = res.get("raw") or {}
        o.raw_hash = raw.get("hash")
        o.size = raw.get("size", o.size)
        if res.get("status") == "already" or (o.raw_hash and o.raw_hash in self.in_call):
            discard_result(res)
            o.status = "already"
            return
        if o.raw_hash:
            self.in_call.add(o.raw_hash)
        if not res["ok"] and not raw:
            discard_result(res)
            o.status, o.error = "failed", res["error"]
            return
        if self.deferred:  # named in flush(), once their bytes are durable
            self.pending.extend(obj for obj in _objects(res) if obj.get("tmp"))
        else:
            try:
                self._adopt([obj for obj in _objects(res) if obj.get("tmp")])
            except BaseException:
                discard_result(res)
                raise
        self.batch.append((o, res))
        if len(self.batch) >= self.limit or time.monotonic() - self.started > BATCH_SECONDS:
            self.flush()
            self.limit = min(2 * self.limit, BATCH_FILES)

    def _adopt(self, objs: list[dict[str, Any]]) -> None:
        """Name finished temporary objects (a rename each; their folders flushed later)."""
        for obj in objs:
            tmp, obj["tmp"] = obj["tmp"], None
            self.arc.objects.adopt(tmp, obj["hash"], obj["size"], sync_dir=False)
            self.adopted.append(obj["hash"])

    def discard(self) -> None:
        """Forget the files not recorded yet (their named objects stay unreferenced, their
        temporary files not named yet are removed)."""
        self.batch = []
        for obj in self.pending:
            if obj.get("tmp"):
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(obj["tmp"])
        self.pending = []

    def flush(self) -> None:
        """Record the files taken so far, in one transaction."""
        self.started = time.monotonic()
        if not self.batch:
            return
        arc = self.arc
        # the batch's objects (and their folders) made durable before the catalog names them
        if self.deferred:
            # bytes first, then names: a name never points at bytes a power loss could lose
            arc.objects.sync_filesystem()
            pending, self.pending = self.pending, []
            try:
                self._adopt(pending)
            except BaseException:
                self.pending = [obj for obj in pending if obj.get("tmp")]
                raise
            arc.objects.sync_filesystem()
        else:
            arc.objects.sync_folders(self.adopted)
        self.adopted = []
        batch, self.batch = self.batch, []
        done: list[tuple[FileOutcome, str, int | None]] = []
        with arc.transaction() as tx:
            # Another process may have loaded the same bytes since this one looked: take the
            # writers' lock (the ledger head row) and look again inside the transaction.
            tx.execute(select(LedgerHead).where(LedgerHead.id == 1).with_for_update())
            hashes = [o.raw_hash for o, _ in batch]
            prior = dict(tx.execute(select(RawFile.object_hash, RawFile.id).where(
                RawFile.survey_id == self.survey_id, RawFile.object_hash.in_(hashes))).all())
            arc.register_objects(tx, [item for o, res in batch if o.raw_hash not in prior
                                      and res["ok"] for item in self._objects_of(res)])
            # raw bytes kept from an earlier attempt that failed now belong to a loaded log
            loaded_raw = [o.raw_hash for o, res in batch if o.raw_hash not in prior and res["ok"]]
            if loaded_raw:
                tx.execute(update(StoredObject).where(StoredObject.hash.in_(loaded_raw),
                                                      StoredObject.kind == "raw-failed")
                           .values(kind="raw"))
            events: list[tuple[str, dict[str, Any], int | None, list[Any] | None]] = []
            rows: list[tuple[FileOutcome, RawFile]] = []
            for o, res in batch:
                if o.raw_hash in prior:
                    done.append((o, "already", prior[o.raw_hash]))
                elif res["ok"]:
                    row, event = self._record(o, res)
                    rows.append((o, row))
                    events.append(event)
                else:
                    events.append(self._record_failure(tx, o, res))
                    done.append((o, "failed", None))
            # the batch's rows in one flush, then its events in one append, in file order
            tx.add_all([row for _, row in rows])
            tx.flush()
            arc.log_many(tx, events)
            done.extend((o, "loaded", row.id) for o, row in rows)
        for o, status, row_id in done:
            o.status, o.raw_file_id = status, row_id

    def _objects_of(self, res: dict[str, Any]) -> list[tuple[str, int, str]]:
        """The objects a parsed file's row refers to: (hash, size, kind)."""
        out = [(res["raw"]["hash"], res["raw"]["size"], "raw"),
               (res["fixes"]["hash"], res["fixes"]["size"], "fixes")]
        if res.get("rejects_obj"):
            out.append((res["rejects_obj"]["hash"], res["rejects_obj"]["size"], "rejects"))
        if self.profile_hash:
            out.append((self.profile_hash, self._profile_size(), "profile"))
        return out

    def _profile_size(self) -> int:
        if self.profile_size is None:
            self.profile_size = self.arc.objects.size(self.profile_hash)
        return self.profile_size

    def _record(self, o: FileOutcome, res: dict[str, Any]
                ) -> tuple[RawFile, tuple[str, dict[str, Any], int | None, list[Any] | None]]:
        """The ``raw_files`` row of a parsed file and its ledger event (recorded by
        :meth:`flush` with the rest of the batch)."""
        arc = self.arc
        for k in ("n_lines", "n_accepted", "n_rejected", "n_ignored", "n_fixes", "n_valid",
                  "t_first", "t_last", "rejects", "ignored", "notes"):
            setattr(o, k, res.get(k) or ({} if k in ("rejects", "ignored") else
                                         [] if k == "notes" else res.get(k)))
        fixes, rejects = res["fixes"], res.get("rejects_obj")
        details = {"rejects": res["rejects"], "date": self.date.isoformat() if self.date
                   else None, "node_pattern": self.node_pattern,
                   "ignored": res.get("ignored") or {}, "notes": res.get("notes") or [],
                   "no_quality": int(res.get("n_no_quality") or 0)}
        row = RawFile(
            survey_id=self.survey_id, object_hash=o.raw_hash, original_name=o.path,
            node=o.node, format=self.fmt, profile_hash=self.profile_hash, size=o.size,
            received_at=utcnow(), received_by=arc.actor, parser=log_format(self.fmt).parser,
            n_lines=o.n_lines, n_accepted=o.n_accepted, n_rejected=o.n_rejected,
            n_ignored=o.n_ignored, n_fixes=o.n_fixes, n_valid=o.n_valid, t_first=o.t_first,
            t_last=o.t_last, fixes_hash=fixes["hash"],
            rejects_hash=rejects["hash"] if rejects else None,
            details=json.dumps(details, sort_keys=True),
        )
        event = ("load.fixes", {"raw": o.raw_hash, "name": Path(o.path).name,
                                "node": o.node, "format": self.fmt, "fixes": fixes["hash"],
                                "rejects": rejects["hash"] if rejects else None,
                                "n_fixes": o.n_fixes, "n_rejected": o.n_rejected},
                 self.survey_id, [row])
        return row, event

    def _record_failure(self, tx, o: FileOutcome, res: dict[str, Any]
                        ) -> tuple[str, dict[str, Any], int | None, None]:
        """A file that did not parse: its raw bytes registered, and its ledger event."""
        arc = self.arc
        o.error = res["error"]
        counts = res.get("counts") or {}
        for k in ("n_lines", "n_accepted", "n_rejected", "n_ignored", "n_fixes", "n_valid"):
            setattr(o, k, int(counts.get(k, 0)))
        o.rejects = dict(res.get("rejects") or {})
        arc.register_object(tx, o.raw_hash, o.size, "raw-failed")
        if self.profile_hash:
            arc.register_object(tx, self.profile_hash, arc.objects.size(self.profile_hash),
                                "profile")
        return ("load.fixes.failed",
                {"raw": o.raw_hash, "name": Path(o.path).name, "node": o.node,
                 "format": self.fmt, "profile": self.profile_hash, "size": o.size,
                 "error": o.error, "counts": counts or None, "rejects": o.rejects},
                self.survey_id, None)
