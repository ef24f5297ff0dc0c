"""Canonical hashing: SHA-256 of bytes, files, canonical JSON and Arrow tables.

Every hash nodekeep records is a lower-case hex SHA-256. Canonical JSON is UTF-8, keys
sorted, no insignificant whitespace, floats written by ``repr`` (shortest round-trip form),
so the same value always gives the same bytes on every platform.
"""

from __future__ import annotations

import hashlib
import json
import re
from datetime import date, datetime
from pathlib import Path
from typing import Any, BinaryIO

import pyarrow as pa
import pyarrow.compute as pc

CHUNK = 1 << 20
HASH_RE = re.compile(r"^[0-9a-f]{64}$")


def is_hash(value: str) -> bool:
    """True when ``value`` looks like a lower-case hex SHA-256."""
    return bool(HASH_RE.match(value or ""))


def sha256_bytes(data: bytes) -> str:
    """Hex SHA-256 of ``data``."""
    return hashlib.sha256(data).hexdigest()


def sha256_stream(stream: BinaryIO) -> tuple[str, int]:
    """Hex SHA-256 and size of everything left in a binary stream, read in 1 MiB chunks."""
    h = hashlib.sha256()
    size = 0
    while chunk := stream.read(CHUNK):
        h.update(chunk)
        size += len(chunk)
    return h.hexdigest(), size


def sha256_file(path: str | Path) -> tuple[str, int]:
    """Hex SHA-256 and size of a file, streamed."""
    with open(path, "rb") as fh:
        return sha256_stream(fh)


def _default(value: Any) -> Any:
    if isinstance(value, datetime):
        if value.tzinfo is None:
            raise TypeError("naive datetime in canonical JSON; use UTC-aware datetimes")
        return value.isoformat()
    if isinstance(value, date):
        return value.isoformat()
    if isinstance(value, (set, frozenset)):
        return sorted(value)
    if isinstance(value, Path):
        return str(value)
    if hasattr(value, "item"):  # numpy scalars
        return value.item()
    raise TypeError(f"cannot write {type(value).__name__} as canonical JSON")


def canonical_json(value: Any) -> bytes:
    """Canonical UTF-8 JSON bytes of ``value`` (sorted keys, compact, no NaN)."""
    try:
        text = json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                          default=_default, allow_nan=False)
    except ValueError as exc:  # the encoder checks every float, nested or converted
        if "float" in str(exc):
            raise ValueError("canonical JSON cannot carry NaN or infinity; use null") from None
        raise
    return text.encode("utf-8")


def canonical_hash(value: Any) -> str:
    """SHA-256 of the canonical JSON of ``value``."""
    return sha256_bytes(canonical_json(value))


def _zero_like(dtype: pa.DataType) -> pa.Scalar:
    """A fixed stand-in value of ``dtype`` for the slots behind nulls."""
    if pa.types.is_string(dtype) or pa.types.is_large_string(dtype):
        return pa.scalar("", dtype)
    if pa.types.is_binary(dtype) or pa.types.is_large_binary(dtype):
        return pa.scalar(b"", dtype)
    if pa.types.is_boolean(dtype):
        return pa.scalar(False, dtype)
    return pa.scalar(0).cast(dtype)


def _canonical_column(col: pa.ChunkedArray) -> list[pa.Array]:
    """A column as arrays whose bytes depend only on its values: the bytes under a null slot
    (NaN, 0 or garbage, depending on who built the array) are replaced by a fixed value and
    the validity travels as a separate boolean array."""
    arr = col.combine_chunks() if col.num_chunks != 1 else col.chunk(0)
    if isinstance(arr, pa.DictionaryArray):
        arr = arr.dictionary_decode()
    if arr.null_count == 0:
        return [arr]
    try:
        filled = pc.fill_null(arr, _zero_like(arr.type))
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return [arr]
    return [filled, pc.is_valid(arr)]


def table_digest(table: pa.Table) -> str:
    """SHA-256 over a table's content: schema and values, independent of chunking.

    Each column is written into one Arrow IPC stream with the bytes behind its null slots
    normalised (so a table and the same table read back from Parquet give the same digest),
    together with the table's schema (field names, types and metadata). This is what
    "bit-identical table" means in run records.
    """
    schema_bytes = table.schema.serialize().to_pybytes()
    arrays: list[pa.Array] = []
    names: list[str] = []
    for name, col in zip(table.column_names, table.columns, strict=True):
        parts = _canonical_column(col)
        arrays += parts
        names += [name] if len(parts) == 1 else [name, f"{name}\x00valid"]
    flat = pa.Table.from_arrays(arrays, names=names) if arrays else pa.table({})
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, flat.schema) as writer:
        for batch in flat.to_batches(max_chunksize=max(flat.num_rows, 1)):
            writer.write_batch(batch)
    h = hashlib.sha256(schema_bytes)
    h.update(sink.getvalue().to_pybytes())
    return h.hexdigest()
