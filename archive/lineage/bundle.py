"""Custody bundles: a self-contained archive holding exactly what some deliveries rest on.

``nodekeep bundle --delivery N [--delivery M ...] --to DIR`` gives a client (or an auditor)
a copy they can keep and check without the contractor's database. :func:`what_deliveries_rest_on`
chooses the rows and objects; :func:`archive.store.subset.write_subset` writes them with the
ledger evidence (the whole chain of event hashes, the events the bundle does not need
reduced to the digest of their payload) and verifies the result. What goes in, per delivery:

- the survey, the delivery row, its delivered file, lineage manifest and final positions;
- the run it delivered: manifest and positions;
- every raw log whose fix table the run read, with that fix table (and rejects table and
  mapping profile, when there are some);
- the input versions the run read (stations, deployments, elevation model: table and the
  file loaded), matched by hash;
- the edits the delivery names and those the run applied, the edits they superseded, and
  the edits made by the time of the delivery that superseded any of them (so whether each
  was still in force is answered as the source answered it).

Check points (``control``), other runs, other deliveries and later loads stay out. The
bundle opens as an ordinary archive: ``verify``, ``where``, ``trace``, ``show`` and
``reproduce`` work in it; optionally one tar file of the folder is written too. The source
archive is only read (a read-only archive can be bundled).
"""

from __future__ import annotations

import contextlib
import json
import os
import tarfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sqlalchemy import or_, select

from archive import __version__
from archive.errors import UsageError
from archive.progress import NoProgress, Progress
from archive.solve.run import manifest_inputs, run_manifest
from archive.store.archive import Archive
from archive.store.hashing import sha256_file
from archive.store.models import Delivery, Edit, InputVersion, RawFile, Run, Survey
from archive.store.outfiles import check_target
from archive.store.subset import Selection, SubsetReport, write_subset


@dataclass
class BundleResult:
    """What :func:`make_bundle` wrote."""

    folder: str
    deliveries: list[int]
    runs: list[str]
    subset: SubsetReport
    tar: dict[str, Any] | None
    seconds: float

    def as_dict(self) -> dict[str, Any]:
        return {"folder": self.folder, "deliveries": self.deliveries, "runs": self.runs,
                **self.subset.as_dict(), "tar": self.tar, "seconds": round(self.seconds, 2)}


def what_deliveries_rest_on(arc: Archive, delivery_ids: list[int]) -> tuple[Selection, list[str]]:
    """The rows and objects deliveries ``delivery_ids`` rest on (see module doc), and their
    runs. UsageError naming an unknown delivery."""
    sel = Selection()
    runs: list[str] = []
    with arc.session() as s:
        for did in dict.fromkeys(delivery_ids):
            d = s.get(Delivery, int(did))
            if d is None:
                known = s.scalars(select(Delivery.id).order_by(Delivery.id)).all()
                raise UsageError(f"no delivery {did} in this archive",
                                 hint="deliveries: " + (", ".join(map(str, known)) or "none"))
            run = s.get(Run, d.run_id)
            manifest = run_manifest(arc, run)
            inputs = manifest_inputs(manifest)
            for row in (s.get(Survey, d.survey_id), d, run):
                sel.add(row)
            runs.append(run.id)
            for raw in s.scalars(select(RawFile).where(
                    RawFile.survey_id == d.survey_id,
                    RawFile.fixes_hash.in_(inputs["fixes"] or [""]))):
                sel.add(raw)
            named = {k: v for k, v in inputs.items() if k != "fixes" and isinstance(v, str)}
            for v in s.scalars(select(InputVersion).where(
                    InputVersion.survey_id == d.survey_id,
                    or_(InputVersion.table_hash.in_(named.values()),
                        InputVersion.source_hash.in_(named.values())))):
                if named.get(v.kind) in (v.table_hash, v.source_hash):
                    sel.add(v)
            ids = set(json.loads(d.edit_ids or "[]"))
            ids |= {int(e["id"]) for e in manifest.get("edits") or [] if "id" in e}
            for e in _edit_closure(s, d, ids):
                sel.add(e)
    return sel, list(dict.fromkeys(runs))


def _edit_closure(s: Any, d: Delivery, ids: set[int]) -> list[Edit]:
    """The edits ``ids``, those they supersede (down the chain), and those made by the
    delivery's time that supersede any of them, until nothing more is added."""
    every = {e.id: e for e in s.scalars(select(Edit).where(Edit.survey_id == d.survey_id))}
    chosen = {i for i in ids if i in every}
    while True:
        more = {every[i].supersedes for i in chosen if every[i].supersedes is not None}
        more |= {e.id for e in every.values() if e.supersedes in chosen
                 and e.created_at <= d.created_at}
        if more <= chosen:
            return [every[i] for i in sorted(chosen)]
        chosen |= more


def make_bundle(arc: Archive, delivery_ids: list[int], to: str | Path, *,
                tar: str | Path | None = None, force: bool = False,
                progress: Progress | None = None) -> BundleResult:
    """Write the custody bundle of ``delivery_ids`` as a new archive folder ``to`` (and,
    with ``tar``, one tar file of it); see module doc. The bundle is verified before this
    returns."""
    t0 = time.perf_counter()
    if not delivery_ids:
        raise UsageError("a bundle needs at least one delivery",
                         hint="name them with --delivery N (ids: 'nodekeep history' or the "
                              "delivery's lineage manifest)")
    tar_path = Path(tar) if tar is not None else None
    if tar_path is not None:
        check_target(tar_path, force)
    sel, runs = what_deliveries_rest_on(arc, delivery_ids)
    ids = sorted({int(i) for i in delivery_ids})
    report = write_subset(arc, to, sel, progress=progress or NoProgress(), declaration={
        "deliveries": ids, "runs": runs, "code_version": __version__,
        "contents": "what the deliveries rest on: survey, deliveries, runs, raw logs and "
                    "fix tables read, input versions read, edits named and superseded"})
    packed = _tar(Path(to), tar_path) if tar_path is not None else None
    return BundleResult(folder=str(Path(to)), deliveries=ids, runs=runs, subset=report,
                        tar=packed, seconds=time.perf_counter() - t0)


def _tar(folder: Path, path: Path) -> dict[str, Any]:
    """One uncompressed tar of ``folder`` (entries sorted, owner names dropped), written
    beside its target and renamed into place; its path, size and SHA-256."""
    def plain(info: tarfile.TarInfo) -> tarfile.TarInfo:
        info.uid = info.gid = 0
        info.uname = info.gname = ""
        return info

    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with tarfile.open(tmp, "w", format=tarfile.PAX_FORMAT) as tf:
            tf.add(folder, arcname=folder.name, recursive=False, filter=plain)
            for p in sorted(folder.rglob("*")):
                tf.add(p, arcname=str(Path(folder.name) / p.relative_to(folder)),
                       recursive=False, filter=plain)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        raise
    h, size = sha256_file(path)
    return {"path": str(path), "bytes": size, "sha256": h}
