"""Reading fix tables for a solve: the arrays decoded straight from Parquet (only the
solver's columns, no conformed table) are those of the conformed, concatenated table,
bit for bit, for tables of both schema versions, with nulls, several row groups, several
nodes and repeated epochs."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from archive.ingest.schema import FIX_SCHEMA, FIX_SCHEMA_V1, FIX_STORAGE_SCHEMA, conform_fixes
from archive.solve.fixarrays import DICTIONARY_COLUMNS, fix_arrays, read_fix_arrays

T0 = 1_709_251_200_000_000  # 2024-03-01T00:00:00Z, µs

ARRAYS = ("node_code", "t_us", "lat", "lon", "h_ell", "h_msl", "geoid_sep", "quality",
          "valid", "fix_type", "n_sats", "pdop", "hdop", "raw_line", "src", "no_quality")


def _table(rng: np.random.Generator, nodes: list[str], n: int, raw: str, schema: pa.Schema,
           *, shuffle: bool = False) -> pa.Table:
    node = np.array([nodes[i % len(nodes)] for i in range(n)], dtype=object)
    t = T0 + np.arange(n, dtype=np.int64) // len(nodes) * 30_000_000
    if shuffle:
        order = rng.permutation(n)
        node, t = node[order], t[order]

    def holes(values: np.ndarray, share: float) -> pa.Array:
        return pa.array(values, mask=rng.random(n) < share)

    cols = {
        "node": pa.array(node, pa.string()), "time": pa.array(t, pa.timestamp("us", "UTC")),
        "lat": pa.array(30.1 + rng.normal(0, 1e-5, n)),
        "lon": pa.array(-101.2 + rng.normal(0, 1e-5, n)),
        "h_ell": holes(rng.normal(700, 3, n), 0.2), "h_msl": holes(rng.normal(720, 3, n), 0.1),
        "geoid_sep": holes(np.full(n, -20.5), 0.3),
        "quality": pa.array(rng.integers(0, 3, n).astype(np.int8)),
        "fix_type": holes(rng.integers(1, 4, n).astype(np.int8), 0.25),
        "valid": pa.array(rng.random(n) < 0.9),
        "n_sats": holes(rng.integers(3, 14, n).astype(np.int16), 0.2),
        "pdop": holes(rng.uniform(1, 4, n).astype(np.float32), 0.2),
        "hdop": holes(rng.uniform(0.6, 3, n).astype(np.float32), 0.2),
        "vdop": holes(rng.uniform(1, 4, n).astype(np.float32), 0.2),
        "raw_hash": pa.array([raw] * n, pa.string()),
        "raw_line": pa.array(np.arange(1, n + 1, dtype=np.int64)),
        "sentence": pa.array(["GGA"] * n, pa.string()),
        "no_quality": pa.array(rng.random(n) < 0.1),
        "weeks_added": pa.array(np.zeros(n, dtype=np.int16)),
    }
    return pa.Table.from_arrays([cols[f.name].cast(f.type) for f in schema], schema=schema)


def test_decoded_columns_match_the_conformed_table(tmp_path) -> None:
    rng = np.random.default_rng(7)
    tables = [
        _table(rng, ["KF001"], 500, "a" * 64, FIX_SCHEMA_V1),  # before no_quality existed
        _table(rng, ["KF002", "KF001"], 900, "b" * 64, FIX_STORAGE_SCHEMA, shuffle=True),
        _table(rng, ["KF003"], 0, "c" * 64, FIX_SCHEMA),  # an empty table
        _table(rng, ["KF001"], 300, "d" * 64, FIX_SCHEMA),  # repeats epochs of KF001
    ]
    files = []
    for i, t in enumerate(tables):
        path = tmp_path / f"{i}.parquet"
        pq.write_table(t, path, row_group_size=256)  # several row groups: chunked columns
        files.append(pq.ParquetFile(path, read_dictionary=DICTIONARY_COLUMNS))
    assert files[1].metadata.num_row_groups > 1

    got = read_fix_arrays(files, readers=2)
    want = fix_arrays(pa.concat_tables([conform_fixes(pq.read_table(f)) for f in
                                        sorted(tmp_path.glob("*.parquet"))]))
    assert got.n_duplicates == want.n_duplicates > 0
    assert got.node_names == want.node_names == ["KF001", "KF002"]
    for name in ARRAYS:
        a, b = getattr(got, name), getattr(want, name)
        assert a.dtype == b.dtype and a.tobytes() == b.tobytes(), name  # NaNs too
    assert np.isnan(got.hdop).any() and np.isnan(got.n_sats).any()
    assert got.raw_hashes(np.arange(len(got))) == want.raw_hashes(np.arange(len(want)))
