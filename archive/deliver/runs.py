"""Reading solution runs for delivery and lineage: the run row, its positions, its manifest.

The solver (:mod:`archive.solve.run`) owns run records; this module reads them through the
catalog contract (a :class:`Run` row names its manifest and positions objects by hash), so
delivery and lineage only ever read what a run stored.
"""

from __future__ import annotations

import json
from typing import Any

import pyarrow as pa
from sqlalchemy import select

from archive.errors import IntegrityError, UsageError
from archive.store.archive import Archive
from archive.store.hashing import table_digest
from archive.store.models import Run


def get_run(arc: Archive, survey_id: int | None, ref: str | None = None) -> Run:
    """A run of the survey by id or unique prefix; the newest run when ``ref`` is None.

    ``survey_id`` None looks in every survey of the archive.
    """
    with arc.session() as s:
        q = select(Run)
        if survey_id is not None:
            q = q.where(Run.survey_id == survey_id)
        if ref is None:
            run = s.scalars(q.order_by(Run.created_at.desc(), Run.id).limit(1)).first()
            if run is None:
                raise UsageError("the survey has no solution run yet",
                                 hint="solve it with 'nodekeep solve'")
            return run
        ref = ref.strip().lower()
        if len(ref) < 4:
            raise UsageError(f"run reference {ref!r} is too short", hint="give at least 4 "
                             "characters of the run id (see 'nodekeep runs')")
        found = list(s.scalars(q.where(Run.id.startswith(ref, autoescape=True)).limit(3)))
    if not found:
        raise UsageError(f"no run {ref!r} in this survey", hint="list runs with 'nodekeep runs'")
    if len(found) > 1:
        raise UsageError(f"run reference {ref!r} matches several runs",
                         hint="give more characters of the run id")
    return found[0]


def run_positions(arc: Archive, run: Run, *, check: bool = True) -> pa.Table:
    """The run's stored positions table; with ``check``, its digest must match the run row."""
    table = arc.objects.read_table(run.positions_hash)
    if check and table_digest(table) != run.positions_digest:
        raise IntegrityError(f"the positions of run {run.id[:12]} (object "
                             f"{run.positions_hash[:12]}) no longer match the run's digest",
                             hint="run 'nodekeep verify' to see what else changed")
    return table


def run_manifest(arc: Archive, run: Run) -> dict[str, Any]:
    """The run's manifest (inputs, fully resolved parameters, code version)."""
    return json.loads(arc.objects.read_bytes(run.manifest_hash))


def plain(value: Any) -> Any:
    """``value`` with every float NaN replaced by None (JSON has no NaN), recursively."""
    if isinstance(value, float) and value != value:
        return None
    if isinstance(value, dict):
        return {k: plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [plain(v) for v in value]
    return value


def manifest_inputs(manifest: dict[str, Any]) -> dict[str, Any]:
    """The manifest's input hashes: ``fixes`` (a list) plus the named input tables."""
    inputs = dict(manifest.get("inputs") or {})
    fixes = inputs.get("fixes") or []
    if isinstance(fixes, dict):
        fixes = list(fixes.values())
    inputs["fixes"] = [f if isinstance(f, str) else f.get("hash", f.get("fixes")) for f in fixes]
    return inputs
