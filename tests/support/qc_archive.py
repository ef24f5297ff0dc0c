"""Archives holding a run and survey inputs, stored the way the solver and loaders store them
(objects first, then one ledgered transaction), so qc reads them through the public readers."""

from __future__ import annotations

from datetime import timedelta

import pyarrow as pa

from archive.store.archive import Archive
from archive.store.hashing import canonical_hash, canonical_json, table_digest
from archive.store.models import InputVersion, Run, Survey
from tests.support.qc_tables import T0


def survey_id(arc: Archive) -> int:
    with arc.session() as s:
        return s.query(Survey).one().id


def store_input(arc: Archive, sid: int, kind: str, table: pa.Table, version: int = 1) -> None:
    """An input version row with its table, as the survey loaders record one."""
    src_hash, src_size = arc.objects.put_bytes(f"{kind} source v{version}\n".encode())
    t_hash, t_size = arc.objects.put_table(table)
    with arc.transaction() as tx:
        arc.register_object(tx, src_hash, src_size, f"input-{kind}")
        arc.register_object(tx, t_hash, t_size, "table")
        row = InputVersion(survey_id=sid, kind=kind, version=version, table_hash=t_hash,
                           source_hash=src_hash, original_name=f"{kind}.csv",
                           n_rows=table.num_rows, warnings="[]", meta="{}",
                           created_at=T0 + timedelta(days=version), created_by="tester")
        tx.add(row)
        tx.flush()
        arc.log(tx, f"load.{kind}", {"kind": kind, "table": t_hash}, survey_id=sid, rows=[row])


def store_run(arc: Archive, sid: int, positions: pa.Table, label: str = "",
              offset_days: int = 6) -> Run:
    """A run row with its positions and manifest objects, as the solver records one."""
    manifest = {"code_version": "0.1.0", "params": {"estimator": "huber", "huber_k": 1.345,
                                                    "label": label},
                "inputs": {"stations": "12" * 32, "fixes": ["56" * 32]}}
    m_hash, m_size = arc.objects.put_bytes(canonical_json(manifest))
    p_hash, p_size = arc.objects.put_table(positions)
    flagged = sum(1 for f in positions["flags"].to_pylist() if f)
    with arc.transaction() as tx:
        arc.register_object(tx, m_hash, m_size, "manifest")
        arc.register_object(tx, p_hash, p_size, "positions")
        run = Run(id=canonical_hash(manifest), survey_id=sid, label=label, manifest_hash=m_hash,
                  positions_hash=p_hash, positions_digest=table_digest(positions),
                  code_version="0.1.0", n_positions=positions.num_rows, n_flagged=flagged,
                  summary="{}", created_at=T0 + timedelta(days=offset_days), created_by="tester")
        tx.add(run)
        tx.flush()
        arc.log(tx, "solve.run", {"run": run.id}, survey_id=sid, rows=[run])
    return run
