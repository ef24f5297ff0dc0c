"""What a reader returns for one raw file, and the Arrow helpers readers share."""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from archive.ingest.arrow_build import coded_strings, constant_strings, from_numpy, values_view
from archive.ingest.schema import FIX_SCHEMA, REJECT_REASONS, REJECT_SCHEMA

__all__ = ["ParseResult", "constant_strings", "line_texts", "rejects_table", "empty_fixes",
           "empty_rejects", "sort_fixes"]

REJECT_TEXT_MAX = 120


@dataclass
class ParseResult:
    """Fixes and rejects of one raw file, with the accounting of its lines.

    Every line is exactly one of accepted (it fed a fix or an epoch's date / DOPs),
    rejected (one row of ``rejects``) or ignored (blank, not a sentence, a sentence type
    nodekeep does not use): ``n_accepted + n_rejected + n_ignored == n_lines``.
    """

    fixes: pa.Table
    rejects: pa.Table
    n_lines: int
    n_accepted: int
    n_rejected: int
    n_ignored: int
    ignored: dict[str, int] = field(default_factory=dict)  # ignored lines by sentence type
    notes: list[dict[str, Any]] = field(default_factory=list)  # e.g. week rollover

    def reject_counts(self) -> dict[str, int]:
        """Number of rejected lines by reason class (only classes that occur)."""
        if self.rejects.num_rows == 0:
            return {}
        vc = pc.value_counts(self.rejects.column("reason")).to_pylist()
        return {d["values"]: int(d["counts"]) for d in sorted(vc, key=lambda d: d["values"])}

    @property
    def n_fixes(self) -> int:
        return self.fixes.num_rows

    @property
    def n_valid(self) -> int:
        return int(pc.sum(self.fixes.column("valid").cast(pa.int64())).as_py() or 0)

    @property
    def n_no_quality(self) -> int:
        """Fixes without quality information (an epoch of RMC/GLL sentences only)."""
        if "no_quality" not in self.fixes.column_names:
            return 0
        return int(pc.sum(self.fixes.column("no_quality").cast(pa.int64())).as_py() or 0)

    def time_range(self) -> tuple[datetime | None, datetime | None]:
        """First and last fix time (UTC), or (None, None) without fixes."""
        if self.fixes.num_rows == 0:
            return None, None
        mm = pc.min_max(self.fixes.column("time")).as_py()
        return mm["min"], mm["max"]

    def summary(self) -> dict[str, Any]:
        t0, t1 = self.time_range()
        return {"n_lines": self.n_lines, "n_accepted": self.n_accepted,
                "n_rejected": self.n_rejected, "n_ignored": self.n_ignored,
                "n_fixes": self.n_fixes, "n_valid": self.n_valid,
                "n_no_quality": self.n_no_quality, "t_first": t0,
                "t_last": t1, "rejects": self.reject_counts(),
                "ignored": dict(sorted(self.ignored.items())), "notes": self.notes}


def line_texts(buf: np.ndarray, starts: np.ndarray, ends: np.ndarray,
               limit: int = REJECT_TEXT_MAX) -> pa.Array:
    """The text of lines [starts, ends) of ``buf``, truncated to ``limit`` bytes, as strings.

    Bytes outside printable ASCII (tab kept) become ``?`` so the result is always valid text; the raw
    bytes themselves stay in the stored raw file.
    """
    starts = np.asarray(starts, dtype=np.int64)
    lengths = np.minimum(np.asarray(ends, dtype=np.int64) - starts, limit).clip(0)
    offsets = np.zeros(len(starts) + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    total = int(offsets[-1])
    idx = np.arange(total, dtype=np.int64) - np.repeat(offsets[:-1], lengths) \
        + np.repeat(starts, lengths)
    data = buf[idx].copy()
    data[((data < 32) & (data != 9)) | (data > 126)] = ord("?")
    return pa.StringArray.from_buffers(len(starts), pa.py_buffer(offsets.astype(np.int32)),
                                       pa.py_buffer(data.tobytes()))


def rejects_table(lines: np.ndarray, reasons: np.ndarray, texts: pa.Array) -> pa.Table:
    """A REJECT_SCHEMA table from 1-based line numbers, reason names and texts."""
    names, codes = np.unique(np.asarray(reasons, dtype=object).astype(str), return_inverse=True)
    bad = set(names.tolist()) - set(REJECT_REASONS)
    if bad:
        raise ValueError(f"unknown reject reasons {sorted(bad)}")
    return pa.table({"raw_line": from_numpy(np.asarray(lines), pa.int64()),
                     "reason": coded_strings(codes.reshape(-1), names.tolist()),
                     "text": texts}, schema=REJECT_SCHEMA)


def empty_fixes() -> pa.Table:
    return pa.Table.from_batches([], schema=FIX_SCHEMA)  # (empty_table() imports pandas)


def empty_rejects() -> pa.Table:
    return pa.Table.from_batches([], schema=REJECT_SCHEMA)


def _in_order(table: pa.Table) -> bool:
    """True when ``table`` is already sorted by time, then raw line (no nulls in either;
    both 64-bit integers underneath, :data:`archive.ingest.schema.FIX_SCHEMA`)."""
    t, r = table.column("time"), table.column("raw_line")
    if t.null_count or r.null_count:
        return False
    dt = np.diff(values_view(t, np.int64))
    if (dt < 0).any():
        return False
    same = dt == 0
    return not (same.any() and (np.diff(values_view(r, np.int64))[same] < 0).any())


def sort_fixes(table: pa.Table) -> pa.Table:
    """Fixes sorted by time, then raw line (a stable order for one node's file).

    A table already in that order (the usual case: a log is written as time goes on) is
    returned as it is; the sort is stable, so that is the table sorting would give.
    """
    if table.num_rows < 2 or _in_order(table):
        return table
    return table.sort_by([("time", "ascending"), ("raw_line", "ascending")])
