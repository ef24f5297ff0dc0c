"""Parse one raw file into Parquet objects: the unit of work a loading process runs.

It runs in worker processes, so it takes and returns plain data only: the object store URL,
the file path and the parse options in; object hashes, counts and an error message out.
Fixes are streamed chunk by chunk into a Parquet file, so memory stays bounded on logs of
any length; objects are put only when the file turned out to be a fix log.
"""

from __future__ import annotations

import datetime as dt
import os
import tempfile
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from archive.errors import InputError, NodekeepError
from archive.ingest.schema import FIX_SCHEMA
from archive.store.objects import PARQUET_OPTIONS, ObjectStore


def _not_a_log(path: str, n_lines: int, counts: dict[str, int], fmt: str) -> InputError:
    if n_lines == 0:
        return InputError(path, "the file is empty", hint="nothing to load")
    if counts.get("binary", 0) * 2 >= n_lines:
        return InputError(path, "binary data, not a text fix log",
                          hint="check that this is the node's GPS log")
    if counts.get("no-date", 0):
        return InputError(path, "GGA sentences but no date (no RMC or ZDA sentence)",
                          hint="give the log's first UTC date with --date YYYY-MM-DD")
    if fmt == "nmea":
        return InputError(path, "no usable GGA sentence: not an NMEA 0183 fix log",
                          expected="$--GGA sentences",
                          hint="for CSV/TSV logs use --format delimited --profile FILE")
    return InputError(path, "no line could be read with the delimited profile",
                      hint="check the profile's column names, delimiter and formats")


def parse_file(task: dict[str, Any]) -> dict[str, Any]:
    """Parse ``task["path"]`` and store its fixes and rejects; never raises.

    Returns ``{"ok": True, counts..., "fixes_hash", "fixes_size", "rejects_hash",
    "rejects_size", "t_first", "t_last", "rejects": {reason: n}}`` or ``{"ok": False,
    "error": message, "counts": {...} or None, "rejects": {reason: n}}`` where ``counts``
    holds the line counts read before the failure when the whole file was read.
    """
    seen: dict[str, Any] = {"counts": None, "rejects": {}}
    try:
        return _parse(task, seen)
    except NodekeepError as exc:
        message = str(exc)
        if not message.startswith(task["path"]):  # e.g. a profile that does not fit this log
            message = f"{task['path']}: {message}"
        return {"ok": False, "error": message, **seen}
    except Exception as exc:  # noqa: BLE001 - one broken file must not stop the others
        return {"ok": False, "error": f"{task['path']}: could not be parsed "
                f"({type(exc).__name__}: {exc})", **seen}


def _chunks(task: dict[str, Any]):
    fmt = task["format"]
    if fmt == "nmea":
        from archive.ingest.nmea import file_blocks, iter_chunks

        date = dt.date.fromisoformat(task["date"]) if task.get("date") else None
        yield from iter_chunks(file_blocks(task["path"], task.get("chunk_bytes") or 16 << 20),
                               node=task["node"], raw_hash=task["raw_hash"], date=date)
        return
    from archive.ingest.delimited import parse_delimited
    from archive.ingest.nmea import Chunk
    from archive.ingest.profile import load_profile

    profile = load_profile(task["profile_path"])
    data = Path(task["path"]).read_bytes()
    r = parse_delimited(data, profile=profile, node=task["node"], raw_hash=task["raw_hash"])
    yield Chunk(r.fixes, r.rejects, r.n_lines, r.n_accepted, r.n_rejected, r.n_ignored)


def _parse(task: dict[str, Any], seen: dict[str, Any]) -> dict[str, Any]:
    store = ObjectStore(task["objects_url"])
    counts = {"n_lines": 0, "n_accepted": 0, "n_rejected": 0, "n_ignored": 0, "n_fixes": 0,
              "n_valid": 0}
    reasons: dict[str, int] = {}
    t_first = t_last = None
    in_order = True
    with tempfile.TemporaryDirectory(prefix="nodekeep-parse-") as tmp:
        fpath = os.path.join(tmp, "fixes.parquet")
        rpath = os.path.join(tmp, "rejects.parquet")
        fw = pq.ParquetWriter(fpath, FIX_SCHEMA, **PARQUET_OPTIONS)
        rejects: list[pa.Table] = []
        try:
            for ch in _chunks(task):
                for k in ("n_lines", "n_accepted", "n_rejected", "n_ignored"):
                    counts[k] += getattr(ch, k)
                if ch.rejects.num_rows:
                    rejects.append(ch.rejects)
                    for d in pc.value_counts(ch.rejects.column("reason")).to_pylist():
                        reasons[d["values"]] = reasons.get(d["values"], 0) + int(d["counts"])
                    if sum(t.num_rows for t in rejects) > 200_000:
                        rejects = [pa.concat_tables(rejects).combine_chunks()]
                if ch.fixes.num_rows:
                    counts["n_fixes"] += ch.fixes.num_rows
                    counts["n_valid"] += int(pc.sum(ch.fixes.column("valid")).as_py() or 0)
                    mm = pc.min_max(ch.fixes.column("time")).as_py()
                    if t_last is not None and mm["min"] < t_last:
                        in_order = False
                    t_first = mm["min"] if t_first is None else min(t_first, mm["min"])
                    t_last = mm["max"] if t_last is None else max(t_last, mm["max"])
                    fw.write_table(ch.fixes)
        finally:
            fw.close()
        seen["counts"], seen["rejects"] = dict(counts), dict(sorted(reasons.items()))
        if counts["n_fixes"] == 0:
            raise _not_a_log(task["path"], counts["n_lines"], reasons, task["format"])
        if in_order:
            fixes_hash, fixes_size = store.put_file(fpath)
        else:
            from archive.ingest.result import sort_fixes

            fixes_hash, fixes_size = store.put_table(sort_fixes(pq.read_table(fpath)))
        rejects_hash = rejects_size = None
        if rejects:
            pq.write_table(pa.concat_tables(rejects), rpath, **PARQUET_OPTIONS)
            rejects_hash, rejects_size = store.put_file(rpath)
    return {"ok": True, **counts, "fixes_hash": fixes_hash, "fixes_size": fixes_size,
            "rejects_hash": rejects_hash, "rejects_size": rejects_size,
            "t_first": t_first, "t_last": t_last, "rejects": dict(sorted(reasons.items()))}
