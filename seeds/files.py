"""Writers of the scenario's input files: SPS rev 2.1 preplot and the CSV tables.

The SPS point records follow the rev 2.1 column layout (SEG SPS format rev 2.1, Jan 2006,
point record layout): record id in column 1, line F10.2 in 2-11, point F10.2 in 12-21,
index in 24, code in 25-26, ..., easting F9.1 in 47-55, northing F10.1 in 56-65,
elevation F6.1 in 66-71, day of year and time in 72-80 (left blank in a preplot: nothing
has been surveyed yet). Header records carry the item id in columns 1-4, a description in
5-32 and the value from column 33.
"""

from __future__ import annotations

import csv
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np


def sps_header(item: str, description: str, value: str) -> str:
    """One SPS header record: id in 1-4, description in 5-32, value from 33 (80 columns)."""
    return f"{item:<4.4}{description:<28.28}{value:<48.48}".rstrip()


def sps_point(kind: str, line: float, point: float, easting: float, northing: float,
              elevation: float, *, index: int = 1, code: str = "G1") -> str:
    """One SPS rev 2.1 point record (R or S) without survey time."""
    rec = (f"{kind:1.1}{line:10.2f}{point:10.2f}  {index:1d}{code:<2.2}"
           f"{0:4d}{0.0:4.1f}{0:4d}{0:2d}{0.0:6.1f}"
           f"{easting:9.1f}{northing:10.1f}{elevation:6.1f}")
    if len(rec) != 71:
        raise ValueError(f"value too wide for its SPS column: {rec!r}")
    return rec


def write_preplot(path: Path, headers: Sequence[tuple[str, str, str]], line: np.ndarray,
                  point: np.ndarray, e: np.ndarray, n: np.ndarray, elev: np.ndarray) -> None:
    """Write an SPS rev 2.1 receiver preplot (H records, then one R record per station)."""
    rows = [sps_header(*h) for h in headers]
    rows += [sps_point("R", float(a), float(b), float(c), float(d), float(z))
             for a, b, c, d, z in zip(line, point, e, n, elev, strict=True)]
    path.write_text("\r\n".join(rows) + "\r\n", encoding="ascii", newline="")


def iso(t0: np.datetime64, seconds: Iterable[float]) -> list[str]:
    """ISO 8601 UTC text (``Z``, whole seconds) of times given in seconds after ``t0``."""
    s = np.round(np.asarray(list(seconds), dtype=np.float64)).astype(np.int64)
    stamps = (t0 + s.astype("timedelta64[s]")).astype("datetime64[s]")
    return [f"{x}Z" for x in stamps.astype(str)]


def write_csv(path: Path, header: Sequence[str], rows: Iterable[Sequence[Any]]) -> None:
    """A plain comma-separated file with a header row (LF line ends, UTF-8)."""
    with open(path, "w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(header)
        w.writerows(rows)
