"""Versioned survey inputs: load a file, validate it, store it, and find the current version.

Each load of stations, deployments, control (RTK check points) or an elevation model (dem)
becomes a new immutable :class:`InputVersion` of its survey: the source file is stored byte
for byte, the parsed table as Parquet, both by hash, then one transaction registers them,
adds the version row and writes the ledger event ``load.<kind>``. The newest version of a
kind is the current one; earlier versions stay readable with ``version=N``.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa
from sqlalchemy import func, select

from archive.errors import InputError, UsageError
from archive.store.archive import Archive
from archive.store.hashing import canonical_json
from archive.store.models import InputVersion, Survey, utcnow
from archive.survey.kinds import INPUT_KINDS, LoadContext, input_kind


@dataclass
class LoadedInput:
    """The result of a load: the new version row, its table, warnings and format details."""

    version: InputVersion
    table: pa.Table | None
    warnings: list[dict[str, Any]] = field(default_factory=list)
    meta: dict[str, Any] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        """Plain data for printing."""
        return {**version_dict(self.version), "warnings": self.warnings}


def load_input(arc: Archive, survey_id: int, kind: str, path: str | Path,
               **options: Any) -> LoadedInput:
    """Load one input file as the next version of ``kind`` (a registered input kind,
    :mod:`archive.survey.kinds`) for the survey.

    Options of the built-in kinds: ``format`` ("csv"/"sps", stations and control),
    ``columns`` (deployments, ``field=Header,...``), ``strict`` (deployments: refuse on any
    problem), ``vertical_datum`` (dem, required), ``area_margin_deg`` (degrees beyond the
    CRS area of use still accepted, default 0).
    """
    spec = input_kind(kind)
    path = Path(path)
    if not path.is_file():
        raise InputError(str(path), "no such file")
    with arc.session() as s:
        survey = s.get(Survey, survey_id)
        if survey is None:
            raise UsageError(f"no survey with id {survey_id}")
    parsed = spec.parse(LoadContext(arc, survey, path, dict(options)))

    source_hash, source_size = arc.objects.put_file(path)
    table_hash = table_size = None
    if parsed.table is not None:
        table_hash, table_size = arc.objects.put_table(parsed.table)
    n_rows = parsed.table.num_rows if parsed.table is not None else 0

    with arc.transaction() as tx:
        arc.register_object(tx, source_hash, source_size, f"input-{kind}")
        if table_hash is not None:
            arc.register_object(tx, table_hash, table_size, "table")
        latest = tx.execute(
            select(func.max(InputVersion.version)).where(
                InputVersion.survey_id == survey_id, InputVersion.kind == kind)
        ).scalar_one_or_none()
        row = InputVersion(
            survey_id=survey_id, kind=kind, version=(latest or 0) + 1, table_hash=table_hash,
            source_hash=source_hash, original_name=path.name, n_rows=n_rows,
            warnings=canonical_json(parsed.warnings).decode("utf-8"),
            meta=canonical_json(parsed.meta).decode("utf-8"),
            created_at=utcnow(), created_by=arc.actor,
        )
        tx.add(row)
        tx.flush()
        arc.log(tx, f"load.{kind}",
                {"kind": kind, "version": row.version, "source": source_hash,
                 "table": table_hash, "name": path.name, "rows": n_rows,
                 "warnings": len(parsed.warnings),
                 **({"overrides": parsed.meta["overrides"]}
                    if parsed.meta.get("overrides") else {})},
                survey_id=survey_id, rows=[row])
    return LoadedInput(version=row, table=parsed.table, warnings=parsed.warnings,
                       meta=parsed.meta)


def input_version(arc: Archive, survey_id: int, kind: str,
                  version: int | None = None) -> InputVersion | None:
    """The version row of ``kind`` (newest when ``version`` is None), or None."""
    input_kind(kind)  # UsageError for an unknown kind
    with arc.session() as s:
        q = select(InputVersion).where(InputVersion.survey_id == survey_id,
                                       InputVersion.kind == kind)
        if version is None:
            q = q.order_by(InputVersion.version.desc()).limit(1)
        else:
            q = q.where(InputVersion.version == int(version))
        row = s.execute(q).scalar_one_or_none()
    if row is None and version is not None:
        raise UsageError(f"the survey has no {kind} version {version}",
                         hint="list them with 'nodekeep inputs --all-versions'")
    return row


def current_input(arc: Archive, survey_id: int, kind: str,
                  version: int | None = None) -> tuple[InputVersion, pa.Table | None] | None:
    """The newest (or the given) version of ``kind`` and its table (None for "dem")."""
    row = input_version(arc, survey_id, kind, version)
    if row is None:
        return None
    table = arc.objects.read_table(row.table_hash) if row.table_hash else None
    return row, table


def require_input(arc: Archive, survey_id: int, kind: str, why: str = "",
                  version: int | None = None) -> tuple[InputVersion, pa.Table | None]:
    """The current (or given) version of ``kind`` and its table; the one refusal every
    command gives when it is missing: ``the survey has no <kind> loaded[, so <why>]`` with
    the load command as the hint."""
    found = current_input(arc, survey_id, kind, version)
    spec = input_kind(kind)
    if found is None or (spec.has_table and found[1] is None):
        entry = INPUT_KINDS.entry(kind)
        needed = "".join(f" --{o.name.replace('_', '-')} {o.metavar}" for o in spec.options
                         if o.required)
        raise UsageError(f"the survey has no {kind} loaded ({entry.description})"
                         + (f", so {why}" if why else ""),
                         hint=f"load it with 'nodekeep load {kind} FILE{needed}'")
    return found


def version_dict(v: InputVersion) -> dict[str, Any]:
    """An input version as plain data (warnings and meta decoded)."""
    return {
        "id": v.id, "survey_id": v.survey_id, "kind": v.kind, "version": v.version,
        "name": v.original_name, "rows": v.n_rows, "source_hash": v.source_hash,
        "table_hash": v.table_hash, "warnings": json.loads(v.warnings or "[]"),
        "meta": json.loads(v.meta or "{}"), "created_at": v.created_at,
        "created_by": v.created_by,
    }


def list_inputs(arc: Archive, survey_id: int, all_versions: bool = False) -> list[dict[str, Any]]:
    """Input versions of a survey by kind and version; only the current ones by default.

    Each entry carries ``current`` (True for the newest version of its kind) and
    ``n_warnings``; the warnings themselves are under ``warnings``.
    """
    with arc.session() as s:
        rows = s.execute(
            select(InputVersion).where(InputVersion.survey_id == survey_id)
            .order_by(InputVersion.kind, InputVersion.version)
        ).scalars().all()
    newest: dict[str, int] = {}
    for r in rows:
        newest[r.kind] = max(newest.get(r.kind, 0), r.version)
    out = []
    for r in rows:
        current = r.version == newest[r.kind]
        if all_versions or current:
            d = version_dict(r)
            d["current"] = current
            d["n_warnings"] = len(d["warnings"])
            out.append(d)
    order = {k: i for i, k in enumerate(INPUT_KINDS.names())}
    return sorted(out, key=lambda d: (order.get(d["kind"], 99), d["version"]))


def survey_for(arc: Archive, name: str | None = None) -> Survey:
    """The survey called ``name``, or the only survey of the archive."""
    with arc.session() as s:
        return arc.survey(s, name)
