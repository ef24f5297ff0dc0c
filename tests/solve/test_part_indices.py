"""The point index of a moved node's later part: M + r, or the index it was delivered under.

Rules from docs/delivery.md (a moved node's parts): M is the highest point index used at
the line and point (the log's occupations, retired ones, the preplot's, and those later
parts were delivered under), r the rank of the occupation among the log's occupations
there. Worked by hand below.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from archive.solve.parts import later_part_index, used_indices
from archive.survey.schema import DEPLOYMENT_SCHEMA


def _log(rows: list[tuple[float, float, int]]) -> pa.Table:
    n = len(rows)
    t0 = pa.scalar(0, pa.timestamp("us", tz="UTC"))
    cols = {"node": [f"N{i}" for i in range(n)], "line": [r[0] for r in rows],
            "point": [r[1] for r in rows], "index": [1] * n, "deployed": [t0] * n,
            "retrieved": [None] * n, "src_line": list(range(2, n + 2)),
            "occupation": [r[2] for r in rows]}
    return pa.table({f.name: pa.array(cols[f.name], f.type) for f in DEPLOYMENT_SCHEMA},
                    schema=DEPLOYMENT_SCHEMA)


def test_m_plus_r_and_kept_indices():
    # 1001/5001 occupied twice (1, 2); 1001/5002 once (1); 1001/5003 once (1)
    log = _log([(1001.0, 5001.0, 1), (1001.0, 5001.0, 2), (1001.0, 5002.0, 1),
                (1001.0, 5003.0, 1)])
    line = np.array([1001.0, 1001.0, 1001.0, 1001.0])
    point = np.array([5001.0, 5001.0, 5002.0, 5003.0])
    occ = np.array([1, 2, 1, 1])
    # by hand: 5001 has M = 2, ranks 1 and 2 -> 3, 4; 5002 and 5003: M = 1, r = 1 -> 2
    assert later_part_index(line, point, occ, used_indices(log)).tolist() == [3, 4, 2, 2]
    # 5002's later part was delivered as 2 and a new occupation there took 3: the part keeps
    # 2; 5003's was delivered as 2 but the log now holds occupation 2 there (an archive
    # renumbered before indices were kept): that index is the occupation's, the part
    # takes M + r = 2 + 1
    log2 = _log([(1001.0, 5001.0, 1), (1001.0, 5001.0, 2), (1001.0, 5002.0, 1),
                 (1001.0, 5002.0, 3), (1001.0, 5003.0, 1), (1001.0, 5003.0, 2)])
    kept = [{"line": 1001.0, "point": 5002.0, "occupation": 1, "index": 2},
            {"line": 1001.0, "point": 5003.0, "occupation": 1, "index": 2}]
    used = used_indices(log2, later_parts=kept)
    assert used["part_of"].to_pylist().count(-1) == 6
    assert later_part_index(line, point, occ, used).tolist() == [3, 4, 2, 3]
    # another occupation's later part at 5002 goes above the kept index too: M = 3, r = 2
    assert later_part_index(np.array([1001.0]), np.array([5002.0]), np.array([3]),
                            used).tolist() == [5]
