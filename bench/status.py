"""Benchmark of ``nodekeep status`` on an archive the size of a month of a large crew.

    python -m bench.status [--stations 20000] [--logs-per-node 5] [--fixes 100000000] [--dir DIR]

A small invented survey is generated, loaded, solved and delivered as a crew would (the
real thing, so the run, its manifest and the delivery are genuine). The archive is then
grown to the asked size in the catalog: ``--stations`` stations each with a deployment
(the survey's deployment log tiled over further lines), a run positioning every one of them
(the real run's rows tiled the same way, its manifest kept), and ``--logs-per-node`` logs
per node holding ``--fixes`` fixes in all, recorded as the loader records logs (catalog
rows naming their objects). Fix tables are not written for the added logs: ``status``
never reads one, which is the point. Printed:

1. ``status`` as a library call (archive open, imports done) and through the command line
   (a fresh process, as a user runs it), on the grown archive (goal: under 1 s);
2. the baseline it avoids: reading the fix tables of the small survey to count fixes,
   scaled to the grown archive's fix count, and the ratio.

The machine's load average is printed first: other work on the machine slows every figure.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from datetime import timedelta
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import insert, select

from archive.store.archive import Archive
from archive.store.hashing import canonical_hash, canonical_json, table_digest
from archive.store.models import InputVersion, RawFile, Run, StoredObject, utcnow


def _tile(table: pa.Table, copies: int, line_step: float) -> pa.Table:
    """``copies`` copies of ``table``, copy k with its line numbers moved by k*line_step."""
    parts = []
    for k in range(copies):
        t = table.set_column(table.schema.get_field_index("line"), "line",
                             pc.add(table["line"], k * line_step))
        if "node" in t.column_names:
            t = t.set_column(t.schema.get_field_index("node"), "node",
                             pc.binary_join_element_wise(t["node"], pa.scalar(f"-{k}"), ""))
        parts.append(t)
    return pa.concat_tables(parts)


def grow(arc: Archive, sid: int, stations: int, logs_per_node: int, fixes: int) -> dict:
    """Grow the catalog of survey ``sid`` as described in the module doc."""
    with arc.session() as s:
        run = s.scalars(select(Run).where(Run.survey_id == sid)).first()
        dep_v = s.scalars(select(InputVersion).where(InputVersion.survey_id == sid,
                                                     InputVersion.kind == "deployments")).first()
    positions = arc.objects.read_table(run.positions_hash)
    deployments = arc.objects.read_table(dep_v.table_hash)
    copies = max(1, -(-stations // positions.num_rows))
    big_pos = _tile(positions, copies, 1000.0)
    big_dep = _tile(deployments, copies, 1000.0)
    p_hash, p_size = arc.objects.put_table(big_pos)
    d_hash, d_size = arc.objects.put_table(big_dep)
    nodes = sorted(set(big_dep["node"].to_pylist()))
    n_logs = len(nodes) * logs_per_node
    per_log = fixes // n_logs
    t0 = deployments["deployed"][0].as_py()
    now = utcnow()
    rng = np.random.default_rng(5)
    hashes = [f"{x:064x}" for x in rng.integers(0, 2**62, size=2 * n_logs, dtype=np.int64)]
    with arc.transaction() as tx:
        arc.register_object(tx, p_hash, p_size, "positions")
        arc.register_object(tx, d_hash, d_size, "table")
        tx.execute(insert(StoredObject), [{"hash": h, "size": 1, "kind": "raw", "created_at": now}
                                          for h in hashes])
        rows = []
        for i, node in enumerate(nodes):
            for j in range(logs_per_node):
                k = i * logs_per_node + j
                rows.append({
                    "survey_id": sid, "object_hash": hashes[2 * k], "original_name": f"{node}_{j}.nmea",
                    "node": node, "format": "nmea", "size": per_log * 70, "received_at": now,
                    "received_by": "bench", "parser": "bench", "n_lines": per_log * 2,
                    "n_accepted": per_log * 2, "n_rejected": 0, "n_ignored": 0,
                    "n_fixes": per_log, "n_valid": per_log,
                    "t_first": t0 + timedelta(hours=6 * j), "t_last": t0 + timedelta(hours=6 * j + 6),
                    "fixes_hash": hashes[2 * k + 1], "details": "{}"})
        tx.execute(insert(RawFile), rows)
        row = InputVersion(survey_id=sid, kind="deployments", version=dep_v.version + 1,
                           table_hash=d_hash, source_hash=dep_v.source_hash,
                           original_name="deployments-grown.csv", n_rows=big_dep.num_rows,
                           warnings="[]", meta=dep_v.meta, created_at=now, created_by="bench")
        tx.add(row)
        tx.flush()
        arc.log(tx, "load.deployments", {"table": d_hash, "bench": True}, survey_id=sid,
                rows=[row])
        manifest = json.loads(arc.objects.read_bytes(run.manifest_hash))
        manifest["inputs"]["deployments"] = d_hash
        manifest["inputs"]["fixes"] = sorted(manifest["inputs"]["fixes"] + hashes[1::2])
        manifest["input_versions"]["deployments"] = dep_v.version + 1
        m_hash, m_size = arc.objects.put_bytes(canonical_json(manifest))
        arc.register_object(tx, m_hash, m_size, "manifest")
        grown = Run(id=canonical_hash(manifest), survey_id=sid, label="grown",
                    manifest_hash=m_hash,
                    positions_hash=p_hash, positions_digest=table_digest(big_pos),
                    code_version=run.code_version, n_positions=big_pos.num_rows,
                    n_flagged=0, summary="{}", created_at=now, created_by="bench")
        tx.add(grown)
        tx.flush()
        arc.log(tx, "solve.run", {"run": grown.id, "bench": True}, survey_id=sid, rows=[grown])
    return {"stations": big_pos.num_rows, "logs": n_logs, "fixes": per_log * n_logs}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--stations", type=int, default=20_000)
    ap.add_argument("--logs-per-node", type=int, default=5)
    ap.add_argument("--fixes", type=int, default=100_000_000)
    ap.add_argument("--dir", type=Path, default=None)
    a = ap.parse_args()
    print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    from archive.demo import run_demo

    base = Path(a.dir or tempfile.mkdtemp(prefix="nodekeep-status-"))
    run_demo(base / "demo", size="small")
    root = base / "demo" / "archive"
    arc = Archive.open(root)
    from archive.lineage.status import survey_status

    sid = 1
    from archive.solve.inputs import load_fix_tables

    with arc.session() as s:
        small_hashes = s.scalars(select(RawFile.fixes_hash).where(
            RawFile.fixes_hash.is_not(None))).all()
        small_fixes = sum(s.scalars(select(RawFile.n_fixes)).all())
    t = time.perf_counter()
    load_fix_tables(arc, list(small_hashes))
    read_rate = small_fixes / (time.perf_counter() - t)

    grown = grow(arc, sid, a.stations, a.logs_per_node, a.fixes)
    survey_status(arc, sid)  # warm the caches a first call fills
    t = time.perf_counter()
    st = survey_status(arc, sid)
    lib = time.perf_counter() - t
    arc.close()
    t = time.perf_counter()
    out = subprocess.run([sys.executable, "-m", "archive", "-A", str(root), "status", "--json"],
                         capture_output=True, text=True, check=True)
    cli = time.perf_counter() - t
    doc = json.loads(out.stdout)
    baseline = grown["fixes"] / read_rate
    print(f"grown archive: {grown['stations']:,} stations, {st.loaded['n_logs']:,} logs, "
          f"{st.loaded['n_fixes']:,} fixes (status agrees: {doc['loaded']['n_fixes'] == st.loaded['n_fixes']})")
    print(f"status, library call: {lib:.3f} s")
    print(f"status, command line (fresh process): {cli:.3f} s (goal < 1 s)")
    print(f"baseline, counting by reading fix tables at {read_rate / 1e6:.1f} M fixes/s: "
          f"{baseline:.1f} s; ratio {baseline / cli:.0f}x")


if __name__ == "__main__":
    main()
