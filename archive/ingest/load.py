"""Loading raw fix logs into the archive: raw bytes first, then parse, then one transaction.

For every file: the raw bytes are stored as an object (so they are kept even when nothing
else works); a raw file already loaded into the survey (same hash) is reported and skipped;
the file is parsed (several files in parallel, one process each) into a fixes and a rejects
Parquet object; then one transaction registers the objects, inserts the ``raw_files`` row and
appends the ``load.fixes`` ledger event. A file that is not a fix log fails on its own with
a message naming it; the other files still load. Its raw bytes stay accounted for: one
transaction registers them (kind ``raw-failed``) and appends a ``load.fixes.failed`` event
with the file name, node, hash, error and the line counts read, so ``verify`` does not take
them for the leftovers of an interrupted write.
"""

from __future__ import annotations

import datetime as dt
import glob
import json
import multiprocessing as mp
import os
import re
from concurrent.futures import ProcessPoolExecutor
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import select

from archive.errors import UsageError
from archive.ingest.parse_file import parse_file
from archive.progress import NoProgress, Progress
from archive.store.archive import Archive
from archive.store.models import LedgerHead, RawFile, utcnow

FORMATS = ("nmea", "delimited")
PARSERS = {"nmea": "nmea-1", "delimited": "delimited-1"}


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


def expand_paths(paths: list[str | Path]) -> list[Path]:
    """Files named, files under folders (recursively, hidden ones skipped) and glob matches,
    in a stable order without repeats. A name that matches nothing is a usage error."""
    out: list[Path] = []
    for p in paths:
        p = Path(p)
        if p.is_dir():
            found = sorted(x for x in p.rglob("*") if x.is_file()
                           and not any(part.startswith(".") for part in x.relative_to(p).parts))
        elif p.is_file():
            found = [p]
        else:
            found = sorted(Path(x) for x in glob.glob(str(p), recursive=True) if Path(x).is_file())
        if not found:
            raise UsageError(f"{p}: no such file, folder or matching file",
                             hint="check the path or quote the glob pattern")
        out.extend(found)
    seen: set[Path] = set()
    unique = []
    for f in out:
        key = f.resolve()
        if key not in seen:
            seen.add(key)
            unique.append(f)
    return unique


def node_for(path: Path, node: str | None, pattern: re.Pattern[str] | None) -> str:
    """The node serial of a file: ``node``, else the pattern's ``node`` group (or first group,
    or whole match) searched in the file name, else the file stem."""
    if node:
        return node
    if pattern is None:
        return path.stem
    m = pattern.search(path.name)
    if not m:
        raise UsageError(f"{path}: the node pattern {pattern.pattern!r} does not match the "
                         "file name", hint="fix --node-pattern or give --node")
    if "node" in pattern.groupindex:
        return m.group("node")
    return m.group(1) if pattern.groups else m.group(0)


def _pool_context() -> mp.context.BaseContext:
    methods = mp.get_all_start_methods()
    return mp.get_context("fork" if "fork" in methods else "spawn")


def load_fix_files(arc: Archive, survey_id: int, paths: list[str | Path], *,
                   fmt: str | None = None, profile_path: str | Path | None = None,
                   node: str | None = None, node_pattern: str | None = None,
                   date: dt.date | None = None, workers: int | None = None,
                   progress: Progress | None = None) -> LoadReport:
    """Load raw fix logs into survey ``survey_id`` (see the module docstring)."""
    progress = progress or NoProgress()
    fmt = fmt or ("delimited" if profile_path else "nmea")
    if fmt not in FORMATS:
        raise UsageError(f"unknown log format {fmt!r}", hint=f"use one of {', '.join(FORMATS)}")
    if node and node_pattern:
        raise UsageError("give either a node serial or a node pattern, not both")
    profile_hash = None
    if fmt == "delimited":
        if not profile_path:
            raise UsageError("delimited logs need a profile",
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
    progress.start(sum(p.stat().st_size for p in files), "bytes", "load fixes")
    if fmt == "delimited":
        profile_hash, _ = arc.objects.put_file(profile_path)
    tasks: list[tuple[int, dict[str, Any]]] = []
    in_call: set[str] = set()
    with arc.session() as s:
        for i, p in enumerate(files):
            o = outcomes[i]
            try:
                o.node = node_for(p, node, pattern)
            except UsageError as exc:
                o.status, o.error = "failed", str(exc)
                progress.advance(p.stat().st_size, p.name)
                continue
            o.raw_hash, o.size = arc.objects.put_file(p)  # the raw bytes first
            prior = s.execute(select(RawFile.id).where(RawFile.survey_id == survey_id,
                                                       RawFile.object_hash == o.raw_hash)
                              ).scalar_one_or_none()
            if prior is not None or o.raw_hash in in_call:
                o.status, o.raw_file_id = "already", prior
                progress.advance(o.size, p.name)
                continue
            in_call.add(o.raw_hash)
            tasks.append((i, {"objects_url": arc.objects_url, "path": str(p), "format": fmt,
                              "node": o.node, "raw_hash": o.raw_hash,
                              "date": date.isoformat() if date else None,
                              "profile_path": str(profile_path) if profile_path else None}))
    n_workers = max(1, min(workers or os.cpu_count() or 1, len(tasks)))
    if n_workers == 1:
        results = ((i, parse_file(t)) for i, t in tasks)
        for i, res in results:
            _record(arc, survey_id, outcomes[i], res, fmt, profile_hash, date, node_pattern)
            progress.advance(outcomes[i].size, Path(outcomes[i].path).name)
    else:
        with ProcessPoolExecutor(n_workers, mp_context=_pool_context()) as pool:
            futures = [(i, pool.submit(parse_file, t)) for i, t in tasks]
            for i, fut in futures:
                _record(arc, survey_id, outcomes[i], fut.result(), fmt, profile_hash, date,
                        node_pattern)
                progress.advance(outcomes[i].size, Path(outcomes[i].path).name)
    progress.close()
    return LoadReport(outcomes)


def _record(arc: Archive, survey_id: int, o: FileOutcome, res: dict[str, Any], fmt: str,
            profile_hash: str | None, date: dt.date | None, node_pattern: str | None) -> None:
    """One transaction for one parsed file: objects, the raw_files row, the ledger event."""
    if not res["ok"]:
        _record_failure(arc, survey_id, o, res, fmt, profile_hash)
        return
    for k in ("n_lines", "n_accepted", "n_rejected", "n_ignored", "n_fixes", "n_valid",
              "t_first", "t_last", "rejects"):
        setattr(o, k, res[k])
    details = {"rejects": res["rejects"], "date": date.isoformat() if date else None,
               "node_pattern": node_pattern}
    with arc.transaction() as tx:
        # Another process may have loaded the same bytes since the look-up before parsing:
        # take the writers' lock (the ledger head row) and look again inside the transaction.
        tx.execute(select(LedgerHead).where(LedgerHead.id == 1).with_for_update())
        prior = tx.execute(select(RawFile.id).where(RawFile.survey_id == survey_id,
                                                    RawFile.object_hash == o.raw_hash)
                           ).scalar_one_or_none()
        if prior is not None:
            o.status, o.raw_file_id = "already", prior
            return
        arc.register_object(tx, o.raw_hash, o.size, "raw")
        arc.register_object(tx, res["fixes_hash"], res["fixes_size"], "fixes")
        if res["rejects_hash"]:
            arc.register_object(tx, res["rejects_hash"], res["rejects_size"], "rejects")
        if profile_hash:
            arc.register_object(tx, profile_hash, arc.objects.size(profile_hash), "profile")
        row = RawFile(
            survey_id=survey_id, object_hash=o.raw_hash, original_name=o.path, node=o.node,
            format=fmt, profile_hash=profile_hash, size=o.size, received_at=utcnow(),
            received_by=arc.actor, parser=PARSERS[fmt], n_lines=o.n_lines,
            n_accepted=o.n_accepted, n_rejected=o.n_rejected, n_ignored=o.n_ignored,
            n_fixes=o.n_fixes, n_valid=o.n_valid, t_first=o.t_first, t_last=o.t_last,
            fixes_hash=res["fixes_hash"], rejects_hash=res["rejects_hash"],
            details=json.dumps(details, sort_keys=True),
        )
        tx.add(row)
        tx.flush()
        arc.log(tx, "load.fixes", {"raw": o.raw_hash, "name": Path(o.path).name,
                                   "node": o.node, "format": fmt, "fixes": res["fixes_hash"],
                                   "rejects": res["rejects_hash"], "n_fixes": o.n_fixes,
                                   "n_rejected": o.n_rejected},
                survey_id=survey_id, rows=[row])
    o.status, o.raw_file_id = "loaded", row.id


def _record_failure(arc: Archive, survey_id: int, o: FileOutcome, res: dict[str, Any],
                    fmt: str, profile_hash: str | None) -> None:
    """One transaction for a file that did not parse: its raw bytes and a ledger event."""
    o.status, o.error = "failed", res["error"]
    counts = res.get("counts") or {}
    for k in ("n_lines", "n_accepted", "n_rejected", "n_ignored", "n_fixes", "n_valid"):
        setattr(o, k, int(counts.get(k, 0)))
    o.rejects = dict(res.get("rejects") or {})
    with arc.transaction() as tx:
        arc.register_object(tx, o.raw_hash, o.size, "raw-failed")
        if profile_hash:
            arc.register_object(tx, profile_hash, arc.objects.size(profile_hash), "profile")
        arc.log(tx, "load.fixes.failed",
                {"raw": o.raw_hash, "name": Path(o.path).name, "node": o.node,
                 "format": fmt, "profile": profile_hash, "size": o.size, "error": o.error,
                 "counts": counts or None, "rejects": o.rejects},
                survey_id=survey_id)
