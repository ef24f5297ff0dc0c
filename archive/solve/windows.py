"""Which fixes belong to which deployment: windows from the log, minus settle margins.

A window is (node, start, end, station, kind). Logged windows come from the deployment
log: [deployed + settle_start, retrieved − settle_end] (a node still in the ground has no
end). Only fixes of the window's node inside it enter the cloud, so transit and camp fixes
never do. All windows are looked up at once with one ``searchsorted`` on the composite
(node, time) key; overlapping windows (a log error) each get their own copy of the fixes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from archive.solve.fixarrays import FixArrays
from archive.solve.segments import expand_ranges
from archive.times import us_array

FOREVER = np.iinfo(np.int64).max // 4


@dataclass
class Windows:
    """Parallel arrays, one element per window."""

    node: np.ndarray  # node serial (object array of str)
    code: np.ndarray  # node code in the fix arrays, -1 when the node has no fixes
    start: np.ndarray  # µs, inclusive
    end: np.ndarray  # µs, inclusive
    line: np.ndarray
    point: np.ndarray
    index: np.ndarray
    kind: np.ndarray  # object array: "logged" | "unlogged"
    occupation: np.ndarray  # delivered point index of the occupation (0: unlogged)
    deployed: np.ndarray  # µs, the occupation's logged window (FOREVER: none / still out)
    retrieved: np.ndarray

    def __len__(self) -> int:
        return len(self.start)

    @staticmethod
    def concat(parts: list[Windows]) -> Windows:
        """Windows of several lists, in order."""
        return Windows(*(np.concatenate([getattr(p, f) for p in parts])
                         for f in Windows.__dataclass_fields__))


def _us(col: pa.ChunkedArray) -> np.ndarray:
    return us_array(col, FOREVER)


def node_codes(names: np.ndarray, fx: FixArrays) -> np.ndarray:
    """Code of each node serial in the fix arrays (-1 when it has no fixes)."""
    lookup = {n: i for i, n in enumerate(fx.node_names)}
    return np.array([lookup.get(str(n), -1) for n in names], dtype=np.int64)


def no_windows() -> Windows:
    """An empty list of windows."""
    return Windows(*(np.zeros(0, dtype=d) for d in
                     (object, np.int64, np.int64, np.int64, np.float64, np.float64, np.int8,
                      object, np.int8, np.int64, np.int64)))


def logged_windows(deployments: pa.Table, fx: FixArrays, settle_start_s: float,
                   settle_end_s: float) -> tuple[Windows, np.ndarray, np.ndarray]:
    """Windows of the deployment log; also the raw (untrimmed) start/end of each, µs.

    Each window carries its occupation's delivered point index (the table's ``occupation``
    column, numbered by :mod:`archive.survey.occupations` when the table has none).
    """
    from archive.survey.occupations import occupation_array

    names = np.array(deployments["node"].to_pylist(), dtype=object)
    raw_start = _us(deployments["deployed"])
    raw_end = _us(deployments["retrieved"])
    start = raw_start + int(round(settle_start_s * 1e6))
    end = np.where(raw_end >= FOREVER, FOREVER, raw_end - int(round(settle_end_s * 1e6)))
    w = Windows(
        node=names, code=node_codes(names, fx), start=start, end=end,
        line=deployments["line"].to_numpy().astype(np.float64),
        point=deployments["point"].to_numpy().astype(np.float64),
        index=deployments["index"].to_numpy().astype(np.int8),
        kind=np.full(len(names), "logged", dtype=object),
        occupation=occupation_array(deployments).astype(np.int8),
        deployed=raw_start.copy(), retrieved=raw_end.copy(),
    )
    return w, raw_start, raw_end


def usable_counts(fx: FixArrays, usable: np.ndarray, code: np.ndarray, start: np.ndarray,
                  end: np.ndarray) -> np.ndarray:
    """Number of ``usable`` fixes inside each (node, start..end) window."""
    lo, hi = window_ranges(fx, code, start, end)
    cum = np.zeros(len(fx) + 1, dtype=np.int64)
    np.cumsum(usable, out=cum[1:])
    return cum[hi] - cum[lo]


def window_ranges(fx: FixArrays, code: np.ndarray, start: np.ndarray, end: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray]:
    """[lo, hi) index range of the fixes of each (node, start..end) window."""
    key = fx.key()
    safe = np.maximum(code, 0)
    lo = np.searchsorted(key, fx.key_of(safe, start), side="left")
    hi = np.searchsorted(key, fx.key_of(safe, end), side="right")
    empty = (code < 0) | (end < start)
    lo = np.where(empty, 0, lo)
    hi = np.where(empty, 0, np.maximum(hi, lo))
    return lo.astype(np.int64), hi.astype(np.int64)


def gather(fx: FixArrays, w: Windows) -> tuple[np.ndarray, np.ndarray]:
    """Fix indices of every window, concatenated, and the window number of each."""
    lo, hi = window_ranges(fx, w.code, w.start, w.end)
    return expand_ranges(lo, hi)


def inside_any(fx: FixArrays, code: np.ndarray, start: np.ndarray, end: np.ndarray
               ) -> np.ndarray:
    """Bool per fix: inside at least one of the given windows of its node."""
    lo, hi = window_ranges(fx, code, start, end)
    cover = np.zeros(len(fx) + 1, dtype=np.int64)
    np.add.at(cover, lo, 1)
    np.add.at(cover, hi, -1)
    return np.cumsum(cover[:-1]) > 0
