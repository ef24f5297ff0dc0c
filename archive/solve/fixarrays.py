"""The fix table as numpy columns, sorted by node and time, with node codes.

Fix tables arrive one per raw file (one node each), concatenated in the order the raw
files were loaded (:func:`archive.solve.inputs.load_fix_tables` keeps it). They are sorted
by (node, time) when not already in that order, and repeats of an epoch (the same node and
time in two overlapping files) are dropped by the rule of :mod:`archive.ingest.overlap`:
the fix of the earliest loaded raw file, then of the lowest raw line. Nodes get
integer codes in sorted order of their serials. Window look-ups use a composite integer key
``code·2⁴⁴ + (t − t₀)`` in microseconds, so one ``searchsorted`` finds every window at once.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from archive.errors import UsageError
from archive.ingest.overlap import first_epochs
from archive.ingest.schema import FIX_SCHEMA

TIME_BITS = 44  # 2^44 µs ≈ 203 days of fixes per survey
MAX_NODES = 1 << (63 - TIME_BITS)


def _float(col: pa.ChunkedArray) -> np.ndarray:
    return pc.cast(col, pa.float64()).to_numpy(zero_copy_only=False).astype(np.float64)


@dataclass
class FixArrays:
    """Columns of the sorted fix table (nulls of float columns are NaN)."""

    node_names: list[str]
    node_code: np.ndarray
    t_us: np.ndarray
    lat: np.ndarray
    lon: np.ndarray
    h_ell: np.ndarray
    h_msl: np.ndarray
    geoid_sep: np.ndarray
    quality: np.ndarray
    valid: np.ndarray
    fix_type: np.ndarray
    n_sats: np.ndarray
    pdop: np.ndarray
    hdop: np.ndarray
    raw_hash: pa.ChunkedArray  # of the table as given (index with ``src``)
    raw_line: np.ndarray
    n_duplicates: int = 0
    src: np.ndarray | None = None  # row of the given table behind each sorted fix
    no_quality: np.ndarray | None = None  # no fix quality, satellites or HDOP (all False
    # for tables written before the column existed)

    def raw_hashes(self, fix: np.ndarray) -> list[str]:
        """Raw file hash of the given sorted fixes."""
        return self.raw_hash.take(pa.array(self.src[fix])).cast(pa.string()).to_pylist()

    def __len__(self) -> int:
        return len(self.t_us)

    @property
    def t0(self) -> int:
        """Earliest fix time (µs), the origin of the composite key."""
        return int(self.t_us.min()) if len(self.t_us) else 0

    def key(self) -> np.ndarray:
        """Composite sort key node·2⁴⁴ + (t − t₀); non-decreasing."""
        return (self.node_code << TIME_BITS) + (self.t_us - self.t0)

    def key_of(self, code: np.ndarray, t_us: np.ndarray) -> np.ndarray:
        """Composite key of (node code, time) pairs, times clipped to the key's range."""
        rel = np.clip(t_us - self.t0, -1, (1 << TIME_BITS) - 1)
        return (code.astype(np.int64) << TIME_BITS) + rel

    def columns(self) -> dict[str, np.ndarray]:
        """The columns screening reads."""
        return {"quality": self.quality, "valid": self.valid, "fix_type": self.fix_type,
                "n_sats": self.n_sats, "pdop": self.pdop, "hdop": self.hdop,
                "lat": self.lat, "lon": self.lon, "no_quality": self.no_quality}


def _appearance_rank(raw_hash: pa.ChunkedArray) -> Callable[[np.ndarray], np.ndarray]:
    """Load rank of the raw file of given rows: the table's first row of that raw file
    (the table's raw files are in load order)."""
    def rank(rows: np.ndarray) -> np.ndarray:
        hashes = raw_hash.take(pa.array(rows)).cast(pa.string())
        idx = pc.index_in(hashes, value_set=pc.unique(hashes)).to_numpy(zero_copy_only=False)
        idx = idx.astype(np.int64)
        first = np.full(int(idx.max()) + 1 if len(idx) else 0, np.iinfo(np.int64).max)
        np.minimum.at(first, idx, rows)
        return first[idx]
    return rank


def empty_fixes() -> pa.Table:
    """An empty fix table with the canonical schema."""
    return FIX_SCHEMA.empty_table()


FLOATS = ("lat", "lon", "h_ell", "h_msl", "geoid_sep", "quality", "fix_type", "n_sats",
          "pdop", "hdop")


def _finish(names: list[str], codes: np.ndarray, t_raw: np.ndarray, raw_line: np.ndarray,
            valid: np.ndarray, floats: dict[str, np.ndarray], raw_hash: pa.ChunkedArray,
            no_quality: np.ndarray) -> FixArrays:
    """Sorted, de-duplicated :class:`FixArrays` from unsorted columns in load order."""
    if len(names) >= MAX_NODES:
        raise UsageError(f"{len(names)} nodes in one solve; at most {MAX_NODES - 1} are supported",
                         hint="solve by node selection (--nodes)")
    src, n_dup = first_epochs(codes, t_raw, raw_line, _appearance_rank(raw_hash))
    if src is not None:
        codes, t_raw, raw_line, valid = codes[src], t_raw[src], raw_line[src], valid[src]
        no_quality = no_quality[src]
        floats = {k: v[src] for k, v in floats.items()}
    span = (int(t_raw.max()) - int(t_raw.min())) if len(t_raw) else 0
    if span >= (1 << TIME_BITS):
        raise UsageError("the fixes of one solve span more than 200 days",
                         hint="solve by node selection (--nodes)")
    return FixArrays(node_names=names, node_code=codes, t_us=t_raw.astype(np.int64),
                     valid=valid, raw_hash=raw_hash, raw_line=raw_line.astype(np.int64),
                     n_duplicates=n_dup, src=np.arange(len(codes)) if src is None else src,
                     no_quality=no_quality, **floats)


def fix_arrays(table: pa.Table) -> FixArrays:
    """Sort, de-duplicate and convert a fix table (FIX_SCHEMA columns) to numpy columns."""
    if table.num_rows == 0:
        table = empty_fixes()
    t_raw = pc.cast(table["time"], pa.int64()).to_numpy(zero_copy_only=False)
    names = sorted(pc.unique(table["node"]).to_pylist())
    codes = pc.index_in(table["node"], value_set=pa.array(names, pa.string()))
    codes = codes.to_numpy(zero_copy_only=False).astype(np.int64)
    return _finish(names, codes, t_raw, table["raw_line"].to_numpy(),
                   table["valid"].to_numpy(zero_copy_only=False).astype(bool),
                   {name: _float(table[name]) for name in FLOATS}, table["raw_hash"],
                   _no_quality(table))


READ_COLUMNS = ("node", "time", "raw_line", "valid", "no_quality", "raw_hash", *FLOATS)
DICTIONARY_COLUMNS = ["node", "raw_hash"]  # read dictionary-encoded: few distinct values
READERS = 2  # files opened and decoded at once, per partition in flight


_TYPES = {f.name: f.type for f in FIX_SCHEMA}


def _columns(t: pa.Table) -> dict[str, pa.ChunkedArray]:
    """The columns of a stored fix table by name, each in the type of the ingest contract
    (the cast :func:`~archive.ingest.schema.conform_fixes` makes; the dictionary-encoded
    ones as read)."""
    out = {}
    for name, col in zip(t.column_names, t.columns, strict=True):
        want = _TYPES.get(name)
        if want is not None and name not in DICTIONARY_COLUMNS and col.type != want:
            col = col.cast(want)
        out[name] = col
    return out


def _node_codes(col: pa.ChunkedArray, out: np.ndarray) -> list[str]:
    """Write each fix's index into the returned list of this table's node serials."""
    index: dict[str, int] = {}
    at = 0
    for chunk in col.chunks:
        if not pa.types.is_dictionary(chunk.type):
            chunk = pc.dictionary_encode(chunk)
        lut = np.array([index.setdefault(x, len(index)) for x in chunk.dictionary.to_pylist()],
                       dtype=np.int64)
        idx = chunk.indices.to_numpy(zero_copy_only=False)
        out[at:at + len(chunk)] = lut[idx] if len(lut) else 0
        at += len(chunk)
    return list(index)


def _into(col: pa.ChunkedArray | None, out: np.ndarray, fill: float | bool = np.nan) -> None:
    """Write a column into ``out`` as :func:`_float` (floats, nulls NaN) or a boolean
    conversion would, ``fill`` where the table lacks it: a chunk without nulls is copied
    from its own buffer (a numpy view of it), one with nulls takes the general way."""
    if col is None:
        out[:] = fill
        return
    at = 0
    for chunk in col.chunks:
        m = len(chunk)
        if chunk.null_count == 0:
            view = chunk.to_numpy(zero_copy_only=False)  # a view but for booleans
            out[at:at + m] = view.view(np.int64) if view.dtype.kind == "M" else view
        elif out.dtype == np.float64:
            out[at:at + m] = _float(chunk)
        else:
            out[at:at + m] = pc.fill_null(chunk, fill).to_numpy(zero_copy_only=False)
        at += m


class _Columns:
    """The solver's columns of every fix of several tables, preallocated, each table
    decoded straight into its own slice (so tables can be decoded on several threads)."""

    def __init__(self, n: int) -> None:
        self.t_raw = np.empty(n, dtype=np.int64)
        self.raw_line = np.empty(n, dtype=np.int64)
        self.valid = np.empty(n, dtype=bool)
        self.unrated = np.empty(n, dtype=bool)
        self.local = np.empty(n, dtype=np.int64)  # node code among its own table's serials
        self.floats = {name: np.empty(n, dtype=np.float64) for name in FLOATS}

    def fill(self, f: pq.ParquetFile, a: int, b: int) -> tuple[list[str], list[pa.Array]]:
        """Decode the solver's columns of ``f`` into rows ``a:b``; the table's node serials
        and its ``raw_hash`` chunks (dictionary-encoded)."""
        have = set(f.metadata.schema.names)
        t = _columns(f.read(columns=[c for c in READ_COLUMNS if c in have],
                            use_threads=False))
        _into(t["time"], self.t_raw[a:b])
        _into(t["raw_line"], self.raw_line[a:b])
        _into(t["valid"], self.valid[a:b], False)
        _into(t.get("no_quality"), self.unrated[a:b], False)
        for name in FLOATS:
            _into(t.get(name), self.floats[name][a:b])
        names = _node_codes(t["node"], self.local[a:b])
        chunks = [c if pa.types.is_dictionary(c.type) else pc.dictionary_encode(c)
                  for c in t["raw_hash"].chunks]
        return names, [c.cast(pa.dictionary(pa.int32(), pa.string())) for c in chunks]


def read_fix_arrays(files: list[pq.ParquetFile], readers: int = READERS) -> FixArrays:
    """:func:`fix_arrays` of the fix tables of ``files`` concatenated in the order given
    (open them with ``read_dictionary=DICTIONARY_COLUMNS``): only the columns the solver
    uses are decoded, each file straight into its slice of arrays sized from the files'
    metadata, ``readers`` files at once (Parquet decoding releases the interpreter's lock),
    so the fix table itself is never built. ``raw_hash`` is kept dictionary-encoded (the
    64-character hash repeated on every fix is never spelled out)."""
    rows = np.cumsum([0] + [f.metadata.num_rows for f in files])
    cols = _Columns(int(rows[-1]))

    def fill(i: int) -> tuple[list[str], list[pa.Array]]:
        return cols.fill(files[i], int(rows[i]), int(rows[i + 1]))

    if readers <= 1 or len(files) < 2:
        got = [fill(i) for i in range(len(files))]
    else:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=min(readers, len(files))) as pool:
            got = list(pool.map(fill, range(len(files))))
    names = sorted({x for ns, _ in got for x in ns})
    lookup = {x: i for i, x in enumerate(names)}
    codes = np.empty(int(rows[-1]), dtype=np.int64)
    for i, (ns, _) in enumerate(got):  # one entry per table, not per fix
        a, b = int(rows[i]), int(rows[i + 1])
        if b > a:
            codes[a:b] = np.array([lookup[x] for x in ns], dtype=np.int64)[cols.local[a:b]]
    chunks = [c for _, cs in got for c in cs]
    raw_hash = (pa.chunked_array(chunks) if chunks
                else pa.chunked_array([], pa.dictionary(pa.int32(), pa.string())))
    pa.default_memory_pool().release_unused()  # the decoding buffers
    return _finish(names, codes, cols.t_raw, cols.raw_line, cols.valid, cols.floats, raw_hash,
                   cols.unrated)


def _no_quality(table: pa.Table) -> np.ndarray:
    """Which fixes carry no quality information (all False for tables before the column)."""
    if "no_quality" not in table.column_names:
        return np.zeros(table.num_rows, dtype=bool)
    return pc.fill_null(table["no_quality"], False).to_numpy(zero_copy_only=False).astype(bool)
