"""Parse one raw file into finished temporary objects: the unit of work a loading process runs.

It runs in worker processes, so it takes and returns plain data only: the object store URL,
the file path and the parse options in; for the raw copy, the fixes and the rejects
Parquet tables their temporary file, SHA-256 and size out, with the counts (or an error).
The loader then names the objects (a rename) and records them.

The raw bytes are hashed and copied beside the parse, not before or after it: a small file
is read once into memory (hashed, copied and parsed from there); a large one is read by a
thread that hashes and copies it while the parse streams through it, the fix tables
waiting for the hash (which every fix carries) in a queue of bounded size, then written
by a second thread. A file whose bytes the survey already holds (``known`` hashes) is
reported as such without being parsed, or as soon as its hash is known.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import hashlib
import os
from pathlib import Path
from typing import Any

from archive.errors import InputError, NodekeepError, StorageError
from archive.ingest import workers
from archive.ingest.formats import LogOptions, log_format
from archive.store.objects import STORAGE_ERRNOS

SMALL_FILE = 32 << 20  # read whole into memory below this size
# Parquet of the tables a load writes: the store's options at zstd level 1 (about 20 %
# faster to write than level 3 for 2 % more bytes on fix tables, measured), dictionary
# pages only for the columns of repeated strings (node, raw file hash, sentence, reject
# reason): on numbers they cost a quarter of the write of a small table and zstd finds the
# repeats anyway (within 2 % of the bytes, measured on 100 kB logs)
TABLE_OPTIONS = {"compression": "zstd", "compression_level": 1, "write_statistics": True,
                 "use_dictionary": ["node", "raw_hash", "sentence", "reason"]}
BLOCK = 16 << 20
PENDING_ROWS = 4_000_000  # fix rows held while the hash of a large file is not known yet
_KNOWN: frozenset[str] = frozenset()


def set_known(hashes: frozenset[str]) -> None:
    """Raw hashes already loaded into the survey: such files are not parsed again. Set in
    the loading process before its workers start (they inherit it)."""
    global _KNOWN
    _KNOWN = hashes


_KNOWN_FILES: dict[str, frozenset[str]] = {}
_TASK_KNOWN: str | None = None


def _known(h: str) -> bool:
    """True when the survey already holds these bytes: the loader's set in this process, or
    the file of hashes a task names (read once per process)."""
    if h in _KNOWN:
        return True
    path = _TASK_KNOWN
    if path is None:
        return False
    if path not in _KNOWN_FILES:
        try:
            with open(path, encoding="ascii") as fh:
                _KNOWN_FILES[path] = frozenset(line.strip() for line in fh if line.strip())
        except FileNotFoundError:
            _KNOWN_FILES[path] = frozenset()
    return h in _KNOWN_FILES[path]


class _Storage(Exception):
    """The object store refused a write: the whole load stops."""


def _not_a_log(path: str, n_lines: int, counts: dict[str, int], fmt: str) -> InputError:
    if n_lines == 0:
        return InputError(path, "the file is empty", hint="nothing to load")
    if counts.get("binary", 0) * 2 >= n_lines:
        return InputError(path, "binary data, not a text fix log",
                          hint="check that this is the node's GPS log")
    if counts.get("rollover", 0):
        return InputError(path, "every position's date was refused: it lies outside the "
                          "node's deployments and no whole number of 1024 GPS weeks (a week "
                          "number rollover) places it there",
                          hint="check this node's rows of the deployment log, or the "
                               "receiver's clock")
    if counts.get("no-date", 0):
        return InputError(path, "position sentences but no date (no RMC or ZDA sentence)",
                          hint="give the log's first UTC date with --date YYYY-MM-DD")
    spec = log_format(fmt)
    return InputError(path, spec.no_fix, expected=spec.expected, hint=spec.hint or None)


def _write_tmp(store, data: bytes | memoryview, sync: bool) -> str:
    return str(store.write_temporary(data, sync=sync))


def _object_of(store, data: bytes, sync: bool) -> dict[str, Any]:
    """A finished temporary object holding ``data``."""
    return {"tmp": _write_tmp(store, data, sync), "hash": hashlib.sha256(data).hexdigest(),
            "size": len(data)}


def _table_object(store, table, sync: bool) -> dict[str, Any]:
    import pyarrow as pa
    import pyarrow.parquet as pq

    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, **TABLE_OPTIONS)
    return _object_of(store, sink.getvalue().to_pybytes(), sync)


def parse_file(task: dict[str, Any]) -> dict[str, Any]:
    """Parse ``task["path"]`` into temporary objects; never raises.

    Returns ``{"ok": True, "status": "parsed" | "already", "raw": obj, "fixes": obj,
    "rejects_obj": obj | None, counts..., "t_first", "t_last", "rejects": {reason: n},
    "ignored": {type: n}, "notes": [...]}`` where ``obj`` is ``{"tmp", "hash", "size"}``
    (``tmp`` None when nothing needs writing), or ``{"ok": False, "error": message,
    "raw": obj | None, "counts": {...} | None, "rejects": {...}, "fatal": bool}``;
    ``fatal`` means the object store refused a write (the loader stops and removes the
    temporary files of every result).
    """
    global _TASK_KNOWN
    written: list[str] = []
    seen: dict[str, Any] = {"counts": None, "rejects": {}, "raw": None}
    _TASK_KNOWN = task.get("known_path")
    try:
        return _parse(task, seen, written)
    except (_Storage, StorageError) as exc:
        for f in written:
            _remove(f)
        return {"ok": False, "fatal": True, "error": str(exc), **seen, "raw": None}
    except OSError as exc:
        if exc.errno in STORAGE_ERRNOS and task["path"] not in str(exc.filename or ""):
            for f in written:
                _remove(f)
            return {"ok": False, "fatal": True, "error": exc.strerror or str(exc), **seen,
                    "raw": None}
        return _failed(task, f"could not be read ({type(exc).__name__}: {exc})", seen, written)
    except NodekeepError as exc:
        return _failed(task, str(exc), seen, written)
    except Exception as exc:  # noqa: BLE001 - one broken file must not stop the others
        return _failed(task, f"could not be parsed ({type(exc).__name__}: {exc})", seen,
                       written)


def parse_files(tasks: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """:func:`parse_file` of each task, in order (a run of small files handed to a parsing
    process at once); never raises."""
    return [parse_file(task) for task in tasks]


def _remove(path: str) -> None:
    with contextlib.suppress(FileNotFoundError):
        os.unlink(path)


def _failed(task: dict[str, Any], message: str, seen: dict[str, Any],
            written: list[str]) -> dict[str, Any]:
    """A file that is not a fix log: its raw copy is kept (recorded as failed), the rest
    removed."""
    if not message.startswith(task["path"]):  # e.g. a profile that does not fit this log
        message = f"{task['path']}: {message}"
    raw = seen.get("raw")
    for f in written:
        if raw is None or f != raw.get("tmp"):
            _remove(f)
    return {"ok": False, "fatal": False, "error": message, **seen}


def _reference(task: dict[str, Any]) -> tuple[dt.datetime, dt.datetime] | None:
    ref = task.get("reference")
    if not ref:
        return None
    return dt.datetime.fromisoformat(ref[0]), dt.datetime.fromisoformat(ref[1])


def _guard(fn, *args, **kwargs):
    """Run a write; a storage that refuses it stops the whole load."""
    try:
        return fn(*args, **kwargs)
    except OSError as exc:
        if exc.errno in STORAGE_ERRNOS:
            raise _Storage(f"cannot write to the object store: {exc.strerror}") from exc
        raise


def _parse(task: dict[str, Any], seen: dict[str, Any], written: list[str]) -> dict[str, Any]:
    from archive.store.objects import ObjectStore

    store = ObjectStore(task["objects_url"])
    path = task["path"]
    sync = task.get("sync", True)
    size = os.path.getsize(path)
    if log_format(task["format"]).streams and size > task.get("small_file", SMALL_FILE):
        from archive.ingest.parse_stream import parse_large

        return parse_large(task, store, seen, written)
    sync = sync and not task.get("defer_sync", False)  # the loader flushes them in batches
    data = Path(path).read_bytes()
    h = hashlib.sha256(data).hexdigest()
    raw = {"tmp": None, "hash": h, "size": len(data)}
    seen["raw"] = raw
    if _known(h):
        return {"ok": True, "status": "already", "raw": raw}
    if not store.exists(h):
        raw["tmp"] = _guard(_write_tmp, store, data, sync)
        written.append(raw["tmp"])
    workers.ready()
    result = _parse_memory(task, data, h)
    return _finish(task, store, result, seen, written, sync)


def _parse_memory(task: dict[str, Any], data: bytes, h: str):
    """Parse a log held in memory with its format's parse function."""
    spec = log_format(task["format"])
    options = LogOptions(
        node=task["node"], raw_hash=h,
        date=dt.date.fromisoformat(task["date"]) if task.get("date") else None,
        reference=_reference(task), reference_text=task.get("reference_text") or "the survey",
        profile_path=task.get("profile_path"))
    return spec.parse_function()(data, options)


def _finish(task: dict[str, Any], store, result, seen: dict[str, Any], written: list[str],
            sync: bool) -> dict[str, Any]:
    """Counts, the fixes and rejects objects of a parsed file (from memory)."""
    summary = result.summary()
    seen["counts"] = {k: summary[k] for k in ("n_lines", "n_accepted", "n_rejected",
                                              "n_ignored", "n_fixes", "n_valid")}
    seen["rejects"] = summary["rejects"]
    if result.n_fixes == 0:
        raise _not_a_log(task["path"], result.n_lines, summary["rejects"], task["format"])
    fixes = _guard(_table_object, store, result.fixes, sync)
    written.append(fixes["tmp"])
    rejects = None
    if result.rejects.num_rows:
        rejects = _guard(_table_object, store, result.rejects, sync)
        written.append(rejects["tmp"])
    return {"ok": True, "status": "parsed", "raw": seen["raw"], "fixes": fixes,
            "rejects_obj": rejects, **summary}
