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
import pandas as pd

OPEN = np.iinfo(np.int64).max  # a window or log without an end


def covered(dep_node: np.ndarray, dep_start: np.ndarray, dep_end: np.ndarray,
            log_node: np.ndarray, log_first: np.ndarray, log_last: np.ndarray) -> np.ndarray:
    """Bool per deployment: a log of its node overlaps its window (see module doc).

    Times are integer microseconds; ``dep_end`` is :data:`OPEN` (or larger) for a node still
    out, ``log_first``/``log_last`` are :data:`OPEN` for a log whose extent is unknown
    (which covers every window of its node). Vectorised: one merge of deployments and logs
    on the node, so it costs (deployments x logs per node), never anything per fix.
    """
    n = len(dep_node)
    if n == 0 or len(log_node) == 0:
        return np.zeros(n, dtype=bool)
    dep = pd.DataFrame({"row": np.arange(n), "node": np.asarray(dep_node, dtype=object),
                        "d0": np.asarray(dep_start, dtype=np.int64),
                        "d1": np.asarray(dep_end, dtype=np.int64)})
    logs = pd.DataFrame({"node": np.asarray(log_node, dtype=object),
                         "l0": np.asarray(log_first, dtype=np.int64),
                         "l1": np.asarray(log_last, dtype=np.int64)})
    m = dep.merge(logs, on="node", how="inner")
    unknown = (m["l0"] == OPEN) | (m["l1"] == OPEN)
    overlap = unknown | ((m["l0"] <= m["d1"]) & (m["l1"] >= m["d0"]))
    out = np.zeros(n, dtype=bool)
    out[m.loc[overlap, "row"].to_numpy(dtype=np.int64)] = True
    return out
