"""Arrow arrays built straight from numpy buffers.

``pyarrow.array(ndarray)`` looks for pandas on its first call (about 0.15 s of imports),
which a command loading logs does not otherwise need; these builders hand the numpy
buffers to :meth:`pyarrow.Array.from_buffers` instead, with an explicit validity bitmap.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa


def _validity(valid: np.ndarray | None) -> pa.Buffer | None:
    if valid is None or bool(valid.all()):
        return None
    return pa.py_buffer(np.packbits(valid, bitorder="little"))


def from_numpy(values: np.ndarray, typ: pa.DataType, valid: np.ndarray | None = None
               ) -> pa.Array:
    """A fixed-width Arrow array of ``typ`` from ``values`` (cast to its numpy type);
    ``valid`` marks the non-null entries (all when None)."""
    dtype = np.dtype("int64") if pa.types.is_timestamp(typ) else np.dtype(typ.to_pandas_dtype())
    data = np.ascontiguousarray(values, dtype=dtype)
    n = data.shape[0]
    validity = _validity(valid)
    return pa.Array.from_buffers(typ, n, [validity, pa.py_buffer(data)],
                                 null_count=-1 if validity is not None else 0)


def floats(values: np.ndarray, typ: pa.DataType = pa.float64()) -> pa.Array:
    """Floating point values with NaN as null."""
    values = np.asarray(values, dtype=np.float64)
    return from_numpy(values, typ, np.isfinite(values))


def booleans(values: np.ndarray) -> pa.Array:
    """A boolean array (no nulls)."""
    values = np.asarray(values, dtype=bool)
    return pa.Array.from_buffers(pa.bool_(), values.shape[0],
                                 [None, pa.py_buffer(np.packbits(values, bitorder="little"))])


def constant_strings(value: str, n: int) -> pa.Array:
    """A string array of ``n`` copies of ``value``, built from buffers (no Python loop)."""
    raw = value.encode("utf-8")
    offsets = (np.arange(n + 1, dtype=np.int64) * len(raw)).astype(np.int32)
    return pa.StringArray.from_buffers(n, pa.py_buffer(offsets.tobytes()), pa.py_buffer(raw * n))


def coded_strings(codes: np.ndarray, names: list[str], valid: np.ndarray | None = None
                  ) -> pa.Array:
    """A string array whose entry ``i`` is ``names[codes[i]]`` (null where not ``valid``)."""
    codes = np.asarray(codes, dtype=np.int64)
    if valid is not None:
        codes = np.where(valid, codes, 0)
    words = [s.encode("utf-8") for s in names]
    lengths = np.array([len(w) for w in words], dtype=np.int64)[codes]
    if valid is not None:
        lengths = np.where(valid, lengths, 0)
    offsets = np.zeros(codes.shape[0] + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    table = np.frombuffer(b"".join(words) or b"\0", dtype=np.uint8)
    starts = np.concatenate([[0], np.cumsum([len(w) for w in words])])[:-1].astype(np.int64)
    total = int(offsets[-1])
    idx = np.arange(total, dtype=np.int64) - np.repeat(offsets[:-1], lengths) \
        + np.repeat(starts[codes], lengths)
    data = table[idx] if total else np.zeros(0, np.uint8)
    validity = _validity(valid)
    return pa.StringArray.from_buffers(codes.shape[0], pa.py_buffer(offsets.astype(np.int32)),
                                       pa.py_buffer(data.tobytes()), validity)


def _string_values(names: list[str]) -> pa.Array:
    words = [s.encode("utf-8") for s in names]
    offsets = np.zeros(len(words) + 1, dtype=np.int32)
    np.cumsum([len(w) for w in words], out=offsets[1:])
    return pa.StringArray.from_buffers(len(words), pa.py_buffer(offsets),
                                       pa.py_buffer(b"".join(words)))


def dictionary_codes(codes: np.ndarray, names: list[str], valid: np.ndarray | None = None
                     ) -> pa.Array:
    """A dictionary-encoded string array (int32 indices into ``names``): written to
    Parquet as it is, with no hashing of its values."""
    codes = np.ascontiguousarray(codes, dtype=np.int32)
    indices = from_numpy(codes, pa.int32(), valid)
    return pa.DictionaryArray.from_arrays(indices, _string_values(names))


def constant_dictionary(value: str, n: int) -> pa.Array:
    """``n`` copies of ``value``, dictionary-encoded."""
    return dictionary_codes(np.zeros(n, np.int32), [value])


def values_view(column: pa.Array | pa.ChunkedArray, dtype: np.dtype | str) -> np.ndarray:
    """The values of a fixed-width column without nulls as a numpy array of ``dtype``
    (a view of its buffer for one chunk, a copy joining several), read from the buffers:
    ``to_numpy`` would look for pandas first, as ``pyarrow.array`` does."""
    dtype = np.dtype(dtype)
    typ = column.type
    numeric = pa.types.is_integer(typ) or pa.types.is_floating(typ) or pa.types.is_temporal(typ)
    if not numeric or typ.bit_width != 8 * dtype.itemsize:
        raise TypeError(f"a column of {typ} cannot be read as {dtype}")
    if column.null_count:
        raise TypeError("a column with nulls cannot be read from its values alone")
    chunks = column.chunks if isinstance(column, pa.ChunkedArray) else [column]
    views = [np.frombuffer(c.buffers()[1], dtype=dtype, count=len(c),
                           offset=c.offset * dtype.itemsize)
             for c in chunks if len(c)]
    if not views:
        return np.zeros(0, dtype)
    return views[0] if len(views) == 1 else np.concatenate(views)
