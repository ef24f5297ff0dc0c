"""Reading loaded fixes back: one node across its raw files, the list of raw files, exports."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
from sqlalchemy import select

from archive.errors import Refused, UsageError
from archive.ingest.overlap import first_epochs
from archive.ingest.result import sort_fixes
from archive.ingest.schema import FIX_SCHEMA, conform_fixes
from archive.store.archive import Archive
from archive.store.models import RawFile
from archive.store.objects import PARQUET_OPTIONS
from archive.store.outfiles import spreadsheet_column, write_file


def _utc(t: dt.datetime | None) -> dt.datetime | None:
    if t is None:
        return None
    if t.tzinfo is None:
        raise UsageError(f"time {t.isoformat()} has no time zone", hint="give UTC times")
    return t.astimezone(dt.UTC)


def node_fixes(arc: Archive, survey_id: int, node: str, start: dt.datetime | None = None,
               end: dt.datetime | None = None) -> pa.Table:
    """Every fix of ``node`` in the survey (start <= time < end), deduplicated by time, sorted.

    When several raw files hold a fix at the same time (overlapping downloads of one
    node), the rule of :mod:`archive.ingest.overlap` keeps one: the fix of the earliest
    loaded raw file, then of the lowest raw line (the solver keeps the same one).
    A node without any loaded fix log is a :class:`UsageError` naming known nodes.
    """
    start, end = _utc(start), _utc(end)
    with arc.session() as s:
        rows = s.execute(select(RawFile.fixes_hash).where(
            RawFile.survey_id == survey_id, RawFile.node == node,
            RawFile.fixes_hash.is_not(None)).order_by(RawFile.id)).scalars().all()
        if not rows:
            known = s.execute(select(RawFile.node).where(
                RawFile.survey_id == survey_id, RawFile.fixes_hash.is_not(None))
                .distinct().order_by(RawFile.node).limit(6)).scalars().all()
    if not rows:
        some = ", ".join(known[:5]) + (", ..." if len(known) > 5 else "")
        raise UsageError(f"node {node!r} has no loaded fix log in this survey",
                         hint=f"known nodes: {some}; list them with 'nodekeep logs'" if known
                         else "load its logs with 'nodekeep load fixes FILES'")
    parts, ranks = [], []
    for order, h in enumerate(rows):
        t = conform_fixes(arc.objects.read_table(h))
        mask = None
        if start is not None:
            mask = pc.greater_equal(t.column("time"), pa.scalar(start, FIX_SCHEMA.field("time").type))
        if end is not None:
            m2 = pc.less(t.column("time"), pa.scalar(end, FIX_SCHEMA.field("time").type))
            mask = m2 if mask is None else pc.and_(mask, m2)
        if mask is not None:
            t = t.filter(mask)
        parts.append(t)
        ranks.append(np.full(t.num_rows, order, np.int64))
    t = pa.concat_tables(parts).combine_chunks()
    rank = np.concatenate(ranks)
    times = pc.cast(t.column("time"), pa.int64()).to_numpy(zero_copy_only=False)
    src, _ = first_epochs(np.zeros(len(times), np.int64), times,
                          t.column("raw_line").to_numpy(zero_copy_only=False),
                          lambda r: rank[r])
    if src is not None:
        t = t.take(pa.array(src))
    return sort_fixes(t.cast(FIX_SCHEMA))


def write_fixes(table: pa.Table, path: str | Path, *, force: bool = False) -> Path:
    """Write fixes as CSV (time in ISO 8601 UTC, text cells kept from being run as
    spreadsheet formulas) or Parquet, chosen by the file suffix."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".csv", ".parquet"):
        raise UsageError(f"{path}: unknown output type {suffix or '(none)'}",
                         hint="name the output FILE.csv or FILE.parquet")
    if path.exists() and not force:
        raise Refused(f"{path} already exists", hint="use --force to overwrite it")
    sink = pa.BufferOutputStream()
    if suffix == ".parquet":
        pq.write_table(table, sink, **PARQUET_OPTIONS)
    else:
        iso = pc.strftime(table.column("time"), format="%Y-%m-%dT%H:%M:%SZ")
        out = table.set_column(table.schema.get_field_index("time"), "time", iso)
        out = pa.table([spreadsheet_column(c) for c in out.columns], names=out.column_names)
        pacsv.write_csv(out, sink)
    write_file(path, sink.getvalue().to_pybytes())
    return path


def raw_file_dict(r: RawFile) -> dict[str, Any]:
    """A raw file row as plain data: its reject counts by reason, its ignored lines by
    sentence type, its fixes without quality information and the notes its reading left
    (such as a GPS week rollover). Rows loaded before these were kept have them empty."""
    details = json.loads(r.details or "{}")
    return {"id": r.id, "node": r.node, "name": r.original_name, "format": r.format,
            "raw_hash": r.object_hash, "size": r.size, "n_lines": r.n_lines,
            "n_accepted": r.n_accepted, "n_rejected": r.n_rejected, "n_ignored": r.n_ignored,
            "n_fixes": r.n_fixes, "n_valid": r.n_valid, "t_first": r.t_first,
            "t_last": r.t_last, "fixes_hash": r.fixes_hash, "rejects_hash": r.rejects_hash,
            "rejects": details.get("rejects", {}), "ignored": details.get("ignored", {}),
            "n_no_quality": details.get("no_quality", 0), "notes": details.get("notes", []),
            "received_at": r.received_at,
            "received_by": r.received_by}


def raw_notes(r: RawFile) -> list[dict[str, Any]]:
    """The notes reading a raw file left (such as a GPS week rollover), oldest rows none."""
    return json.loads(r.details or "{}").get("notes", [])


def with_notes(arc: Archive, survey_id: int, raw: list[dict[str, Any]]
               ) -> list[dict[str, Any]]:
    """Raw file dicts (with their ``id``) given the notes their reading left."""
    ids = [r["id"] for r in raw]
    with arc.session() as s:
        notes = {r.id: raw_notes(r) for r in s.scalars(select(RawFile).where(
            RawFile.survey_id == survey_id, RawFile.id.in_(ids)))} if ids else {}
    return [{**r, "notes": notes.get(r["id"], [])} for r in raw]


def list_raw_files(arc: Archive, survey_id: int, node: str | None = None) -> list[dict[str, Any]]:
    """The raw fix logs loaded into a survey (optionally of one node), oldest first."""
    q = select(RawFile).where(RawFile.survey_id == survey_id)
    if node:
        q = q.where(RawFile.node == node)
    with arc.session() as s:
        return [raw_file_dict(r) for r in s.scalars(q.order_by(RawFile.id))]
