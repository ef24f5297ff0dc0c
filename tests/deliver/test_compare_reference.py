"""The record-by-record comparison behind incremental deliveries, held to a plain pandas
merge of the two tables (pandas as the reference library) on random final tables: keys
kept, dropped, added and repeated, positions and heights moved around the tolerance or
missing, flags, nodes, windows and edit sources changed or missing."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pyarrow as pa
from hypothesis import given, settings
from hypothesis import strategies as st

from archive.deliver.changes import compare_final
from archive.deliver.final import FINAL_SCHEMA

KEY = ["line", "point", "index"]
COLS = KEY + ["node", "easting", "northing", "height", "flags", "flags_acknowledged",
              "source", "deployed", "retrieved"]
T0 = datetime(2026, 3, 1, tzinfo=UTC)


def _reference(previous: pa.Table, current: pa.Table, tolerance: float, unit: float) -> dict:
    """Records, reasons, shifts and removed keys by pandas merges, the plain way."""
    def frame(t: pa.Table, dedupe: bool) -> pd.DataFrame:
        f = t.to_pandas()
        for c in COLS:
            if c not in f:
                f[c] = pa.nulls(t.num_rows, FINAL_SCHEMA.field(c).type).to_pandas()
        f = f[COLS].assign(row=np.arange(t.num_rows))
        return f.drop_duplicates(KEY, keep="last") if dedupe else f

    def differs(a: pd.Series, b: pd.Series) -> np.ndarray:
        return ~(a.eq(b).fillna(False).to_numpy(dtype=bool)
                 | (a.isna().to_numpy() & b.isna().to_numpy()))

    old, new = frame(previous, True), frame(current, False)
    j = new.merge(old, on=KEY, how="left", suffixes=("", "_was"), indicator=True)
    is_new = (j["_merge"] == "left_only").to_numpy()
    shift = unit * np.hypot(j["easting"] - j["easting_was"],
                            j["northing"] - j["northing_was"]).to_numpy(dtype=float)
    dh = (j["height"] - j["height_was"]).abs().to_numpy(dtype=float)
    masks = {
        "new": is_new,
        "position": ~is_new & ((shift > tolerance)
                               | differs(j["easting"].isna(), j["easting_was"].isna())),
        "height": ~is_new & ((dh > tolerance) | differs(j["height"].isna(),
                                                        j["height_was"].isna())),
        "flags": ~is_new & (differs(j["flags"], j["flags_was"])
                            | differs(j["flags_acknowledged"], j["flags_acknowledged_was"])),
        "node": ~is_new & differs(j["node"], j["node_was"]),
        "time": ~is_new & (differs(j["deployed"], j["deployed_was"])
                           | differs(j["retrieved"], j["retrieved_was"])),
        "edited": ~is_new & differs(j["source"], j["source_was"])}
    records = []
    for i in range(len(j)):
        why = [k for k, m in masks.items() if m[i]]
        if why:
            rec = {"key": (float(j["line"][i]), float(j["point"][i]), int(j["index"][i])),
                   "reasons": why}
            if masks["position"][i] and np.isfinite(shift[i]):
                rec["shift_m"] = round(float(shift[i]), 4)
            if masks["height"][i] and np.isfinite(dh[i]):
                rec["height_change_m"] = round(float(dh[i]), 4)
            records.append(rec)
    gone = old.merge(new[KEY], on=KEY, how="left", indicator=True)
    gone = gone[gone["_merge"] == "left_only"]
    return {"records": records,
            "removed": [(float(r.line), float(r.point), int(r.index))
                        for r in gone.itertuples(index=False)],
            "rows": sorted(int(j["row"][i]) for i in range(len(j))
                           if any(m[i] for m in masks.values()))}


value = st.one_of(st.none(), st.sampled_from([0.0, 0.0005, 0.002, 0.5]))
record = st.tuples(st.integers(1, 2), st.integers(1, 4), st.integers(1, 2),
                   st.sampled_from(["N1", "N2", None]), value, value, value,
                   st.sampled_from(["", "moved", "few-fixes;moved"]),
                   st.sampled_from(["", "moved"]), st.sampled_from(["solved", "set-height#4"]),
                   st.one_of(st.none(), st.integers(0, 2)), st.one_of(st.none(), st.integers(0, 2)))


def _table(items: list, drop_windows: bool = False, older_types: bool = False) -> pa.Table:
    base = 500_000.0
    cols = {
        "line": [float(r[0]) for r in items], "point": [float(r[1]) for r in items],
        "index": [r[2] for r in items], "node": [r[3] for r in items],
        "easting": [None if r[4] is None else base + r[4] for r in items],
        "northing": [None if r[5] is None else 4e6 + r[5] for r in items],
        "height": [None if r[6] is None else 100.0 + r[6] for r in items],
        "flags": [r[7] for r in items], "flags_acknowledged": [r[8] for r in items],
        "source": [r[9] for r in items],
        "deployed": [None if r[10] is None else T0 + timedelta(hours=r[10]) for r in items],
        "retrieved": [None if r[11] is None else T0 + timedelta(days=1, hours=r[11])
                      for r in items]}
    names = [c for c in COLS if not (drop_windows and c in ("deployed", "retrieved",
                                                             "flags_acknowledged"))]
    types = {c: FINAL_SCHEMA.field(c).type for c in names}
    if older_types:  # a table written by other code: wider integers, large strings
        types |= {"index": pa.int64(), "node": pa.large_string(), "flags": pa.large_string()}
    return pa.table({c: pa.array(cols[c], types[c]) for c in names})


@settings(max_examples=150, deadline=None)
@given(st.lists(record, max_size=12), st.lists(record, max_size=12), st.booleans(),
       st.booleans(), st.sampled_from([0.001, 0.3]), st.sampled_from([1.0, 1200 / 3937]))
def test_compare_final_matches_a_pandas_merge(old_items, new_items, older, other_types,
                                              tolerance, unit):
    previous = _table(old_items, drop_windows=older, older_types=other_types)
    current = _table(new_items)
    got = compare_final(previous, current, since=7, tolerance=tolerance, unit_factor=unit)
    want = _reference(previous, current, tolerance, unit)
    assert [((r["line"], r["point"], r["index"]), r["reasons"]) for r in got.records] == \
        [(r["key"], r["reasons"]) for r in want["records"]]
    for g, w in zip(got.records, want["records"], strict=True):
        assert g.get("shift_m") == w.get("shift_m")
        assert g.get("height_change_m") == w.get("height_change_m")
    assert [(r["line"], r["point"], r["index"]) for r in got.removed] == want["removed"]
    assert got.table.equals(current.take(pa.array(want["rows"], pa.int64())))
    assert got.unchanged == current.num_rows - len(want["records"])
