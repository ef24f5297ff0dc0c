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

OPEN = np.iinfo(np.int64).max  # a window or log without an end


def covered(dep_node: np.ndarray, dep_start: np.ndarray, dep_end: np.ndarray,
            log_node: np.ndarray, log_first: np.ndarray, log_last: np.ndarray) -> np.ndarray:
    """Bool per deployment: a log of its node overlaps its window (see module doc).

    Times are integer microseconds; ``dep_end`` is :data:`OPEN` (or larger) for a node still
    out, ``log_first``/``log_last`` are :data:`OPEN` for a log whose extent is unknown
    (which covers every window of its node). Vectorised: one join of deployments and logs
    on the node, so it costs (deployments x logs per node), never anything per fix.
    """
    n = len(dep_node)
    if n == 0 or len(log_node) == 0:
        return np.zeros(n, dtype=bool)
    dep = pa.table({"row": np.arange(n, dtype=np.int64), "node": _strings(dep_node),
                    "d0": np.asarray(dep_start, dtype=np.int64),
                    "d1": np.asarray(dep_end, dtype=np.int64)})
    logs = pa.table({"node": _strings(log_node),
                     "l0": np.asarray(log_first, dtype=np.int64),
                     "l1": np.asarray(log_last, dtype=np.int64)})
    m = dep.join(logs, keys="node", join_type="inner")
    row = m["row"].to_numpy()
    d0, d1 = m["d0"].to_numpy(), m["d1"].to_numpy()
    l0, l1 = m["l0"].to_numpy(), m["l1"].to_numpy()
    overlap = (l0 == OPEN) | (l1 == OPEN) | ((l0 <= d1) & (l1 >= d0))
    out = np.zeros(n, dtype=bool)
    out[row[overlap]] = True
    return out


def _strings(values: np.ndarray) -> pa.Array:
    """Node names as an Arrow string column."""
    values = np.asarray(values, dtype=object)
    try:
        return pa.array(values, pa.string())
    except (pa.ArrowInvalid, pa.ArrowTypeError):  # names that are not text yet
        return pa.array([None if v is None else str(v) for v in values], pa.string())
