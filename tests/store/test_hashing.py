"""Canonical JSON and table digests."""

from __future__ import annotations

import hashlib
from datetime import UTC, datetime

import numpy as np
import pyarrow as pa
import pytest

from archive.store.hashing import canonical_hash, canonical_json, table_digest


def test_canonical_json_is_key_order_independent_and_compact():
    a = canonical_json({"b": 1, "a": [1.5, "é"], "t": datetime(2026, 1, 2, 3, 4, 5, tzinfo=UTC)})
    b = canonical_json({"t": datetime(2026, 1, 2, 3, 4, 5, tzinfo=UTC), "a": [1.5, "é"], "b": 1})
    assert a == b
    assert a == '{"a":[1.5,"é"],"b":1,"t":"2026-01-02T03:04:05+00:00"}'.encode()
    assert canonical_hash({"x": 1}) == hashlib.sha256(b'{"x":1}').hexdigest()


def test_canonical_json_refuses_nan_and_naive_time():
    with pytest.raises(ValueError):
        canonical_json({"x": float("nan")})
    with pytest.raises(ValueError, match="NaN or infinity"):
        canonical_json({"x": [{"y": (1.0, np.float64("-inf"))}]})
    with pytest.raises(TypeError):
        canonical_json({"t": datetime(2026, 1, 1)})  # noqa: DTZ001 - the point of the test


def test_table_digest_ignores_chunking_but_sees_values():
    t1 = pa.table({"x": [1.0, 2.0, 3.0]})
    t2 = pa.concat_tables([pa.table({"x": [1.0]}), pa.table({"x": [2.0, 3.0]})])
    assert table_digest(t1) == table_digest(t2)
    assert table_digest(t1) != table_digest(pa.table({"x": [1.0, 2.0, 3.0000001]}))


def test_table_digest_survives_parquet_round_trip_with_nulls(tmp_path):
    """The bytes behind null slots (NaN here) must not change the digest: Parquet does not
    keep them, so a stored table read back must hash like the one that was written."""
    import numpy as np
    import pyarrow.parquet as pq

    values = pa.array(np.array([1.0, np.nan, 3.0]), mask=np.array([False, True, False]))
    t = pa.table({"x": values, "s": pa.array(["a", None, "c"]), "i": pa.array([1, None, 3])})
    pq.write_table(t, tmp_path / "t.parquet")
    back = pq.read_table(tmp_path / "t.parquet")
    assert table_digest(back) == table_digest(t)
    # a null and a valid value that equals the filler are still different tables
    assert table_digest(pa.table({"i": pa.array([0, 1])})) != table_digest(
        pa.table({"i": pa.array([None, 1])}))
