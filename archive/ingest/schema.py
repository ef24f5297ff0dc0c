"""The canonical fix table and the rejects table: the contract between readers and the rest.

Every reader (NMEA 0183, delimited text) produces exactly these schemas. One fix is one epoch
of one node: a time, a position and what the receiver said about its quality. Columns that a
log does not carry are null, never invented.
"""

from __future__ import annotations

import pyarrow as pa

UTC_TIME = pa.timestamp("us", tz="UTC")

FIX_SCHEMA = pa.schema(
    [
        pa.field("node", pa.string(), nullable=False),  # node serial, per raw file
        pa.field("time", UTC_TIME, nullable=False),  # epoch time, UTC
        pa.field("lat", pa.float64(), nullable=False),  # degrees, + north (geographic CRS of the log, WGS 84)
        pa.field("lon", pa.float64(), nullable=False),  # degrees, + east
        pa.field("h_ell", pa.float64()),  # ellipsoidal height, m (null when unknown)
        pa.field("h_msl", pa.float64()),  # altitude above mean sea level as logged, m
        pa.field("geoid_sep", pa.float64()),  # geoid separation N (ellipsoid minus geoid), m
        pa.field("quality", pa.int8(), nullable=False),  # GGA fix quality 0-8 (-1 unknown)
        pa.field("fix_type", pa.int8()),  # GSA fix type 1 none, 2 2-D, 3 3-D (null unknown)
        pa.field("valid", pa.bool_(), nullable=False),  # quality > 0 and RMC status not V
        pa.field("n_sats", pa.int16()),  # satellites used
        pa.field("pdop", pa.float32()),
        pa.field("hdop", pa.float32()),
        pa.field("vdop", pa.float32()),
        pa.field("raw_hash", pa.string(), nullable=False),  # SHA-256 of the raw file
        pa.field("raw_line", pa.int64(), nullable=False),  # 1-based line of the position record
        # added with schema version 2 (tables of version 1 lack them: see conform_fixes)
        pa.field("sentence", pa.string()),  # NMEA sentence of the position: GGA GNS RMC GLL
        pa.field("no_quality", pa.bool_(), nullable=False),  # no fix quality, satellites, HDOP
        pa.field("weeks_added", pa.int16(), nullable=False),  # GPS week rollover correction
    ],
    metadata={"nodekeep.table": "fixes", "nodekeep.schema_version": "2"},
)

# Columns added after version 1, with the value they take in a table that lacks them (a fix
# table loaded before they existed): no sentence recorded, quality information as the
# reader of that time required it (every such fix had a GGA or a delimited record), no
# correction of the date.
ADDED_FIX_COLUMNS = {"sentence": None, "no_quality": False, "weeks_added": 0}
# How readers write fix tables to Parquet: the string columns that hold few distinct values
# (the node, the raw file's hash, the sentence) dictionary-encoded, which Parquet stores as
# it is instead of hashing every value. Read back, they are cast to FIX_SCHEMA by
# conform_fixes.
_DICT = pa.dictionary(pa.int32(), pa.string())
FIX_STORAGE_SCHEMA = pa.schema(
    [f.with_type(_DICT) if f.name in ("node", "raw_hash", "sentence") else f
     for f in FIX_SCHEMA], metadata=FIX_SCHEMA.metadata)
# the layout of version 1, for code building tables of the columns every reader gives
FIX_SCHEMA_V1 = pa.schema([f for f in FIX_SCHEMA if f.name not in ADDED_FIX_COLUMNS],
                          metadata={"nodekeep.table": "fixes", "nodekeep.schema_version": "1"})

REJECT_SCHEMA = pa.schema(
    [
        pa.field("raw_line", pa.int64(), nullable=False),  # 1-based line number in the raw file
        pa.field("reason", pa.string(), nullable=False),  # one of REJECT_REASONS
        pa.field("text", pa.string(), nullable=False),  # offending text, truncated to 120 chars
    ],
    metadata={"nodekeep.table": "rejects", "nodekeep.schema_version": "1"},
)

# Reason classes of rejected lines (kept short and stable: they are summarised per file).
REJECT_REASONS = {
    "checksum": "checksum does not match the sentence",
    "truncated": "sentence cut short (missing fields or checksum)",
    "malformed": "a field could not be read (bad number, hemisphere, time)",
    "binary": "non-text bytes (junk after a power loss, corrupt storage)",
    "no-date": "no date known for this epoch (no RMC/ZDA before it and no --date)",
    "out-of-range": "a value outside its possible range (latitude > 90, minutes >= 60, ...)",
    "unreadable": "line not understood by the delimited profile",
    "conflict": "sentences of one epoch disagree (position or date): no choice is made",
    "rollover": "date before the survey that no whole number of 1024 GPS weeks places in it",
}

FIXES_SORT_KEYS = [("node", "ascending"), ("time", "ascending"), ("raw_line", "ascending")]


def conform_fixes(table: pa.Table) -> pa.Table:
    """``table`` with every column of :data:`FIX_SCHEMA`, in its order and types: columns
    added after the table was written get their value of :data:`ADDED_FIX_COLUMNS` (null
    entries of them too, as left by concatenating tables of both versions)."""
    import numpy as np
    import pyarrow.compute as pc

    from archive.ingest.arrow_build import booleans, from_numpy

    n = table.num_rows
    cols = []
    for f in FIX_SCHEMA:
        fill = ADDED_FIX_COLUMNS.get(f.name)
        if f.name not in table.column_names:
            if fill is None:
                cols.append(pa.nulls(n, f.type))
            elif f.type == pa.bool_():
                cols.append(booleans(np.full(n, fill, dtype=bool)))
            else:
                cols.append(from_numpy(np.full(n, fill), f.type))
            continue
        col = table.column(f.name).cast(f.type)
        if fill is not None and col.null_count:
            col = pc.fill_null(col, pa.scalar(fill, f.type))
        cols.append(col)
    return pa.Table.from_arrays(cols, schema=FIX_SCHEMA)
