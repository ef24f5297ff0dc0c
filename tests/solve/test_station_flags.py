"""Flags per station (occupation): the Arrow grouping of :func:`station_flags` against a
pandas groupby written the plain way (pandas as the reference library), on random tables
with moved nodes (several delivered rows of one station), missing occupations, rows not
delivered and clusters without a deployment."""

from __future__ import annotations

import pandas as pd
import pyarrow as pa
from hypothesis import given, settings
from hypothesis import strategies as st

from archive.solve.flags import count_flags, station_flags
from archive.solve.schema import FLAGS

KEYS = ["line", "point", "occupation"]


def _reference(table: pa.Table) -> pd.DataFrame:
    """Station flags by pandas: group the delivered logged rows by station, first node,
    the union of the flags in the order of FLAGS."""
    df = table.to_pandas()
    if "occupation" not in df:  # positions of runs made before occupations were numbered
        df["occupation"] = df["index"]
    df["occupation"] = df["occupation"].fillna(df["index"]).astype("int64")
    df = df[df["delivered"].fillna(False).astype(bool) & (df["kind"] == "logged")]
    df = df.assign(flags=df["flags"].fillna(""))
    order = {k: i for i, k in enumerate(FLAGS)}
    out = df.groupby(KEYS, sort=True).agg(node=("node", "first"),
                                          flags=("flags", ";".join)).reset_index()
    out["flags"] = [";".join(sorted({f for f in s.split(";") if f}, key=order.get))
                    for s in out["flags"]]
    return out


rows = st.tuples(st.integers(1, 3), st.integers(100, 104), st.integers(1, 3),
                 st.one_of(st.none(), st.integers(1, 3)), st.sampled_from(["N1", "N2", "N3"]),
                 st.sampled_from(["logged", "logged", "unlogged", "awaiting"]),
                 st.one_of(st.none(), st.booleans()),
                 st.lists(st.sampled_from(list(FLAGS)[:5]), max_size=3))


def _table(items: list) -> pa.Table:
    return pa.table({
        "line": pa.array([float(r[0]) for r in items], pa.float64()),
        "point": pa.array([float(r[1]) for r in items], pa.float64()),
        "index": pa.array([r[2] for r in items], pa.int8()),
        "occupation": pa.array([r[3] for r in items], pa.int8()),
        "node": pa.array([r[4] for r in items], pa.string()),
        "kind": pa.array([r[5] for r in items], pa.string()),
        "delivered": pa.array([r[6] for r in items], pa.bool_()),
        "flags": pa.array([";".join(reversed(r[7])) or None for r in items], pa.string()),
    })


@settings(max_examples=200, deadline=None)
@given(st.lists(rows, max_size=25), st.booleans())
def test_station_flags_match_a_pandas_groupby(items, without_occupation):
    table = _table(items)
    if without_occupation:
        table = table.drop_columns(["occupation"])
    got = station_flags(table)
    want = _reference(table)
    assert got.num_rows == len(want)
    assert got["line"].to_pylist() == want["line"].tolist()
    assert got["point"].to_pylist() == want["point"].tolist()
    assert got["occupation"].to_pylist() == want["occupation"].tolist()
    assert got["node"].to_pylist() == want["node"].tolist()
    assert got["flags"].to_pylist() == want["flags"].tolist()
    c = count_flags(table)
    assert c.n_stations == len(want)
    assert c.n_flagged == int((want["flags"] != "").sum())
    per = {f: sum(1 for text in want["flags"] if f in text.split(";")) for f in FLAGS}
    assert c.per_flag == {f: n for f, n in per.items() if n}
    assert c.n_unlogged == sum(1 for r in items if r[5] == "unlogged")


def test_a_moved_node_is_one_station_with_the_flags_of_both_parts():
    table = _table([(1, 100, 1, 1, "N1", "logged", True, ["moved", "wide-spread"]),
                    (1, 100, 1, 1, "N1", "logged", True, ["moved", "far-from-plan"]),
                    (1, 101, 1, None, "N2", "logged", True, []),
                    (1, 102, 1, 2, "N3", "logged", False, ["few-fixes"])])
    got = station_flags(table).to_pylist()
    order = {k: i for i, k in enumerate(FLAGS)}
    joined = ";".join(sorted({"moved", "wide-spread", "far-from-plan"}, key=order.get))
    assert got == [{"line": 1.0, "point": 100.0, "occupation": 1, "node": "N1",
                    "flags": joined},
                   {"line": 1.0, "point": 101.0, "occupation": 1, "node": "N2", "flags": ""}]
    c = count_flags(table)
    assert (c.n_stations, c.n_flagged) == (2, 1)
    assert c.per_flag == {f: 1 for f in joined.split(";")}
