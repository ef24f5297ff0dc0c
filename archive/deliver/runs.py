"""Reading solution runs for delivery and lineage: the run row, its positions, its manifest.

The solver (:mod:`archive.solve.run`) owns run records; delivery and lineage read them only
through its functions, re-exported here: :func:`get_run` (id, unique prefix, or newest),
:func:`run_positions` (checked against the run's digest) and :func:`run_manifest` (checked
against the run id). Both checks raise :class:`archive.errors.IntegrityError`.
"""

from __future__ import annotations

from typing import Any

from archive.solve.run import get_run, run_manifest, run_positions

__all__ = ["get_run", "manifest_inputs", "plain", "run_manifest", "run_positions"]


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
    """The manifest's input hashes: ``fixes`` (a list of fix-table hashes) plus the named
    input tables (``stations``, ``deployments``, ``dem``)."""
    inputs = dict(manifest.get("inputs") or {})
    inputs["fixes"] = list(inputs.get("fixes") or [])
    return inputs
