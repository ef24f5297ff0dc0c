"""Overlapping raw files of one node: the export and the solver keep the same fixes.

Rule (archive.ingest.overlap): of the fixes at one time, the one from the earliest loaded
raw file, then the lowest raw line. File ``a`` is loaded first and its overlapping epochs
sit on its last lines; file ``b`` holds different positions for those epochs on its first
lines, so a rule by raw line or by hash would keep ``b``'s fixes.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from archive.ingest.load import load_fix_files
from archive.ingest.read import node_fixes
from archive.solve.fixarrays import fix_arrays
from archive.solve.inputs import load_fix_tables, partitions, survey_inputs
from tests.support.fixlogs import log_bytes

NODE = "KF29999"


def test_overlap_rule_shared_by_export_and_solver(sim_arc, tmp_path) -> None:
    arc, sid = sim_arc
    a, b = tmp_path / "a.nmea", tmp_path / "b.nmea"
    a.write_bytes(log_bytes(300, seed=1))  # 23:55:00 .. 23:59:59
    b.write_bytes(log_bytes(300, start="2024-03-01T23:58:20", seed=9))  # 100 epochs overlap
    rep = load_fix_files(arc, sid, [a, b], node=NODE, workers=1)
    assert [f.status for f in rep.files] == ["loaded", "loaded"]
    raw_a, raw_b = rep.files[0].raw_hash, rep.files[1].raw_hash

    exported = node_fixes(arc, sid, NODE)
    assert exported.num_rows == 500
    t = pc.cast(exported["time"], pa.int64()).to_numpy()
    overlap = (t >= t[0] + 200_000_000) & (t < t[0] + 300_000_000)
    assert overlap.sum() == 100
    src = np.array(exported["raw_hash"].to_pylist(), dtype=object)
    assert (src[overlap] == raw_a).all() and (src[~overlap][200:] == raw_b).all()
    assert (exported["raw_line"].to_numpy()[overlap] > 100).all()  # a's last lines won

    inp = survey_inputs(arc, sid, {})
    part = next(p for p in partitions(arc, inp) if NODE in p.nodes)
    fx = fix_arrays(load_fix_tables(arc, part.fix_hashes))
    mine = fx.node_code == fx.node_names.index(NODE)
    assert fx.n_duplicates >= 100
    np.testing.assert_array_equal(fx.t_us[mine], t)
    np.testing.assert_array_equal(fx.lat[mine], exported["lat"].to_numpy())
    np.testing.assert_array_equal(fx.raw_line[mine], exported["raw_line"].to_numpy())
    assert fx.raw_hashes(np.flatnonzero(mine)) == exported["raw_hash"].to_pylist()
