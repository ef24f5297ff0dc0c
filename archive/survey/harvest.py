"""Which deployments are covered by a loaded log, and which still await harvest.

A node records its fixes while it sits in the ground; the crew reads them out (harvests
the node) when it is picked up, and only then can its log be loaded. Until then a
deployment in the log has nothing to be solved from, which is not the same as a log that
holds no usable fix in the window (a node that died, or was never switched on): the first
awaits harvest, the second is unoccupied.

A deployment is *covered* when a loaded log of its node spans time inside its window:
the log's first and last fix times ``[t_first, t_last]`` (as the catalog records them for
each raw file) overlap ``[deployed, retrieved]`` (to the end of time while the node is
still out). A log whose times the catalog does not know (an archive loaded before those
columns were filled) counts as covering every window of its node, which solves the
deployment as before.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

OPEN = np.iinfo(np.int64).max  # a window or log without an end


def covered(dep_node: np.ndarray | pa.Array, dep_start: np.ndarray, dep_end: np.ndarray,
            log_node: np.ndarray | pa.Array, log_first: np.ndarray, log_last: np.ndarray
            ) -> np.ndarray:
    """Bool per deployment: a log of its node overlaps its window (see module doc).

    Node names are numpy or Arrow arrays; times are integer microseconds; ``dep_end`` is
    :data:`OPEN` (or larger) for a node still out, ``log_first``/``log_last`` are :data:`OPEN` for a log whose extent is unknown
    (which covers every window of its node). Vectorised: deployments and logs are paired on
    the node (:func:`equal_pairs`), so it costs (deployments x logs per node), never
    anything per fix.
    """
    n = len(dep_node)
    if n == 0 or len(log_node) == 0:
        return np.zeros(n, dtype=bool)
    codes = pc.dictionary_encode(pa.concat_arrays([_strings(dep_node), _strings(log_node)])
                                 ).indices.to_numpy(zero_copy_only=False)
    row, log = equal_pairs(codes[:n], codes[n:])  # each deployment with each log of its node
    d0, d1 = np.asarray(dep_start, dtype=np.int64)[row], np.asarray(dep_end, dtype=np.int64)[row]
    l0, l1 = np.asarray(log_first, dtype=np.int64)[log], np.asarray(log_last, dtype=np.int64)[log]
    overlap = (l0 == OPEN) | (l1 == OPEN) | ((l0 <= d1) & (l1 >= d0))
    out = np.zeros(n, dtype=bool)
    out[row[overlap]] = True
    return out


def equal_pairs(left: np.ndarray, right: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Every pair ``(i, j)`` with ``left[i] == right[j]`` (integer codes), ordered by ``i``
    then ``j``: an inner join of two key columns in numpy (a sort and two binary searches,
    no per-row loop)."""
    left, right = np.asarray(left, dtype=np.int64), np.asarray(right, dtype=np.int64)
    order = np.argsort(right, kind="stable")
    ordered = right[order]
    lo = np.searchsorted(ordered, left, "left")
    count = np.searchsorted(ordered, left, "right") - lo
    i = np.repeat(np.arange(len(left), dtype=np.int64), count)
    start = np.repeat(lo - (np.cumsum(count) - count), count)
    return i, order[np.arange(int(count.sum()), dtype=np.int64) + start]


def _strings(values: np.ndarray | pa.Array) -> pa.Array:
    """Node names as an Arrow string column (an Arrow column is taken as it is)."""
    if isinstance(values, pa.Array):
        return values.cast(pa.string())
    values = np.asarray(values, dtype=object)
    try:
        return pa.array(values, pa.string())
    except (pa.ArrowInvalid, pa.ArrowTypeError):  # names that are not text yet
        return pa.array([None if v is None else str(v) for v in values], pa.string())
