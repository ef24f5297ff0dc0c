"""The report counts as the rest of nodekeep does: occupations, and records of a delivery.

A node moved during its stay is one occupation delivered as two records (each part under
its own point index); a reject keeps an occupation out, a set position makes a moved one a
single record again (docs/delivery.md). The report's tiles, its review list and its decided
flags must say the same as the deliveries and the review queue.
"""

from __future__ import annotations

import json
from datetime import timedelta

from archive.qc.review_list import (
    decided_list,
    occupation_count,
    records_with_edits,
    review_table,
)
from archive.store.models import Edit
from tests.support.qc_tables import E0, N0, T0, positions_table, run_data


def _edit(i: int, kind: str, point: float, reason: str, flag: str | None = None) -> Edit:
    return Edit(id=i, survey_id=1, kind=kind, line=1001.0, point=point, point_index=1,
                payload=json.dumps({"flag": flag} if flag else {}), reason=reason,
                created_at=T0 + timedelta(days=4, minutes=i), created_by="data manager")


def _data():
    rows = [
        # 1001/5001: moved; the later part is far from plan too, and delivered as index 2
        {"line": 1001.0, "point": 5001.0, "part": 1, "flags": "moved",
         "easting": E0, "northing": N0, "point_index": 1},
        {"line": 1001.0, "point": 5001.0, "part": 2, "flags": "moved;far-from-plan",
         "easting": E0 + 25.0, "northing": N0, "point_index": 2},
        {"line": 1001.0, "point": 5001.0, "part": 0, "flags": "moved", "delivered": False,
         "easting": E0 + 12.0, "northing": N0},
        {"line": 1001.0, "point": 5002.0, "flags": "few-fixes", "easting": E0 + 50.0,
         "northing": N0},
        {"line": 1001.0, "point": 5003.0, "easting": E0 + 100.0, "northing": N0},
        {"line": 1001.0, "point": 5004.0, "easting": E0 + 150.0, "northing": N0},
    ]
    return run_data(positions_table(rows), None, None)


def test_decided_flags_are_those_of_every_part():
    data = _data()
    data.decisions = {(1001.0, 5001.0, 1): [
        _edit(4, "ack-flag", 5001.0, "kicked by cattle", "moved"),
        _edit(5, "ack-flag", 5001.0, "the later part is where it was left", "far-from-plan")]}
    d = decided_list(data)
    assert list(zip(d["decided"], d["edit"], strict=True)) == [("moved", 4),
                                                               ("far-from-plan", 5)]
    assert set(d["flags"]) == {"moved;far-from-plan"}


def test_records_to_deliver_follow_the_edits():
    data = _data()
    assert records_with_edits(data) == (5, 0)  # 2 parts + 3 stations
    data.decisions = {(1001.0, 5002.0, 1): [_edit(1, "reject-station", 5002.0, "died")]}
    assert records_with_edits(data) == (4, 1)
    data.decisions[(1001.0, 5001.0, 1)] = [_edit(8, "set-position", 5001.0, "pegged")]
    assert records_with_edits(data) == (3, 1)  # the moved node is one record again
    # a position set for an occupation the run did not position is a record of its own
    data.decisions[(1001.0, 5009.0, 1)] = [_edit(9, "set-position", 5009.0, "RTK shot")]
    assert records_with_edits(data) == (4, 1)


def test_review_rows_carry_their_delivered_index():
    import re

    from archive.qc.stats import delivered

    data = _data()
    df = delivered(data.positions).to_pandas()
    df = df[df["flags"] != ""].assign(reasons=lambda x: x["flags"], dist=float("nan"))
    assert occupation_count(df) == 2 and len(df) == 3
    html = review_table(df.reset_index(drop=True), set())
    body = html.split("<tbody>")[1]
    rows = [re.findall(r"<td[^>]*>(.*?)</td>", r) for r in body.split("</tr>")[:-1]]
    assert [(r[0], r[1]) for r in rows] == [("1001/5001", "1"), ("1001/5001", "2"),
                                            ("1001/5002", "1")]
