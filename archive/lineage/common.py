"""What the lineage views share: plain JSON values and the summary of a run with the input
versions it read."""

from __future__ import annotations

from typing import Any

from sqlalchemy import or_, select

from archive.solve.run import manifest_inputs, run_manifest
from archive.store.archive import Archive
from archive.store.models import InputVersion, Run
from archive.survey.kinds import INPUT_KINDS


def plain(value: Any) -> Any:
    """``value`` with every float NaN replaced by None (JSON has no NaN), recursively."""
    if isinstance(value, float) and value != value:
        return None
    if isinstance(value, dict):
        return {k: plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [plain(v) for v in value]
    return value


def matched_inputs(arc: Archive, survey_id: int, inputs: dict[str, Any]
                   ) -> list[tuple[str, str, InputVersion | None]]:
    """(kind, hash, the input version loaded with that table or source hash, or None) of
    each input table a run read, in the order of the input kinds."""
    hashes = {k: inputs.get(k) for k in INPUT_KINDS.names() if isinstance(inputs.get(k), str)}
    if not hashes:
        return []
    with arc.session() as s:
        rows = s.scalars(select(InputVersion).where(
            InputVersion.survey_id == survey_id,
            or_(InputVersion.table_hash.in_(hashes.values()),
                InputVersion.source_hash.in_(hashes.values())))
            .order_by(InputVersion.id)).all()
    return [(kind, h, next((r for r in rows
                            if r.kind == kind and h in (r.table_hash, r.source_hash)), None))
            for kind, h in hashes.items()]


def input_tables(arc: Archive, survey_id: int, inputs: dict[str, Any]) -> list[dict[str, Any]]:
    """The input versions a run read (matched by table or source hash), with who loaded them."""
    return [{"kind": kind, "hash": h, "version": r.version if r else None,
             "name": r.original_name if r else None,
             "loaded_at": r.created_at if r else None,
             "loaded_by": r.created_by if r else None}
            for kind, h, r in matched_inputs(arc, survey_id, inputs)]


def run_summary(arc: Archive, run: Run) -> dict[str, Any]:
    """A run with its parameters, code version and input hashes (from its manifest)."""
    manifest = run_manifest(arc, run)
    return {"id": run.id, "label": run.label, "created_at": run.created_at,
            "created_by": run.created_by, "code_version": run.code_version,
            "params": manifest.get("params", {}), "manifest_hash": run.manifest_hash,
            "positions_digest": run.positions_digest,
            "inputs": input_tables(arc, run.survey_id, manifest_inputs(manifest)),
            "n_fix_tables": len(manifest_inputs(manifest).get("fixes", []))}


