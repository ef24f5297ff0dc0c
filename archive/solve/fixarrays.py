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
from archive.ingest.schema import FIX_SCHEMA, conform_fixes

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
BATCH_ROWS = 1 << 20  # fixes read and converted together
READERS = 4  # files read at once


def _batches(files: list[pq.ParquetFile], rows: int) -> list[list[pq.ParquetFile]]:
    """The files in order, grouped into runs of about ``rows`` fixes (a file never split)."""
    out: list[list[pq.ParquetFile]] = [[]]
    n = 0
    for f in files:
        if out[-1] and n + f.metadata.num_rows > rows:
            out.append([])
            n = 0
        out[-1].append(f)
        n += f.metadata.num_rows
    return out


def _read_one(f: pq.ParquetFile) -> tuple[pa.Table, pa.ChunkedArray]:
    """The solver's columns of one file, conformed, and its ``raw_hash`` column
    dictionary-encoded (read so when the file was opened with ``read_dictionary``: the
    64-character hash repeated on every fix is never spelled out)."""
    have = set(f.schema_arrow.names)
    t = f.read(columns=[c for c in READ_COLUMNS if c in have], use_threads=False)
    rh = t["raw_hash"]
    if not pa.types.is_dictionary(rh.type):
        rh = pc.dictionary_encode(rh)
    return conform_fixes(t.drop_columns(["raw_hash"])), rh


def _read_batch(files: list[pq.ParquetFile]) -> tuple[pa.Table, list[pa.Array]]:
    """:func:`_read_one` of these files, concatenated in order; several files are read at
    once (a small file's read is mostly waiting, and releases the GIL)."""
    if len(files) < 4:
        got = [_read_one(f) for f in files]
    else:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=READERS) as pool:
            got = list(pool.map(_read_one, files))
    chunks = [c.cast(pa.dictionary(pa.int32(), pa.string())) for _, rh in got
              for c in rh.chunks]
    return pa.concat_tables([t for t, _ in got]), chunks


def read_fix_arrays(files: list[pq.ParquetFile], batch_rows: int = BATCH_ROWS) -> FixArrays:
    """:func:`fix_arrays` of the fix tables of ``files`` concatenated in the order given,
    read in batches of about ``batch_rows`` fixes (only the columns the solver uses), each
    batch converted to numpy once, into arrays sized from the files' metadata: the whole
    table never sits in memory beside its arrays (at 1 s logging it would be as large
    again), and a survey of many small logs is not converted file by file.
    ``raw_hash`` is kept dictionary-encoded."""
    n = sum(f.metadata.num_rows for f in files)
    t_raw = np.empty(n, dtype=np.int64)
    raw_line = np.empty(n, dtype=np.int64)
    valid = np.empty(n, dtype=bool)
    unrated = np.empty(n, dtype=bool)
    local = np.empty(n, dtype=np.int64)  # node code among the names of its own batch
    floats = {name: np.empty(n, dtype=np.float64) for name in FLOATS}
    chunks, batch_names, at = [], [], 0
    for group in _batches(files, batch_rows):
        t, hashes = _read_batch(group)
        m = t.num_rows
        t_raw[at:at + m] = pc.cast(t["time"], pa.int64()).to_numpy(zero_copy_only=False)
        raw_line[at:at + m] = t["raw_line"].to_numpy()
        valid[at:at + m] = t["valid"].to_numpy(zero_copy_only=False).astype(bool)
        unrated[at:at + m] = _no_quality(t)
        for name in FLOATS:
            floats[name][at:at + m] = _float(t[name])
        names = pc.unique(t["node"]).to_pylist()
        local[at:at + m] = pc.index_in(t["node"], value_set=pa.array(names, pa.string())
                                       ).to_numpy(zero_copy_only=False)
        batch_names.append((at, at + m, names))
        chunks.extend(hashes)
        at += m
        del t
        pa.default_memory_pool().release_unused()  # the decoding buffers of that batch
    names = sorted({x for _, _, ns in batch_names for x in ns})
    lookup = {x: i for i, x in enumerate(names)}
    codes = np.empty(n, dtype=np.int64)
    for a, b, ns in batch_names:  # one entry per batch, not per fix
        codes[a:b] = np.array([lookup[x] for x in ns], dtype=np.int64)[local[a:b]]
    del local
    raw_hash = (pa.chunked_array(chunks) if chunks
                else pa.chunked_array([], pa.dictionary(pa.int32(), pa.string())))
    return _finish(names, codes, t_raw, raw_line, valid, floats, raw_hash, unrated)


def _no_quality(table: pa.Table) -> np.ndarray:
    """Which fixes carry no quality information (all False for tables before the column)."""
    if "no_quality" not in table.column_names:
        return np.zeros(table.num_rows, dtype=bool)
    return pc.fill_null(table["no_quality"], False).to_numpy(zero_copy_only=False).astype(bool)
