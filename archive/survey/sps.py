"""SPS rev 2.1 point records (R receivers, S sources) and the header records around them.

Column layout of a point record (SEG SPS rev 2.1, 80 columns, 1-based inclusive)::

    1 record id R/S · 2-11 line (F10.2) · 12-21 point (F10.2) · 24 point index (I1)
    25-26 point code (A2) · 27-30 static (I4) · 31-34 depth (F4.1) · 35-38 datum (I4)
    39-40 uphole time (I2) · 41-46 water depth (F6.1) · 47-55 easting (F9.1)
    56-65 northing (F10.1) · 66-71 surface elevation (F6.1) · 72-74 day of year (I3)
    75-80 time hhmmss (3I2)

Header records (``H`` in column 1) are kept in file order as (record id = columns 1-4,
description = columns 5-32, data = columns 33-80). Relation (X) records are counted and
left alone. Reading is done on the whole file at once with numpy (no loop per record); the
first malformed record stops the load with ``file:line``, the columns and what was expected.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pyarrow as pa

from archive.errors import InputError
from archive.survey.schema import STATION_SCHEMA

RECORD_WIDTH = 80

# name, first column, last column (1-based inclusive), kind, required, what a value must be
POINT_FIELDS: tuple[tuple[str, int, int, str, bool, str], ...] = (
    ("line", 2, 11, "f", True, "line name, a number right-justified (F10.2)"),
    ("point", 12, 21, "f", True, "point number, a number right-justified (F10.2)"),
    ("blank", 22, 23, "blank", False, "blank columns"),
    ("index", 24, 24, "i", False, "point index, a digit 1-9 (I1)"),
    ("code", 25, 26, "a", False, "point code (A2)"),
    ("static", 27, 30, "i", False, "static correction in ms (I4)"),
    ("depth", 31, 34, "f", False, "point depth in metres (F4.1)"),
    ("datum", 35, 38, "i", False, "seismic datum in metres (I4)"),
    ("uphole", 39, 40, "i", False, "uphole time in ms (I2)"),
    ("water_depth", 41, 46, "f", False, "water depth in metres (F6.1)"),
    ("easting", 47, 55, "f", True, "map grid easting (F9.1)"),
    ("northing", 56, 65, "f", True, "map grid northing (F10.1)"),
    ("elevation", 66, 71, "f", False, "surface elevation (F6.1)"),
    ("day", 72, 74, "i", False, "day of year 1-366 (I3)"),
    ("time", 75, 80, "hms", False, "time of day hhmmss (3I2)"),
)


@dataclass
class SpsFile:
    """The point records of an SPS file and its header records, in file order."""

    points: pa.Table  # STATION_SCHEMA, R and S records (column "kind")
    headers: list[tuple[str, str, str]] = field(default_factory=list)
    revision: str = "2.1"
    ignored: dict[str, int] = field(default_factory=dict)  # record id -> count (X records)

    def receivers(self) -> pa.Table:
        """The R records only."""
        return self.points.filter(pa.compute.equal(self.points["kind"], "R"))

    def sources(self) -> pa.Table:
        """The S records only."""
        return self.points.filter(pa.compute.equal(self.points["kind"], "S"))


def _columns(fixed: np.ndarray, first: int, last: int) -> np.ndarray:
    """Columns first..last (1-based) of an (n, 80) uint8 array as stripped str values."""
    width = last - first + 1
    block = np.ascontiguousarray(fixed[:, first - 1:last]).view(f"S{width}").ravel()
    return np.char.strip(np.char.decode(block, "latin-1"))


def _split_lines(data: bytes) -> list[bytes]:
    lines = data.split(b"\n")
    if lines and lines[-1] == b"":
        lines.pop()
    return lines


def read_sps(data: bytes, path: str = "<sps>") -> SpsFile:
    """Parse an SPS rev 2.1 point file (R/S records, H headers kept, X records counted)."""
    raw = _split_lines(data)
    if not raw:
        raise InputError(path, "the file is empty", expected="SPS rev 2.1 H, R or S records")
    arr = np.char.rstrip(np.array(raw), b"\r \t\x1a")
    line_no = np.arange(1, len(arr) + 1, dtype=np.int64)
    ids = arr.astype("S1")

    headers = _headers(arr[ids == b"H"])
    revision = _revision(headers, path)

    is_point = (ids == b"R") | (ids == b"S")
    known = is_point | (ids == b"H") | (ids == b"X") | (ids == b"")
    if not known.all():
        i = int(np.flatnonzero(~known)[0])
        rid = raw[i][:1].decode("latin-1")
        raise InputError(path, f"unknown record type {rid!r}", line=int(line_no[i]),
                         columns="1", expected="H (header), R (receiver), S (source) or X "
                         "(relation) in column 1")
    ignored = {"X": int((ids == b"X").sum())} if (ids == b"X").any() else {}

    rec = arr[is_point]
    rec_lines = line_no[is_point]
    too_long = np.char.str_len(rec) > RECORD_WIDTH
    if too_long.any():
        i = int(np.flatnonzero(too_long)[0])
        raise InputError(path, f"the record is {len(rec[i])} columns long",
                         line=int(rec_lines[i]), columns=f"{RECORD_WIDTH + 1}-",
                         expected=f"at most {RECORD_WIDTH} columns (SPS rev 2.1 point record)")
    fixed = np.frombuffer(rec.astype(f"S{RECORD_WIDTH}").tobytes(), dtype=np.uint8)
    fixed = fixed.reshape(-1, RECORD_WIDTH).copy()
    fixed[fixed == 0] = 32  # short records: missing trailing columns read as blank

    values, bad = {}, []
    for name, first, last, kind, required, expected in POINT_FIELDS:
        text = _columns(fixed, first, last)
        v, b = _convert(text, kind, required)
        values[name] = v
        if b.any():
            bad.append((int(np.flatnonzero(b)[0]), b, name, first, last, text, expected))
    if bad:
        i, _, name, first, last, text, expected = min(bad, key=lambda t: t[0])
        n_bad = int(np.logical_or.reduce([t[1] for t in bad]).sum())
        more = f"; {n_bad - 1} more malformed records" if n_bad > 1 else ""
        cols = str(first) if first == last else f"{first}-{last}"
        shown = "blank" if text[i] == "" else repr(str(text[i]))
        raise InputError(path, f"{name.replace('_', ' ')} is {shown}{more}",
                         line=int(rec_lines[i]), columns=cols, expected=expected,
                         hint="correct the record (columns per SPS rev 2.1) and load again")

    index = values["index"]
    codes = values["code"]
    table = pa.table(
        {
            "line": values["line"],
            "point": values["point"],
            "index": np.where(np.isnan(index), 1, index).astype(np.int8),
            "code": pa.array(np.where(codes == "", None, codes).tolist(), type=pa.string()),
            "easting": values["easting"],
            "northing": values["northing"],
            "elevation": pa.array(values["elevation"], from_pandas=True),
            "kind": ids[is_point].astype("U1"),
            "src_line": rec_lines,
        },
        schema=STATION_SCHEMA,
    )
    return SpsFile(points=table, headers=headers, revision=revision, ignored=ignored)


def _convert(text: np.ndarray, kind: str, required: bool) -> tuple[np.ndarray, np.ndarray]:
    """Typed values and a mask of malformed entries for one fixed-width field."""
    empty = text == ""
    if kind == "a":
        return text, np.zeros(len(text), dtype=bool)
    if kind == "blank":
        return text, ~empty
    if kind == "hms":
        digits = np.char.isdigit(text) & (np.char.str_len(text) == 6)
        v = pd.to_numeric(pd.Series(np.where(digits, text, "")), errors="coerce").to_numpy()
        hh, mm, ss = v // 10000, (v // 100) % 100, v % 100
        ok = digits & (hh < 24) & (mm < 60) & (ss < 61)
        bad = ~ok & ~empty
        return v, bad | (empty & required)
    v = pd.to_numeric(pd.Series(text), errors="coerce").to_numpy(dtype=np.float64)
    bad = (np.isnan(v) | ~np.isfinite(v)) & ~empty
    if kind == "i":
        bad |= ~np.isnan(v) & (v != np.round(v))
    if required:
        bad |= empty
    return v, bad


def _headers(h: np.ndarray) -> list[tuple[str, str, str]]:
    """(record id, description, data) of the header records, in file order."""
    if len(h) == 0:
        return []
    text = np.char.decode(h.astype(f"S{max(RECORD_WIDTH, h.dtype.itemsize)}"), "latin-1")
    rid = np.char.rstrip(np.array([s[:4] for s in text.tolist()]))
    desc = [s[4:32].strip() for s in text.tolist()]
    data = [s[32:].rstrip() for s in text.tolist()]
    return list(zip(rid.tolist(), desc, data, strict=True))


def _revision(headers: list[tuple[str, str, str]], path: str) -> str:
    """The SPS revision named by H00 ('2.1' when no H00 says otherwise); refuse rev 0."""
    for rid, desc, data in headers:
        if rid.startswith("H00"):
            text = f"{desc} {data}".upper()
            if "SPS001" in text.replace(" ", "") or "SPS 0" in text:
                raise InputError(path, "this is an SPS rev 0 file (H00 says SPS001)",
                                 columns="1-80", expected="SPS rev 2.1 point records",
                                 hint="rev 0 puts line and point in other columns; convert "
                                      "the file to rev 2.1 or CSV")
            return data.strip() or "2.1"
    return "2.1"
