"""Checking a delivered file and its lineage manifest against the archive.

A delivery leaves two files with the recipient: the file itself and ``<file>.lineage.json``.
:func:`check_delivery` proves, from those two files alone, that they are what the archive
delivered and that everything they name is still intact, or names exactly what differs:

- ``file-missing``: the delivered file is not beside its manifest.
- ``file-changed``: the file's SHA-256 is not the ``file_hash`` its manifest states.
- ``manifest-unreadable``: the manifest is not a nodekeep lineage manifest (JSON).
- ``manifest-changed``: the manifest's SHA-256 is not the one the archive stored for its
  delivery (the manifest was edited after delivery).
- ``no-delivery``: the archive holds no delivery matching this manifest.
- ``delivery-mismatch``: the delivery row disagrees with the manifest (file hash, run,
  format, file name).
- ``run-missing`` / ``run-mismatch``: the run the manifest names is not in the catalog, or
  its manifest, positions or digest differ from what the manifest recorded.
- ``missing`` / ``hash-mismatch`` (the :mod:`archive.store.verify` vocabulary): an object
  the delivery depends on (file, manifest, final positions, run manifest and positions,
  input tables, raw logs) is gone from the store or its bytes changed.
- ``altered-row`` / ``unledgered-row``: the delivery row changed since its ledger event
  recorded it, or no ledger event recorded it.
- ``history-rewritten`` / ``anchor-missing`` / ``anchor-mismatch`` / ``broken-chain``: the
  ledger no longer holds the history the delivery was anchored on
  (:mod:`archive.lineage.anchor`). Deliveries made before anchors have none to check.

Never writes.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import select

from archive.deliver.deliveries import LINEAGE_SUFFIX
from archive.errors import UsageError
from archive.lineage.anchor import check_anchor, read_file_anchor
from archive.store.archive import Archive
from archive.store.hashing import is_hash, sha256_bytes, sha256_file
from archive.store.ledger import Anchor, row_digest, row_key
from archive.store.models import Delivery, LedgerEvent, Run, StoredObject
from archive.store.verify import Problem


@dataclass
class DeliveryCheck:
    """The outcome of :func:`check_delivery`."""

    manifest_path: str
    file_path: str
    delivery_id: int | None = None
    run_id: str | None = None
    file_hash: str | None = None
    manifest_hash: str | None = None
    objects_checked: int = 0
    anchor: dict[str, Any] | None = None  # the ledger anchor checked (None: not anchored)
    problems: list[Problem] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    def add(self, kind: str, subject: str, detail: str) -> None:
        self.problems.append(Problem(kind, subject, detail))

    def as_dict(self) -> dict[str, Any]:
        return {"ok": self.ok, "manifest_path": self.manifest_path, "file_path": self.file_path,
                "delivery_id": self.delivery_id, "run_id": self.run_id,
                "file_hash": self.file_hash, "manifest_hash": self.manifest_hash,
                "objects_checked": self.objects_checked, "anchor": self.anchor,
                "problems": [p.as_dict() for p in self.problems]}


def manifest_for(path: str | Path) -> Path:
    """The lineage manifest of ``path``: itself when it is one, else ``<path>.lineage.json``."""
    p = Path(path)
    if p.name.endswith(LINEAGE_SUFFIX):
        return p
    beside = p.with_name(p.name + LINEAGE_SUFFIX)
    if beside.is_file():
        return beside
    raise UsageError(f"{p} is not a lineage manifest and has no {beside.name} beside it",
                     hint="give the '<file>.lineage.json' written with the delivered file")


def _hashes(value: Any) -> list[str]:
    """Every SHA-256 hex string inside a JSON value, in order of appearance."""
    if isinstance(value, str):
        return [value] if is_hash(value) else []
    if isinstance(value, dict):
        return [h for v in value.values() for h in _hashes(v)]
    if isinstance(value, list):
        return [h for v in value for h in _hashes(v)]
    return []


def _dependencies(lineage: dict[str, Any], row: Delivery | None, run: Run | None
                  ) -> dict[str, str]:
    """Objects a delivery depends on: hash -> what it is."""
    deps: dict[str, str] = {}
    if row is not None:
        deps[row.file_hash] = "delivered file"
        deps[row.manifest_hash] = "lineage manifest"
        deps[row.final_hash] = "final positions"
    if run is not None:
        deps[run.manifest_hash] = f"run {run.id[:12]} manifest"
        deps[run.positions_hash] = f"run {run.id[:12]} positions"
    for h in _hashes(lineage.get("inputs", {})):
        deps.setdefault(h, "input table")
    for raw in lineage.get("raw_files", []) or []:
        if isinstance(raw, dict):
            if is_hash(str(raw.get("hash", ""))):
                deps.setdefault(raw["hash"], f"raw log {raw.get('name', '')}".strip())
            if is_hash(str(raw.get("fixes", ""))):
                deps.setdefault(raw["fixes"], f"fix table of {raw.get('name', '')}".strip())
    return deps


def _ledgered_digest(session: Any, row: Delivery) -> str | None:
    """The digest the ledger recorded for a delivery row (None when never recorded)."""
    key = row_key(row)
    for ev in session.scalars(select(LedgerEvent).where(LedgerEvent.action == "deliver")
                              .order_by(LedgerEvent.seq)):
        try:
            payload = json.loads(ev.payload or "{}")
        except ValueError:
            continue
        for r in payload.get("rows", []) if isinstance(payload, dict) else []:
            if r.get("table") == Delivery.__tablename__ and r.get("key") == key:
                return r.get("digest")
    return None


def check_delivery(arc: Archive, path: str | Path, *, rehash: bool = True) -> DeliveryCheck:
    """Check a delivered file and its ``.lineage.json`` manifest against the archive.

    ``path`` may name the manifest or the delivered file (its manifest is found beside
    it). A delivered file without its manifest is checked on its own, from the ledger
    anchor it states (:func:`archive.lineage.anchor.read_file_anchor`). The result lists
    every problem found (see the module docstring); it never raises for a difference, only
    for a path that is neither.
    """
    p = Path(path)
    try:
        mpath = manifest_for(p)
    except UsageError:
        anchor = read_file_anchor(p) if p.is_file() else None
        if anchor is None:
            raise
        return _check_file_alone(arc, p, anchor, rehash=rehash)
    if not mpath.is_file():
        raise UsageError(f"no such lineage manifest: {mpath}")
    fpath = mpath.with_name(mpath.name[: -len(LINEAGE_SUFFIX)])
    data = mpath.read_bytes()
    out = DeliveryCheck(str(mpath), str(fpath), manifest_hash=sha256_bytes(data))
    try:
        lineage = json.loads(data)
        if not isinstance(lineage, dict) or "delivery" not in lineage:
            raise ValueError("no 'delivery' section")
    except (ValueError, UnicodeDecodeError) as exc:
        out.add("manifest-unreadable", str(mpath), f"not a lineage manifest: {exc}")
        lineage = {}
    stated = lineage.get("delivery", {}) if isinstance(lineage.get("delivery"), dict) else {}
    stated_file = stated.get("file_hash")
    if fpath.is_file():
        out.file_hash, _ = sha256_file(fpath)
        if stated_file and out.file_hash != stated_file:
            out.add("file-changed", str(fpath),
                    f"SHA-256 {out.file_hash} is not the {stated_file} its manifest states")
    else:
        out.add("file-missing", str(fpath), "the delivered file is not beside its manifest")

    with arc.session() as s:
        row = s.scalars(select(Delivery).where(Delivery.manifest_hash == out.manifest_hash)
                        .order_by(Delivery.id)).first()
        if row is None and isinstance(stated.get("id"), int):
            row = s.get(Delivery, stated["id"])
            if row is not None:
                out.add("manifest-changed", str(mpath),
                        f"SHA-256 {out.manifest_hash} is not the manifest stored for delivery "
                        f"{row.id} ({row.manifest_hash})")
        ledger = lineage.get("ledger") if isinstance(lineage.get("ledger"), dict) else None
        if ledger is not None:
            a = ledger.get("anchor") or {}
            _check_ledger(s, out, Anchor(int(a.get("event", 0)), str(a.get("after", ""))),
                          delivery_id=stated.get("id"), file_hash=stated_file,
                          manifest_hash=out.manifest_hash if row is not None
                          and row.manifest_hash == out.manifest_hash else None,
                          short_hashes=list(ledger.get("short_hashes") or []))
        if row is None:
            if lineage:
                out.add("no-delivery", str(mpath),
                        "this archive holds no delivery recorded with this manifest")
            return out
        run = _check_row(s, out, row, lineage)
        known = set(s.scalars(select(StoredObject.hash)))
    _check_objects(arc, out, lineage, row, run, known, rehash=rehash)
    return out


def _check_file_alone(arc: Archive, fpath: Path, anchor: Anchor, *, rehash: bool
                      ) -> DeliveryCheck:
    """Check a delivered file without its manifest: its hash finds the delivery, the anchor
    it states is proved against the chain (the first event that differs cannot be named
    without the manifest's short hashes: only the range holding the change)."""
    out = DeliveryCheck("", str(fpath))
    out.file_hash, _ = sha256_file(fpath)
    with arc.session() as s:
        row = s.scalars(select(Delivery).where(Delivery.file_hash == out.file_hash)
                        .order_by(Delivery.id)).first()
        _check_ledger(s, out, anchor, delivery_id=row.id if row else None,
                      file_hash=out.file_hash)
        if row is None:
            out.add("no-delivery", str(fpath), f"this archive holds no delivery of a file "
                                               f"with SHA-256 {out.file_hash}")
            return out
        out.manifest_hash = row.manifest_hash
        lineage: dict[str, Any] = {}
        if arc.objects.exists(row.manifest_hash):
            lineage = json.loads(arc.objects.read_bytes(row.manifest_hash))
        run = _check_row(s, out, row, lineage)
        known = set(s.scalars(select(StoredObject.hash)))
    _check_objects(arc, out, lineage, row, run, known, rehash=rehash)
    return out


def _check_ledger(s: Any, out: DeliveryCheck, anchor: Anchor, *, delivery_id: int | None,
                  file_hash: str | None, manifest_hash: str | None = None,
                  short_hashes: list[str] | None = None) -> None:
    result = check_anchor(s, anchor, delivery_id=delivery_id, file_hash=file_hash,
                          manifest_hash=manifest_hash, short_hashes=short_hashes)
    out.anchor = result.as_dict()
    out.problems.extend(result.problems)


def _check_row(s: Any, out: DeliveryCheck, row: Delivery, lineage: dict[str, Any]
               ) -> Run | None:
    """The delivery row against the manifest and its ledger record; its run. Returns the
    run (None when it is gone)."""
    stated = lineage.get("delivery", {}) if isinstance(lineage.get("delivery"), dict) else {}
    out.delivery_id = row.id
    subject = f"deliveries row {row.id}"
    for name, mine, theirs in (
        ("file hash", row.file_hash, stated.get("file_hash")),
        ("format", row.format, stated.get("format")),
        ("file name", row.file_name, stated.get("file_name")),
        ("run", row.run_id, (lineage.get("run") or {}).get("id")),
    ):
        if theirs is not None and mine != theirs:
            out.add("delivery-mismatch", subject,
                    f"{name} is {mine!r} in the archive, {theirs!r} in the manifest")
    if (out.file_hash and out.file_hash != row.file_hash
            and not any(p.kind == "file-changed" for p in out.problems)):
        out.add("file-changed", out.file_path,
                f"SHA-256 {out.file_hash} is not the delivered {row.file_hash}")
    recorded = _ledgered_digest(s, row)
    if recorded is None:
        out.add("unledgered-row", subject, "no ledger event recorded this delivery")
    elif recorded != row_digest(row):
        out.add("altered-row", subject, "row content differs from its ledger record")
    out.run_id = row.run_id
    run = s.get(Run, row.run_id)
    stated_run = lineage.get("run") or {}
    if run is None:
        out.add("run-missing", f"run {row.run_id}", "the delivered run is not in the catalog")
        return None
    for key in ("manifest_hash", "positions_hash", "positions_digest"):
        theirs = stated_run.get(key)
        if theirs is not None and getattr(run, key) != theirs:
            out.add("run-mismatch", f"run {run.id[:12]}",
                    f"{key} is {getattr(run, key)} in the archive, {theirs} in the manifest")
    return run


def _check_objects(arc: Archive, out: DeliveryCheck, lineage: dict[str, Any], row: Delivery,
                   run: Run | None, known: set[str], *, rehash: bool) -> None:
    """Every object the delivery depends on is in the store, and (``rehash``) intact."""
    direct = {row.file_hash, row.manifest_hash, row.final_hash}
    if run is not None:
        direct |= {run.manifest_hash, run.positions_hash}
    for h, what in _dependencies(lineage, row, run).items():
        if h not in known and h not in direct:
            continue  # a hash in the inputs that names no object (a table digest)
        if h not in known or not arc.objects.exists(h):
            out.add("missing", f"object {h}", f"{what} is not in the archive")
            continue
        if rehash and not arc.objects.check(h):
            out.add("hash-mismatch", f"object {h}", f"{what} bytes no longer match the hash")
        out.objects_checked += 1
