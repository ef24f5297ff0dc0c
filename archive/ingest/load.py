"""Loading raw fix logs into the archive: parse, name the objects, record in batches.

Every file is read once: its bytes are hashed and copied beside the parse
(:mod:`archive.ingest.parse_file`, several files in parallel, one process each), which
leaves finished temporary objects (the raw copy, the fixes and rejects Parquet tables).
The loader then names them (a rename into the object store) and records each file in a
transaction that registers its objects, inserts its ``raw_files`` row and appends its
``load.fixes`` ledger event (:mod:`archive.ingest.recording`). Many files share one
transaction: the evidence stays per file (a row and a ledger event each) and an
interruption leaves every file either fully recorded or not at all (its objects, at most,
unreferenced, which ``verify`` lists as dangling).

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
import os
import re
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

from sqlalchemy import select

from archive.errors import UsageError
from archive.ingest.formats import log_format
from archive.ingest.paths import expand_paths, node_for
from archive.ingest.recording import FileOutcome, Recorder, discard_result
from archive.progress import NoProgress, Progress
from archive.store.archive import Archive
from archive.store.models import InputVersion, RawFile


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
    # system once per batch, before the catalog records it (recording.Recorder.flush).
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
    recorder = Recorder(arc, survey_id, fmt, profile_hash, date, node_pattern, deferred)
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
                                discard_result(res)
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
