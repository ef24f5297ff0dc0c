"""Reading the delimited-text survey inputs: header mapping, line numbers, typed columns.

Every reader here keeps the 1-based line number of each record in its file, so a problem can
be named as ``file:line``. A field that cannot be read raises :class:`InputError` with the
file, the line, the column and what was expected: a half-read table is never loaded.
"""

from __future__ import annotations

import csv
import io
import re

import numpy as np
import pandas as pd
import pyarrow as pa

from archive.errors import InputError, UsageError


def parse_column_mapping(text: str | dict[str, str] | None, known: tuple[str, ...]) -> dict[str, str]:
    """``'node=Serial,line=Line'`` -> ``{'node': 'Serial', 'line': 'Line'}`` (field -> header).

    Field names must be among ``known``; headers are matched case-insensitively.
    """
    if not text:
        return {}
    if isinstance(text, dict):
        pairs = list(text.items())
    else:
        pairs = []
        for part in str(text).split(","):
            if not part.strip():
                continue
            if "=" not in part:
                raise UsageError(f"column mapping {part.strip()!r} has no '='",
                                 hint="write it as field=Header, e.g. node=Serial,line=Line")
            k, v = part.split("=", 1)
            pairs.append((k.strip(), v.strip()))
    out: dict[str, str] = {}
    for k, v in pairs:
        if k not in known:
            raise UsageError(f"unknown field {k!r} in the column mapping",
                             hint=f"fields are {', '.join(known)}")
        if not v:
            raise UsageError(f"no header given for field {k!r} in the column mapping")
        out[k] = v
    return out


class CsvColumns:
    """The string columns of a CSV file keyed by field name, with each record's line number."""

    def __init__(self, path: str, columns: dict[str, np.ndarray], lines: np.ndarray) -> None:
        self.path = path
        self.columns = columns
        self.lines = lines

    def __len__(self) -> int:
        return len(self.lines)

    def has(self, name: str) -> bool:
        """True when the file has this field."""
        return name in self.columns

    def text(self, name: str) -> np.ndarray:
        """A field as stripped strings ('' when empty)."""
        return self.columns[name]

    def _fail(self, name: str, bad: np.ndarray, expected: str) -> None:
        idx = np.flatnonzero(bad)
        first = int(idx[0])
        more = f"; {len(idx) - 1} more such records" if len(idx) > 1 else ""
        value = str(self.columns[name][first])
        raise InputError(self.path, f"cannot read {value!r} as {name}{more}",
                         line=int(self.lines[first]), columns=name, expected=expected,
                         hint="correct the file and load it again")

    def floats(self, name: str, *, required: bool = True) -> np.ndarray:
        """A field as float64 (NaN where empty and not required)."""
        raw = self.columns[name]
        empty = raw == ""
        values = pd.to_numeric(pd.Series(raw), errors="coerce").to_numpy(dtype=np.float64)
        bad = np.isnan(values) & ~empty | (~np.isfinite(values) & ~np.isnan(values))
        if required:
            bad |= empty
        if bad.any():
            self._fail(name, bad, "a number" if not required else "a number (required)")
        return values

    def ints(self, name: str, *, default: int, lo: int, hi: int) -> np.ndarray:
        """A small integer field (``default`` where empty), each value within [lo, hi]."""
        raw = self.columns[name]
        values = pd.to_numeric(pd.Series(np.where(raw == "", str(default), raw)),
                               errors="coerce").to_numpy(dtype=np.float64)
        bad = np.isnan(values) | (values != np.round(values)) | (values < lo) | (values > hi)
        if bad.any():
            self._fail(name, bad, f"a whole number from {lo} to {hi}")
        return values.astype(np.int64)

    def times(self, name: str, *, required: bool = True, date_only: bool = False
              ) -> pa.Array:
        """An ISO 8601 field as timestamp[us, UTC]; a time without offset is taken as UTC.
        A date without a time of day (midnight) is refused unless ``date_only`` allows it,
        and a year and month alone always (a record cut short inside its time reads so)."""
        raw = self.columns[name]
        empty = raw == ""
        parsed = pd.to_datetime(pd.Series(np.where(empty, None, raw), dtype=object),
                                errors="coerce", utc=True, format="ISO8601")
        shape = _DATE if date_only else _DATE_TIME
        whole = pd.Series(raw, dtype=object).str.match(shape).to_numpy(dtype=bool)
        bad = (parsed.isna().to_numpy() | ~whole) & ~empty
        if required:
            bad |= empty
        if bad.any():
            what = ("an ISO 8601 date, e.g. 2024-05-01, or date and time" if date_only
                    else "an ISO 8601 date and time of day, e.g. 2024-05-01T06:30:00Z")
            self._fail(name, bad, what + (" (required)" if required else ""))
        return pa.array(parsed.dt.as_unit("us"), type=pa.timestamp("us", tz="UTC"))


_DATE = re.compile(r"\d{4}-?\d{2}-?\d{2}(?:$|[T ])")
"""The start of an ISO 8601 calendar date: year, month and day (extended or basic)."""
_DATE_TIME = re.compile(r"(?:\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}|\d{8}T\d{4})")
"""The start of an ISO 8601 date and time of day, down to the minute at least, in the
extended (2024-05-01T06:30) or the basic format (20240501T0630)."""


def read_csv_columns(
    data: bytes,
    path: str,
    required: tuple[str, ...],
    optional: tuple[str, ...] = (),
    mapping: dict[str, str] | None = None,
) -> CsvColumns:
    """Read a CSV file with a header row into string columns of the wanted fields.

    A file that ends without a line break in a record short of the header's fields, whose
    missing fields the other records fill, is refused as cut short.

    ``mapping`` maps a field to the header that holds it (default: the field's own name);
    headers match case-insensitively and ignoring surrounding blanks. Blank records are
    skipped; line numbers are physical lines of the file (the header's first line is 1, and a
    quoted field that holds line breaks moves every later record down by as many lines).
    """
    mapping = mapping or {}
    try:
        df = pd.read_csv(io.BytesIO(data), dtype=str, keep_default_na=False,
                         skip_blank_lines=False, encoding="utf-8-sig", skipinitialspace=True)
    except pd.errors.EmptyDataError:
        raise InputError(path, "the file is empty",
                         expected=f"a header row naming {','.join(required)}") from None
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as exc:
        raise InputError(path, f"not readable as CSV: {str(exc).strip()}",
                         expected="comma-separated values with a header row") from None
    headers = {str(h).strip().lower(): h for h in df.columns}
    picked: dict[str, np.ndarray] = {}
    missing = []
    for name in (*required, *optional):
        header = mapping.get(name, name)
        key = header.strip().lower()
        if key not in headers:
            if name in required:
                missing.append(header if header == name else f"{header} (for {name})")
            continue
        picked[name] = np.char.strip(df[headers[key]].to_numpy(dtype=str))
    if missing:
        raise InputError(path, f"missing column(s) {', '.join(missing)}", line=1,
                         expected=f"a header row with {','.join(required)}"
                                  + (f" and optionally {','.join(optional)}" if optional else ""),
                         hint="name the columns with --columns field=Header if they differ")
    lines = _physical_lines(df)
    _refuse_cut_record(data, path, df, lines)
    if picked:
        filled = np.zeros(len(df), dtype=bool)
        for col in df.columns:
            filled |= np.char.strip(df[col].to_numpy(dtype=str)) != ""
        picked = {k: v[filled] for k, v in picked.items()}
        lines = lines[filled]
    return CsvColumns(path, picked, lines)


def _refuse_cut_record(data: bytes, path: str, df: pd.DataFrame, lines: np.ndarray) -> None:
    """Refuse a file that ends without a line break in a record with fewer fields than the
    header, when the fields it lacks hold values in the other records: the file was cut
    short (a copy interrupted, a download stopped) and the record's last fields are lost,
    not empty. (A writer that leaves off trailing fields empty in every record is fine; a
    record cut just after a field separator cannot be told from one with an empty field.)
    The file is parsed whole, with any line ends and quoted fields holding line breaks."""
    if not data or data.rstrip(b" \t").endswith((b"\n", b"\r")) or not len(lines):
        return
    text = data.decode("utf-8-sig", errors="replace")
    try:
        rows = [r for r in csv.reader(io.StringIO(text, newline="")) if any(f.strip() for f in r)]
    except csv.Error:  # a NUL byte, say: the fields' own checks will name it
        return
    n, n_fields = (len(rows[-1]), len(df.columns)) if len(rows) > 1 else (0, 0)
    if n >= n_fields:
        return
    others = df.iloc[:-1, n:].fillna("")
    if not len(others) or not others.apply(lambda c: c.str.strip().ne("").any()).any():
        return  # those fields are empty in every other record too
    raise InputError(path, f"the last record is cut short: {n} of the header's {n_fields} "
                           "fields, and the file ends without a line break",
                     line=int(lines[-1]), expected="a whole record on the last line",
                     hint="the file was probably truncated in a copy or download: "
                          "load a complete copy")


def _physical_lines(df: pd.DataFrame) -> np.ndarray:
    """The physical line each record starts on: 2 plus the records before it plus the line
    breaks inside quoted fields of the header and of the records before it."""
    n = len(df)
    breaks = np.zeros(n, dtype=np.int64)
    for col in df.columns:
        breaks += df[col].str.count("\n").fillna(0).to_numpy(dtype=np.int64)
    header = sum(str(h).count("\n") for h in df.columns)
    before = np.concatenate([[0], np.cumsum(breaks)[:-1]]) if n else breaks
    return (2 + header + np.arange(n, dtype=np.int64) + before).astype(np.int64)
