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
        return self.raw_hash.take(pa.array(self.src[fix])).to_pylist()

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
        hashes = raw_hash.take(pa.array(rows))
        idx = pc.index_in(hashes, value_set=pc.unique(hashes)).to_numpy(zero_copy_only=False)
        idx = idx.astype(np.int64)
        first = np.full(int(idx.max()) + 1 if len(idx) else 0, np.iinfo(np.int64).max)
        np.minimum.at(first, idx, rows)
        return first[idx]
    return rank


def empty_fixes() -> pa.Table:
    """An empty fix table with the canonical schema."""
    return FIX_SCHEMA.empty_table()


def fix_arrays(table: pa.Table) -> FixArrays:
    """Sort, de-duplicate and convert a fix table (FIX_SCHEMA columns) to numpy columns."""
    if table.num_rows == 0:
        table = empty_fixes()
    t_raw = pc.cast(table["time"], pa.int64()).to_numpy(zero_copy_only=False)
    names = sorted(pc.unique(table["node"]).to_pylist())
    codes = pc.index_in(table["node"], value_set=pa.array(names, pa.string()))
    codes = codes.to_numpy(zero_copy_only=False).astype(np.int64)
    if len(names) >= MAX_NODES:
        raise UsageError(f"{len(names)} nodes in one solve; at most {MAX_NODES - 1} are supported",
                         hint="solve by node selection (--nodes)")
    raw_line = table["raw_line"].to_numpy()
    src, n_dup = first_epochs(codes, t_raw, raw_line, _appearance_rank(table["raw_hash"]))
    if src is not None:
        codes, t_raw, raw_line = codes[src], t_raw[src], raw_line[src]
    span = (int(t_raw.max()) - int(t_raw.min())) if len(t_raw) else 0
    if span >= (1 << TIME_BITS):
        raise UsageError("the fixes of one solve span more than 200 days",
                         hint="solve by node selection (--nodes)")

    def col(name: str) -> np.ndarray:
        values = _float(table[name])
        return values if src is None else values[src]

    valid = table["valid"].to_numpy(zero_copy_only=False).astype(bool)
    if "no_quality" in table.column_names:
        nq = pc.fill_null(table["no_quality"], False).to_numpy(zero_copy_only=False).astype(bool)
    else:
        nq = np.zeros(table.num_rows, dtype=bool)
    return FixArrays(
        node_names=names, node_code=codes, t_us=t_raw.astype(np.int64),
        lat=col("lat"), lon=col("lon"), h_ell=col("h_ell"), h_msl=col("h_msl"),
        geoid_sep=col("geoid_sep"), quality=col("quality"),
        valid=valid if src is None else valid[src],
        fix_type=col("fix_type"), n_sats=col("n_sats"), pdop=col("pdop"), hdop=col("hdop"),
        raw_hash=table["raw_hash"], raw_line=raw_line.astype(np.int64), n_duplicates=n_dup,
        src=np.arange(len(codes)) if src is None else src,
        no_quality=nq if src is None else nq[src],
    )
