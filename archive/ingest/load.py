"""Loading raw fix logs into the archive: parse, name the objects, record in batches.

Every file is read once: its bytes are hashed and copied beside the parse
(:mod:`archive.ingest.parse_file`, several files in parallel, one process each), which
leaves finished temporary objects (the raw copy, the fixes and rejects Parquet tables).
The loader then names them (a rename into the object store) and records each file in a
transaction that registers its objects, inserts its ``raw_files`` row and appends its
``load.fixes`` ledger event. Many files share one transaction (1, 2, 4, ... up to
:data:`BATCH_FILES`, or what came in :data:`BATCH_SECONDS`): the evidence stays per file (a
row and a ledger event each) and an interruption leaves every file either fully recorded
or not at all (its objects, at most, unreferenced, which ``verify`` lists as dangling).

A file whose bytes the survey already holds is reported as ``already`` (without being
parsed when its hash is known first). A file that is not a fix log fails on its own with a
message naming it; the other files still load. Its raw bytes stay accounted for: they are
registered (kind ``raw-failed``) with a ``load.fixes.failed`` event giving the file name,
node, hash, error and the line counts read, so ``verify`` does not take them for the
leftovers of an interrupted write. An object store that refuses a write (disk full,
read-only) stops the load: what was recorded stays, the rest is removed.

Dates are checked for the GPS week rollover against the deployment window of each file's
node in the current deployment log (else the survey's), see :mod:`archive.ingest.rollover`.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import os
import re
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import select, update

from archive.errors import StorageError, UsageError
from archive.ingest.formats import log_format
from archive.ingest.paths import expand_paths, node_for
from archive.progress import NoProgress, Progress
from archive.store.archive import Archive
from archive.store.models import InputVersion, LedgerHead, RawFile, StoredObject, utcnow

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


@dataclass
class LoadReport:
    """The outcome of :func:`load_fix_files`, one entry per file, in the order given."""

    files: list[FileOutcome]

    @property
    def loaded(self) -> list[FileOutcome]:
        return [f for f in self.files if f.status == "loaded"]

    @property
    def already(self) -> list[FileOutcome]:
        return [f for f in self.files if f.status == "already"]

    @property
    def failed(self) -> list[FileOutcome]:
        return [f for f in self.files if f.status == "failed"]

    @property
    def ok(self) -> bool:
        return not self.failed

    def as_dict(self) -> dict[str, Any]:
        return {"ok": self.ok, "loaded": len(self.loaded), "already": len(self.already),
                "failed": len(self.failed), "files": [asdict(f) for f in self.files]}


def _known_hashes(arc: Archive, survey_id: int) -> frozenset[str]:
    with arc.session() as s:
        return frozenset(s.scalars(select(RawFile.object_hash).where(
            RawFile.survey_id == survey_id)))


def reference_windows(arc: Archive, survey_id: int
                      ) -> tuple[dict[str, tuple[dt.datetime, dt.datetime]],
                                 tuple[dt.datetime, dt.datetime] | None]:
    """Time windows logs are expected in, from the current deployment log: per node
    (first deployment to last retrieval, or last deployment when not retrieved) and for the
    whole survey. Empty without a deployment log."""
    with arc.session() as s:
        v = s.scalars(select(InputVersion).where(
            InputVersion.survey_id == survey_id, InputVersion.kind == "deployments")
            .order_by(InputVersion.version.desc()).limit(1)).first()
    if v is None or v.table_hash is None:
        return {}, None
    t = arc.objects.read_table(v.table_hash, columns=["node", "deployed", "retrieved"])
    if t.num_rows == 0:
        return {}, None
    nodes = t.column("node").to_pylist()
    dep = t.column("deployed").to_pylist()
    ret = t.column("retrieved").to_pylist()
    per: dict[str, list[dt.datetime]] = {}
    for n, a, b in zip(nodes, dep, ret, strict=True):
        lo, hi = per.get(n, [a, b or a])
        per[n] = [min(lo, a), max(hi, b or a)]
    windows = {n: (w[0], w[1]) for n, w in per.items()}
    survey = (min(w[0] for w in windows.values()), max(w[1] for w in windows.values()))
    return windows, survey


def load_fix_files(arc: Archive, survey_id: int, paths: list[str | Path], *,
                   fmt: str | None = None, profile_path: str | Path | None = None,
                   node: str | None = None, node_pattern: str | None = None,
                   date: dt.date | None = None, workers: int | None = None,
                   progress: Progress | None = None) -> LoadReport:
    """Load raw fix logs into survey ``survey_id`` (see the module docstring).

    ``workers`` parsing processes (default one per core; with one, files are parsed in this
    process); processes started beforehand by :func:`archive.ingest.workers.prestart` are
    used instead.
    """
    from archive.ingest import workers as _workers
    from archive.ingest.parse_file import parse_file, parse_files, set_known

    workers_wanted, workers = workers, _workers

    progress = progress or NoProgress()
    fmt = fmt or ("delimited" if profile_path else "nmea")
    spec = log_format(fmt)  # UsageError naming the registered formats
    if node and node_pattern:
        raise UsageError("give either a node serial or a node pattern, not both")
    arc.require_writable("loading fix logs")
    if spec.needs_profile:
        if not profile_path:
            raise UsageError(f"{fmt} logs need a column profile",
                             hint="pass --profile FILE (see docs/ingest.md)")
        from archive.ingest.profile import load_profile

        load_profile(profile_path)  # refuse a bad profile before touching anything
    try:
        pattern = re.compile(node_pattern) if node_pattern else None
    except re.error as exc:
        raise UsageError(f"the node pattern {node_pattern!r} is not a regular expression: {exc}"
                         ) from None
    files = expand_paths(paths)
    outcomes = [FileOutcome(str(p), "pending") for p in files]
    sizes = [p.stat().st_size for p in files]
    progress.start(sum(sizes), "bytes", "load fixes")
    profile_hash = arc.objects.put_file(profile_path)[0] if spec.needs_profile else None
    windows, survey_window = reference_windows(arc, survey_id)
    known = _known_hashes(arc, survey_id)
    set_known(known)
    tasks: list[tuple[int, dict[str, Any]]] = []
    # Files read whole are not flushed one by one: the recorder flushes the store's file
    # system once per batch, before the catalog records it (see _Recorder.flush).
    deferred = arc.objects.can_sync_filesystem()
    for i, p in enumerate(files):
        o = outcomes[i]
        o.size = sizes[i]
        try:
            o.node = node_for(p, node, pattern)
        except UsageError as exc:
            o.status, o.error = "failed", str(exc)
            progress.advance(o.size, p.name)
            continue
        ref, ref_text = None, None
        if o.node in windows:
            ref, ref_text = windows[o.node], f"the deployments of node {o.node}"
        elif survey_window is not None:
            ref, ref_text = survey_window, "the survey's deployments"
        tasks.append((i, {"objects_url": arc.objects_url, "path": str(p), "format": fmt,
                          "node": o.node, "date": date.isoformat() if date else None,
                          "profile_path": str(profile_path) if profile_path else None,
                          "reference": [t.isoformat() for t in ref] if ref else None,
                          "reference_text": ref_text, "defer_sync": deferred}))
    recorder = _Recorder(arc, survey_id, fmt, profile_hash, date, node_pattern, deferred)
    pool, n_workers = workers.take()
    if pool is None:
        n_workers = max(1, min(workers_wanted or os.cpu_count() or 1, len(tasks)))
    try:
        if pool is None and n_workers == 1:
            for i, task in tasks:
                recorder.add(outcomes[i], parse_file(task))
                progress.advance(outcomes[i].size, Path(outcomes[i].path).name)
        else:
            known_path = _known_file(known)
            for _, task in tasks:
                task["known_path"] = known_path
            if pool is None:
                pool = workers.pool(n_workers)
            try:
                futures = [(group, pool.submit(parse_files, [t for _, t in group]))
                           for group in _groups(tasks, sizes, n_workers)]
                try:
                    for group, fut in futures:
                        for (i, _), res in zip(group, fut.result(), strict=True):
                            recorder.add(outcomes[i], res)
                            progress.advance(outcomes[i].size, Path(outcomes[i].path).name)
                except BaseException:
                    pool.shutdown(wait=True, cancel_futures=True)
                    for _, fut in futures:  # what the others left behind
                        if fut.done() and not fut.cancelled() and fut.exception() is None:
                            for res in fut.result():
                                _discard(res)
                    raise
            finally:
                pool.shutdown(wait=True)
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(known_path)
        recorder.flush()
    except BaseException:
        recorder.discard()
        raise
    finally:
        set_known(frozenset())
    progress.close()
    return LoadReport(outcomes)


GROUP_FILES = 16  # most files given to a parsing process at once
GROUP_BYTES = 16 << 20


def _groups(tasks: list[tuple[int, dict[str, Any]]], sizes: list[int], workers: int
            ) -> list[list[tuple[int, dict[str, Any]]]]:
    """The tasks in order, in runs of consecutive small files handed to a parsing process
    together (a harvest is thousands of files of a few hundred kB: one at a time, the
    round trips to the processes cost more than some of the parses, and the processes
    wait on the loader between files). At most :data:`GROUP_FILES` files and
    :data:`GROUP_BYTES` a run, and at least four runs per process while there are files
    enough (the processes share the work); a file of :data:`GROUP_BYTES` or more alone."""
    per = max(1, min(GROUP_FILES, len(tasks) // (4 * max(1, workers))))
    out: list[list[tuple[int, dict[str, Any]]]] = []
    run: list[tuple[int, dict[str, Any]]] = []
    size = 0
    for i, task in tasks:
        if run and (len(run) >= per or size + sizes[i] > GROUP_BYTES):
            out.append(run)
            run, size = [], 0
        run.append((i, task))
        size += sizes[i]
    if run:
        out.append(run)
    return out


def _known_file(known: frozenset[str]) -> str:
    """The raw hashes already loaded, one per line, for the parsing processes (a file of
    the system's temporary folder, removed after the load)."""
    import tempfile

    fd, name = tempfile.mkstemp(prefix="nodekeep-known-")
    with os.fdopen(fd, "w", encoding="ascii") as fh:
        fh.write("".join(h + "\n" for h in sorted(known)))
    return name


def _objects(res: dict[str, Any]) -> list[dict[str, Any]]:
    return [o for o in (res.get("raw"), res.get("fixes"), res.get("rejects_obj")) if o]


def _discard(res: dict[str, Any]) -> None:
    """Remove the temporary files of a result that will not be recorded."""
    for o in _objects(res):
        if o.get("tmp"):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(o["tmp"])


class _Recorder:
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
            _discard(res)
            reason = res["error"].split(": ")[-1].split(" (")[0]
            raise StorageError(f"cannot write to the object store {self.arc.objects_url}: "
                               f"{reason}",
                               hint="this write was not recorded; free space or make the "
                                    "folder writable and run the command again")
        raw = res.get("raw") or {}
        o.raw_hash = raw.get("hash")
        o.size = raw.get("size", o.size)
        if res.get("status") == "already" or (o.raw_hash and o.raw_hash in self.in_call):
            _discard(res)
            o.status = "already"
            return
        if o.raw_hash:
            self.in_call.add(o.raw_hash)
        if not res["ok"] and not raw:
            _discard(res)
            o.status, o.error = "failed", res["error"]
            return
        if self.deferred:  # named in flush(), once their bytes are durable
            self.pending.extend(obj for obj in _objects(res) if obj.get("tmp"))
        else:
            try:
                self._adopt([obj for obj in _objects(res) if obj.get("tmp")])
            except BaseException:
                _discard(res)
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
