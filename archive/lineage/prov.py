"""A delivery's lineage as W3C PROV (PROV-JSON), for tools other than nodekeep.

:func:`delivery_provenance` describes one delivery with the PROV data model (W3C PROV-DM),
built and serialised by the ``prov`` library:

- **entities**, named by their SHA-256: every raw log and the fix table parsed from it,
  every input table of the run and the file it was loaded from, the run's manifest and
  positions, each edit the delivery rests on (named by its row digest), the final
  positions, the delivered file and its lineage manifest;
- **activities**: each load (of a raw log, of an input file), the solve, each edit and the
  delivery, with their UTC times;
- **agents**: the people (actors) who received, loaded, solved, edited and delivered, and
  nodekeep itself (a software agent) at the version that solved;
- **relations**: ``used`` and ``wasGeneratedBy`` for each activity, ``wasAssociatedWith``
  (the solve with the run manifest as its plan), ``wasAttributedTo``, and a
  ``wasDerivedFrom`` chain delivered file -> final positions -> run positions -> fix and
  input tables -> raw logs and input files, so every raw log is an entity the delivered
  file derives from.

Identifiers: a hash is a qualified name in the ``sha256`` namespace, which expands to an
RFC 6920 ``nih:sha-256;<hex>`` name (named information, human-readable form); everything
else lives in the ``nodekeep`` namespace. Read-only.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import datetime
from typing import Any
from urllib.parse import quote

from prov.constants import PROV
from prov.model import ProvDocument

from archive import __version__
from archive.lineage.common import matched_inputs
from archive.lineage.trace import delivery_of_file
from archive.store.archive import Archive
from archive.store.models import Delivery, Run

HASH_NS = "nih:sha-256;"
"""RFC 6920 §7 human-readable named information: ``nih:sha-256;`` + hex digest."""
NODEKEEP_NS = "urn:nodekeep:"


@dataclass
class Provenance:
    """A PROV document of a delivery, with counts for people."""

    document: ProvDocument
    delivery_id: int
    file_hash: str

    def json_text(self) -> str:
        """The PROV-JSON serialisation (indented, UTF-8 text)."""
        return self.document.serialize(format="json", indent=2) + "\n"

    def counts(self) -> dict[str, int]:
        """How many entities, activities, agents and relations the document holds."""
        doc = json.loads(self.document.serialize(format="json"))
        return {k: len(doc.get(k, {})) for k in ("entity", "activity", "agent")} | {
            "relations": sum(len(v) for k, v in doc.items()
                             if k not in ("prefix", "entity", "activity", "agent"))}


def _time(value: Any) -> datetime | None:
    if value is None or isinstance(value, datetime):
        return value
    return datetime.fromisoformat(str(value))


class _Builder:
    """Adds records once each (entities, agents) and keeps the namespaces."""

    def __init__(self) -> None:
        self.doc = ProvDocument()
        self.doc.add_namespace("sha256", HASH_NS)
        self.nk = self.doc.add_namespace("nodekeep", NODEKEEP_NS)
        self.seen: set[str] = set()

    def kind(self, name: str) -> Any:
        """A ``prov:type`` value: a qualified name in the nodekeep namespace."""
        return self.nk[name]

    def entity(self, h: str, label: str, kind: str, **attrs: Any) -> str:
        ident = f"sha256:{h}"
        if ident not in self.seen:
            self.seen.add(ident)
            self.doc.entity(ident, {"prov:label": label, "prov:type": self.kind(kind),
                                    **{f"nodekeep:{k}": v for k, v in attrs.items()
                                       if v is not None}})
        return ident

    def agent(self, name: str) -> str:
        ident = f"nodekeep:actor/{quote(name, safe='')}"
        if ident not in self.seen:
            self.seen.add(ident)
            self.doc.agent(ident, {"prov:type": PROV["Person"], "prov:label": name})
        return ident

    def software(self, version: str) -> str:
        ident = f"nodekeep:software/nodekeep-{quote(version, safe='')}"
        if ident not in self.seen:
            self.seen.add(ident)
            self.doc.agent(ident, {"prov:type": PROV["SoftwareAgent"],
                                   "prov:label": f"nodekeep {version}"})
        return ident


def delivery_provenance(arc: Archive, path: str | None = None, *,
                        delivery_id: int | None = None) -> Provenance:
    """The PROV document of the delivery that wrote ``path`` (found by its SHA-256), or of
    delivery ``delivery_id`` (see module doc)."""
    d = delivery_of_file(arc, path) if path is not None else _delivery(arc, delivery_id)
    lineage = json.loads(arc.objects.read_bytes(d.manifest_hash))
    with arc.session() as s:
        run = s.get(Run, d.run_id)
    b = _Builder()
    solve_id = _solve(b, arc, d, run, lineage)
    final = b.entity(d.final_hash, f"final positions of delivery {d.id}", "FinalPositions")
    positions = f"sha256:{run.positions_hash}"
    b.doc.wasDerivedFrom(final, positions)
    act = f"nodekeep:delivery/{d.id}"
    b.doc.activity(act, d.created_at, d.created_at, {
        "prov:type": b.kind("Delivery"), "prov:label": f"delivery {d.id} ({d.format})",
        "nodekeep:recipient": d.recipient, "nodekeep:format": d.format})
    who = b.agent(d.created_by)
    b.doc.wasAssociatedWith(act, who)
    b.doc.used(act, positions)
    for e in lineage.get("edits") or []:
        edit = _edit(b, e)
        b.doc.used(act, edit)
        b.doc.wasDerivedFrom(final, edit)
    delivered = b.entity(d.file_hash, d.file_name, "DeliveredFile", format=d.format)
    manifest = b.entity(d.manifest_hash, d.file_name + ".lineage.json", "LineageManifest")
    for out in (final, delivered, manifest):
        b.doc.wasGeneratedBy(out, act, d.created_at)
        b.doc.wasAttributedTo(out, who)
    b.doc.wasDerivedFrom(delivered, final)
    b.doc.wasDerivedFrom(manifest, delivered)
    b.doc.wasInformedBy(act, solve_id)
    return Provenance(b.doc, d.id, d.file_hash)


def _delivery(arc: Archive, delivery_id: int | None) -> Delivery:
    from archive.errors import UsageError

    with arc.session() as s:
        d = s.get(Delivery, delivery_id) if delivery_id is not None else None
    if d is None:
        raise UsageError(f"no delivery {delivery_id} in this archive",
                         hint="list deliveries with 'nodekeep history'")
    return d


def _solve(b: _Builder, arc: Archive, d: Delivery, run: Run, lineage: dict[str, Any]) -> str:
    """The solve activity with the loads behind every table it read; returns its id."""
    manifest = (lineage.get("run") or {}).get("manifest") or {}
    act = f"nodekeep:run/{run.id}"
    b.doc.activity(act, run.created_at, run.created_at, {
        "prov:type": b.kind("Solve"), "prov:label": f"solve {run.id[:12]}"
                                                      + (f" ({run.label})" if run.label else ""),
        "nodekeep:codeVersion": run.code_version})
    plan = b.entity(run.manifest_hash, f"run {run.id[:12]} manifest", "RunManifest")
    positions = b.entity(run.positions_hash, f"run {run.id[:12]} positions", "Positions",
                         digest=run.positions_digest)
    b.doc.wasAssociatedWith(act, b.agent(run.created_by), plan)
    b.doc.wasAssociatedWith(act, b.software(run.code_version or __version__))
    b.doc.used(act, plan)
    b.doc.wasGeneratedBy(positions, act, run.created_at)
    b.doc.wasAttributedTo(positions, b.agent(run.created_by))
    for raw in lineage.get("raw_files") or []:
        table = _raw_load(b, raw)
        if table is not None:
            b.doc.used(act, table)
            b.doc.wasDerivedFrom(positions, table)
    for table in _input_loads(b, arc, d.survey_id, lineage.get("inputs") or {}):
        b.doc.used(act, table)
        b.doc.wasDerivedFrom(positions, table)
    applied = {int(e["id"]) for e in manifest.get("edits") or [] if "id" in e}
    for e in lineage.get("edits") or []:
        if int(e["id"]) in applied:  # exclude spans the solve applied
            b.doc.used(act, _edit(b, e))
    return act


def _raw_load(b: _Builder, raw: dict[str, Any]) -> str | None:
    """A raw log, its load and the fix table it gave; returns the fix table's id."""
    if not raw.get("hash"):
        return None
    log = b.entity(raw["hash"], raw.get("name") or raw["hash"][:12], "RawLog",
                   node=raw.get("node"), size=raw.get("size"), logFormat=raw.get("format"))
    if not raw.get("fixes"):
        return None
    table = b.entity(raw["fixes"], f"fixes of {raw.get('name') or raw['hash'][:12]}",
                     "FixTable", node=raw.get("node"))
    act = f"nodekeep:load/raw/{raw['hash']}"
    when = _time(raw.get("received_at"))
    if act not in b.seen:
        b.seen.add(act)
        b.doc.activity(act, when, when, {"prov:type": b.kind("LoadRawLog"),
                                         "prov:label": f"load {raw.get('name', '')}".strip()})
        if raw.get("received_by"):
            b.doc.wasAssociatedWith(act, b.agent(raw["received_by"]))
        b.doc.used(act, log)
        b.doc.wasGeneratedBy(table, act, when)
        b.doc.wasDerivedFrom(table, log)
    return table


def _input_loads(b: _Builder, arc: Archive, survey_id: int, inputs: dict[str, Any]
                 ) -> list[str]:
    """Each input table the run read (stations, deployments, elevation model), the file it
    was loaded from and the load; returns the tables' ids."""
    out = []
    for kind, h, v in sorted(matched_inputs(arc, survey_id, inputs), key=lambda m: m[0]):
        table = b.entity(h, f"{kind} table" + (f" v{v.version}" if v else ""), "InputTable",
                         inputKind=kind, version=v.version if v else None)
        out.append(table)
        if v is None:
            continue
        act = f"nodekeep:load/{kind}/{v.version}"
        if act in b.seen:
            continue
        b.seen.add(act)
        b.doc.activity(act, v.created_at, v.created_at, {
            "prov:type": b.kind("LoadInput"), "prov:label": f"load {kind} v{v.version}"})
        b.doc.wasAssociatedWith(act, b.agent(v.created_by))
        b.doc.wasGeneratedBy(table, act, v.created_at)
        if v.source_hash != h:
            source = b.entity(v.source_hash, v.original_name, "InputFile", inputKind=kind)
            b.doc.used(act, source)
            b.doc.wasDerivedFrom(table, source)
    return out


def _edit(b: _Builder, e: dict[str, Any]) -> str:
    """An edit (named by its row digest), the activity that made it and its author."""
    station = f"{e['line']:g}/{e['point']:g} index {e.get('index', 1)}"
    ident = b.entity(e["digest"], f"edit {e['id']} {e['kind']} {station}", "Edit",
                     editId=e["id"], editKind=e["kind"], reason=e.get("reason"))
    act = f"nodekeep:edit/{e['id']}"
    if act not in b.seen:
        b.seen.add(act)
        when = _time(e.get("created_at"))
        b.doc.activity(act, when, when, {"prov:type": b.kind("Edit"),
                                         "prov:label": f"edit {e['id']} ({e['kind']})"})
        who = b.agent(e.get("created_by") or "unknown")
        b.doc.wasAssociatedWith(act, who)
        b.doc.wasGeneratedBy(ident, act, when)
        b.doc.wasAttributedTo(ident, who)
    return ident
