"""A delivery counts its unacknowledged flags per station (occupation), as status, qc and
review do: the two records of a moved node are one station."""

from __future__ import annotations

import pyarrow as pa

from archive.deliver.final import unacknowledged_flags


def test_parts_of_a_moved_node_count_once():
    final = pa.table({
        "line": [1001.0, 1001.0, 1001.0, 1001.0, 1002.0],
        "point": [5001.0, 5001.0, 5002.0, 5002.0, 5001.0],
        "index": pa.array([1, 2, 1, 2], pa.int8()).to_pylist() + [1],
        "occupation": pa.array([1, 1, 1, 2, None], pa.int8()),  # 5002: occupied twice
        "node": ["N1", "N1", "N2", "N3", "N4"],
        "flags": ["moved", "moved;far-from-plan", "few-fixes", "few-fixes", "moved"],
    })
    # moved: 1001/5001 (two records) and 1002/5001 (no occupation column value: its index);
    # few-fixes: both occupations of 1001/5002
    assert unacknowledged_flags(final) == {"far-from-plan": 1, "few-fixes": 2, "moved": 2}
    # a table delivered before occupations were numbered counts by index
    assert unacknowledged_flags(final.drop_columns(["occupation"])) == {
        "far-from-plan": 1, "few-fixes": 2, "moved": 3}
