"""Deliveries: write final positions in an exchange format, keep a copy, record who got what.

One delivery = the file's bytes stored by hash, the final-positions table stored as Parquet,
a lineage manifest (JSON) stored by hash and written beside the file as
``<file>.lineage.json``, a :class:`Delivery` row and a ``deliver`` ledger event. The file is
written to a temporary name in the target folder first and renamed into place only after
the transaction committed, so there is never a delivered file without its record.

Every delivery is anchored in the ledger: the file states (in a header record, CSV columns
or the GeoJSON ``nodekeep`` member) the sequence number of its own ``deliver`` event and
the hash of the event before it, and the manifest adds the short hashes of every earlier
event (:func:`archive.deliver.manifest.ledger_section`). The file's bytes depend on that
anchor, so they are rendered inside the recording transaction, after the writers' lock on
the ledger head is taken: nothing can come between the anchor and the event. The
target and lineage paths are checked before anything is stored (not a folder, parent folder
exists and is writable); should a rename still fail after the commit, a ``deliver.failed``
ledger event names the delivery and :class:`StorageError` is raised.

Refusals: unacknowledged review flags (unless ``allow_flags``), an existing file (unless
``force``), a station without a position, a value that does not fit its format's field.
"""

from __future__ import annotations

import contextlib
import json
import os
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import pyarrow as pa
from sqlalchemy import func, select

from archive import __version__
from archive.deliver.changes import DEFAULT_TOLERANCE, changes_since
from archive.deliver.context import DeliveryContext, other_datum_stations, station_label
from archive.deliver.decisions import with_decisions
from archive.deliver.final import build_final, unacknowledged_flags
from archive.deliver.formats import writer
from archive.deliver.manifest import DeliveryFacts, lineage_manifest, manifest_bytes
from archive.edits.log import delivery_edit_set
from archive.errors import Refused, StorageError, UsageError
from archive.solve.inputs import check_objects
from archive.solve.run import get_run, manifest_inputs, run_manifest
from archive.store import ledger
from archive.store.archive import Archive
from archive.store.ledger import Anchor
from archive.store.models import Delivery, RawFile, Run, Survey, utcnow
from archive.store.outfiles import check_target, temp_beside
from archive.survey.keys import station_text

LINEAGE_SUFFIX = ".lineage.json"


@dataclass
class DeliveryResult:
    """What a delivery wrote and recorded."""

    delivery_id: int
    path: str
    lineage_path: str
    format: str
    file_hash: str
    manifest_hash: str
    final_hash: str
    run_id: str
    anchor: dict[str, Any]  # the delivery's ledger event and the hash of the one before
    n_stations: int  # stations (line, point) delivered
    n_records: int  # records: one per occupation (stations occupied twice count twice) and
    # one per part of a node that moved during its stay
    edit_ids: list[int] = field(default_factory=list)
    edit_set_hash: str = ""
    recipient: str = ""
    unacknowledged_flags: dict[str, int] = field(default_factory=dict)
    allowed_flags: bool = False
    warnings: list[str] = field(default_factory=list)
    merges: list[dict[str, Any]] = field(default_factory=list)
    changes: dict[str, Any] | None = None  # what changed since an earlier delivery, if asked
    # deployments held back: no log of their node was loaded yet (awaiting harvest)
    awaiting: list[dict[str, Any]] = field(default_factory=list)

    @property
    def n_awaiting(self) -> int:
        """Deployments held back as awaiting harvest."""
        return len(self.awaiting)

    def as_dict(self) -> dict[str, Any]:
        """Plain data for printing."""
        return asdict(self) | {"n_awaiting": self.n_awaiting}


def _flag_refusal(final: pa.Table, flags: dict[str, int], run: Run) -> Refused:
    flagged = [i for i, f in enumerate(final.column("flags").to_pylist()) if f]
    listed = ", ".join(f"{k} ({v})" for k, v in flags.items())
    examples = "; ".join(f"{station_label(final, i)}: {final.column('flags')[i].as_py()}"
                         for i in flagged[:3])
    return Refused(
        f"run {run.id[:12]} has {len(flagged)} station(s) with unacknowledged review flags: "
        f"{listed} (e.g. {examples})",
        hint="review them and acknowledge each with 'nodekeep edit ack LINE POINT --flag NAME "
             "--reason TEXT', replace the solver's position with 'nodekeep edit set-position' "
             "(clears the position flags), reject the station with 'nodekeep edit reject', or "
             "deliver anyway with --allow-flags",
    )


def _check_positions(final: pa.Table) -> None:
    missing = [i for i, (e, n) in enumerate(zip(final.column("easting").to_pylist(),
                                                final.column("northing").to_pylist(),
                                                strict=True)) if e is None or n is None]
    if missing:
        names = ", ".join(station_label(final, i) for i in missing[:5])
        raise Refused(f"{len(missing)} station(s) to deliver have no position: {names}",
                      hint="set one with 'nodekeep edit set-position LINE POINT --from "
                           "preplot|control|given --reason TEXT', or reject the station with "
                           "'nodekeep edit reject LINE POINT --reason TEXT'")


def raw_files_of(arc: Archive, survey_id: int, fix_hashes: list[str]) -> list[dict[str, Any]]:
    """The raw files whose parsed fixes are among ``fix_hashes`` (as received)."""
    if not fix_hashes:
        return []
    with arc.session() as s:
        rows = s.scalars(select(RawFile).where(RawFile.survey_id == survey_id,
                                               RawFile.fixes_hash.in_(fix_hashes))
                         .order_by(RawFile.id)).all()
    return [{"id": r.id, "name": r.original_name, "hash": r.object_hash, "node": r.node,
             "format": r.format, "size": r.size, "fixes": r.fixes_hash,
             "received_at": r.received_at, "received_by": r.received_by} for r in rows]


def _station(e: Any) -> str:
    return f"station {station_text(e.line, e.point, e.point_index)}"


def _move_into_place(arc: Archive, survey_id: int, delivery_id: int,
                     moves: list[tuple[Path, Path]]) -> None:
    """Rename the temporary files onto their targets; if that fails after the delivery was
    recorded, ledger ``deliver.failed`` and raise :class:`StorageError`."""
    done: list[Path] = []
    try:
        for tmp, target in moves:
            os.replace(tmp, target)
            done.append(target)
    except OSError as exc:
        for tmp, _target in moves:
            with contextlib.suppress(FileNotFoundError):
                tmp.unlink()
        with arc.transaction() as tx:
            arc.log(tx, "deliver.failed",
                    {"delivery": delivery_id, "error": f"{type(exc).__name__}: {exc}",
                     "written": [str(p) for p in done]}, survey_id=survey_id)
        raise StorageError(
            f"delivery {delivery_id} was recorded but its file could not be put in place "
            f"({exc}); the ledger says so (deliver.failed)",
            hint="the delivered bytes are in the archive by hash: fix the folder and deliver "
                 "again (with --force if a partial file is left)") from exc


def deliver(arc: Archive, survey_id: int, run_ref: str | None, fmt: str, to: str | Path,
            recipient: str, note: str = "", allow_flags: bool = False,
            force: bool = False, merge_occupations: bool = False,
            changed_since: int | None = None,
            tolerance: float = DEFAULT_TOLERANCE) -> DeliveryResult:
    """Deliver the final positions of a run (plus edits in force) as ``fmt`` to ``to``.

    One record per occupation, under its own point index; with ``merge_occupations`` the
    occupations of a station that cannot be told apart are delivered as one position
    (:mod:`archive.deliver.merge`), and the lineage says what was merged and what was not.
    With ``changed_since`` (a delivery id) only the records that are new or changed since
    that delivery are written (:mod:`archive.deliver.changes`); the lineage manifest lists
    each with its reasons, and the records that delivery held which are no longer delivered.
    """
    write = writer(fmt)
    recipient = (recipient or "").strip()
    if not recipient:
        raise UsageError("a delivery needs a recipient", hint="say who gets it with --recipient")
    target = Path(to)
    lineage_path = target.with_name(target.name + LINEAGE_SUFFIX)
    kept = "earlier deliveries stay in the archive by hash"
    check_target(target, force, kept)
    check_target(lineage_path, force, kept)

    run = get_run(arc, survey_id, run_ref)
    manifest = run_manifest(arc, run)
    inputs = manifest_inputs(manifest)
    raw_files = raw_files_of(arc, survey_id, inputs.get("fixes", []))
    _require_inputs(arc, manifest, raw_files)
    edits, edit_hash, unapplied = delivery_edit_set(arc, survey_id, manifest)
    warnings = [f"exclude-span edit {e.id} ({_station(e)}) is in force but run {run.id[:12]} "
                "did not apply it: solve again to apply it" for e in unapplied]
    built = build_final(arc, survey_id, run, edits=edits, merge=merge_occupations)
    final = built.table
    if final.num_rows == 0:
        raise Refused(f"run {run.id[:12]} with the edits in force leaves no station to deliver",
                      hint="check the run ('nodekeep show') and the reject edits "
                           "('nodekeep edits')")
    changes = None
    if changed_since is not None:
        changes = changes_since(arc, survey_id, changed_since, final, tolerance,
                                merge=merge_occupations)
        final = changes.table
    flags = unacknowledged_flags(final)
    if flags and not allow_flags:
        raise _flag_refusal(final, flags, run)
    _check_positions(final)
    with arc.session() as s:
        survey = s.get(Survey, survey_id)
    produced = utcnow()
    heights_datum = _heights_datum(arc, survey, manifest)
    run_survey = manifest.get("survey") if isinstance(manifest.get("survey"), dict) else {}
    ctx = DeliveryContext(
        survey=survey.name, crs_epsg=survey.crs_epsg, client=survey.client,
        contractor=survey.contractor, area=survey.area, vertical_datum=heights_datum,
        run_id=run.id, edit_set_hash=edit_hash, edit_ids=tuple(e.id for e in edits),
        code_version=__version__, produced_at=produced,
        height_mode=str(run_survey.get("height_mode") or survey.height_mode or "gga"),
        height_param=str(run_survey.get("height_param") or survey.height_param or ""))
    other_datum = [{"record": name, "datum": ctx.gnss_datum}
                   for name in other_datum_stations(final, ctx)]

    final_hash, final_size = arc.objects.put_table(final)
    facts = DeliveryFacts(
        fmt=fmt, file_name=target.name, file_hash="", file_size=0,
        recipient=recipient, note=note, actor=arc.actor, produced=produced,
        allow_flags=allow_flags, flags=flags, survey=survey, heights_datum=heights_datum,
        run=run, run_manifest=manifest, edits=edits, edit_set_hash=edit_hash,
        unapplied=unapplied, inputs=inputs,
        raw_files=raw_files, final=final,
        final_hash=final_hash, merge=merge_occupations, merges=built.merges,
        other_datum=other_datum,
        awaiting=built.awaiting,
        changes=changes.as_dict() if changes is not None else None)
    delivery_id, facts, manifest_hash, (tmp_file, tmp_lineage) = _record(
        arc, survey_id, facts,
        lambda anchor: write(with_decisions(final, edits), replace(ctx, anchor=anchor)),
        final_size, target, lineage_path)
    _move_into_place(arc, survey_id, delivery_id,
                     [(tmp_file, target), (tmp_lineage, lineage_path)])
    return DeliveryResult(
        delivery_id=delivery_id, path=str(target), lineage_path=str(lineage_path),
        format=fmt, file_hash=facts.file_hash, manifest_hash=manifest_hash,
        final_hash=final_hash, run_id=run.id, anchor=facts.anchor.as_dict(),
        n_stations=facts.n_stations, n_records=final.num_rows,
        edit_ids=[e.id for e in edits], edit_set_hash=edit_hash, recipient=recipient,
        unacknowledged_flags=flags, allowed_flags=bool(allow_flags), warnings=warnings,
        merges=built.merges, awaiting=built.awaiting,
        changes=changes.as_dict() if changes is not None else None)


def _require_inputs(arc: Archive, manifest: dict[str, Any],
                    raw_files: list[dict[str, Any]]) -> None:
    """Every object the delivery's lineage will name is in the object store (the run's input
    tables and the raw logs behind its fixes), so a delivery is never made that its own
    manifest cannot be checked against: :class:`ObjectDamaged` names the first one missing."""
    check_objects(arc, manifest, rehash=False)
    for raw in raw_files:
        arc.objects.require(raw["hash"], rehash=False)


def _record(arc: Archive, survey_id: int, f: DeliveryFacts,
            render: Callable[[Anchor], bytes], final_size: int, target: Path,
            lineage_path: Path) -> tuple[int, DeliveryFacts, str, tuple[Path, Path]]:
    """Record the delivery in one transaction: take the ledger's write lock, which fixes
    the delivery's id and its anchor (the next event is its ``deliver`` event), render the
    file with that anchor (``render``), store it and its manifest, and write both to
    temporary files beside their targets. Returns (id, the completed facts, manifest hash,
    temporary files). On any failure the temporary files go."""
    tmp_file = tmp_lineage = None
    try:
        with arc.transaction() as tx:
            anchor = ledger.next_anchor(tx)  # the write lock: the next event and id are ours
            next_id = (tx.execute(select(func.max(Delivery.id))).scalar_one_or_none() or 0) + 1
            data = render(anchor)
            file_hash, file_size = arc.objects.put_bytes(data)
            tmp_file = temp_beside(target, data)
            f = replace(f, file_hash=file_hash, file_size=file_size, anchor=anchor,
                        chain=ledger.short_hashes(tx, anchor.event))
            lineage_bytes = manifest_bytes(lineage_manifest(f, next_id))
            manifest_hash, manifest_size = arc.objects.put_bytes(lineage_bytes)
            tmp_lineage = temp_beside(lineage_path, lineage_bytes)
            arc.register_object(tx, f.file_hash, f.file_size, "delivery")
            arc.register_object(tx, f.final_hash, final_size, "table")
            arc.register_object(tx, manifest_hash, manifest_size, "lineage")
            row = Delivery(
                id=next_id, survey_id=survey_id, run_id=f.run.id, edit_set_hash=f.edit_set_hash,
                edit_ids=json.dumps([e.id for e in f.edits]), format=f.fmt,
                file_hash=f.file_hash, manifest_hash=manifest_hash, final_hash=f.final_hash,
                file_name=f.file_name, recipient=f.recipient, note=f.note,
                allowed_flags=bool(f.allow_flags), created_at=f.produced, created_by=arc.actor)
            tx.add(row)
            tx.flush()
            event = arc.log(tx, "deliver",
                            {"delivery": next_id, "run": f.run.id, "format": f.fmt,
                             "file": f.file_hash, "name": f.file_name, "final": f.final_hash,
                             "lineage": manifest_hash, "recipient": f.recipient,
                             "edit_set": f.edit_set_hash, "edits": [e.id for e in f.edits],
                             "allowed_flags": bool(f.allow_flags),
                             "unacknowledged_flags": f.flags,
                             "merge_occupations": bool(f.merge),
                             "merged_stations": sum(1 for m in f.merges if m["merged"]),
                             **({"changed_since": f.changes["delivery"],
                                 "changes": f.changes["counts"]} if f.changes else {})},
                            survey_id=survey_id, rows=[row])
            if (event.seq, event.prev_hash) != (anchor.event, anchor.after):
                raise RuntimeError(f"delivery {next_id}: its event {event.seq} is not the "
                                   f"anchored event {anchor.event}")
    except BaseException:
        for tmp in (tmp_file, tmp_lineage):
            if tmp is not None:
                with contextlib.suppress(FileNotFoundError):
                    tmp.unlink()
        raise
    return next_id, f, manifest_hash, (tmp_file, tmp_lineage)


def delivery_dict(d: Delivery) -> dict[str, Any]:
    """A delivery row as plain data."""
    return {"id": d.id, "run": d.run_id, "format": d.format, "file_name": d.file_name,
            "file_hash": d.file_hash, "lineage_hash": d.manifest_hash,
            "final_hash": d.final_hash, "edit_set_hash": d.edit_set_hash,
            "edit_ids": json.loads(d.edit_ids or "[]"), "recipient": d.recipient,
            "note": d.note, "allowed_flags": d.allowed_flags, "created_at": d.created_at,
            "created_by": d.created_by}


def list_deliveries(arc: Archive, survey_id: int) -> list[dict[str, Any]]:
    """Every delivery of a survey, oldest first."""
    with arc.session() as s:
        rows = s.scalars(select(Delivery).where(Delivery.survey_id == survey_id)
                         .order_by(Delivery.id)).all()
    return [delivery_dict(d) for d in rows]


def _heights_datum(arc: Archive, survey: Survey, manifest: dict[str, Any]) -> str:
    """The vertical datum delivered heights are in: the elevation model's that the run used
    (heights come from the model), else the survey's; both named when they differ."""
    from archive.survey.inputs import current_input

    model = ""
    version = (manifest.get("input_versions") or {}).get("dem")
    if version:
        found = current_input(arc, survey.id, "dem", version=version)
        if found is not None:
            model = str(json.loads(found[0].meta or "{}").get("vertical_datum") or "")
    stated = survey.vertical_datum or ""
    if model and stated and model != stated:
        return f"{model} (elevation model; survey states {stated})"
    return model or stated
