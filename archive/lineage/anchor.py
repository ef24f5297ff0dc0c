"""A delivery's ledger anchor: read it from a delivered file, and prove the chain behind it.

Every delivery states its anchor (:class:`archive.store.ledger.Anchor`): the sequence number
of its own ``deliver`` event and the hash of the event before it. Because each event's hash
covers the one before, that hash stands for the whole history up to the delivery. The
recipient holds it in the file (an SPS ``H26 Ledger anchor`` record, a SEG-P1 header record,
the CSV and GeoPackage columns ``anchor_event``/``anchor_after``, the GeoJSON member
``nodekeep.ledger_anchor``) and in the lineage manifest, which adds the short hash of every
earlier event.

:func:`check_anchor` walks the archive's chain up to the anchored event and names, in the
vocabulary of :mod:`archive.lineage.check`:

- ``history-rewritten``: the chain before the delivery is not the one it was anchored on.
  With the manifest's short hashes the first event that differs is named (an insider who
  changed it and recomputed every later hash changed every hash from there on); from the
  file alone, the range of events that hold the change.
- ``anchor-missing``: the ledger has no event with the anchored sequence number.
- ``anchor-mismatch``: the anchored event is not this delivery's ``deliver`` event as the
  recipient holds it (another delivery, another file, or another lineage manifest).
- ``broken-chain``: an event up to the anchor does not match its own hash or link (what a
  plain ``verify`` reports too).

Never writes.
"""

from __future__ import annotations

import csv
import io
import json
import sqlite3
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import select

from archive.store.ledger import GENESIS, Anchor, hash_of
from archive.store.models import LedgerEvent
from archive.store.verify import Problem

GPKG_LAYER = "receivers"


def read_file_anchor(path: str | Path) -> Anchor | None:
    """The anchor a delivered file states, whatever its format (None when it has none:
    files delivered before anchors, or not a delivered file)."""
    p = Path(path)
    with open(p, "rb") as fh:
        head = fh.read(16)
    if head.startswith(b"SQLite format 3"):
        return _gpkg_anchor(p)
    data = p.read_bytes()
    text = data.decode("utf-8", errors="replace")
    if text.lstrip().startswith("{"):
        try:
            doc = json.loads(text)
            found = (doc.get("nodekeep") or {}).get("ledger_anchor")
            return Anchor(int(found["event"]), str(found["after"])) if found else None
        except (ValueError, TypeError, KeyError, AttributeError):
            return None
    first = text.split("\n", 1)[0]
    if "anchor_event" in first:
        row = next(csv.DictReader(io.StringIO(text)), None)
        if row and row.get("anchor_event") and row.get("anchor_after"):
            return Anchor(int(row["anchor_event"]), row["anchor_after"])
        return None
    return _header_anchor(text)


def _header_anchor(text: str) -> Anchor | None:
    """The anchor in the 80-column header records of an SPS or SEG-P1 file: the record
    labelled ``Ledger anchor`` and the records continuing it."""
    lines = [ln for ln in text.splitlines() if ln.startswith("H")]
    for i, ln in enumerate(lines):
        if "Ledger anchor" not in ln:
            continue
        pieces = [ln]
        for more in lines[i + 1:]:
            if more[4:32].strip() == "(continued)":  # SPS: data continues in 33-80
                pieces.append(more[32:])
            elif more[4:6] == "  ":  # SEG-P1: indented free text
                pieces.append(more[4:])
            else:
                break
        return Anchor.parse(" ".join(p.strip() for p in pieces))
    return None


def _gpkg_anchor(path: Path) -> Anchor | None:
    try:
        db = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
        try:
            row = db.execute(f'SELECT anchor_event, anchor_after FROM "{GPKG_LAYER}" '
                             "LIMIT 1").fetchone()
        finally:
            db.close()
    except sqlite3.Error:
        return None
    return Anchor(int(row[0]), str(row[1])) if row and row[0] is not None else None


@dataclass
class AnchorCheck:
    """The outcome of :func:`check_anchor`."""

    anchor: Anchor
    events_checked: int = 0
    first_differing: int | None = None
    problems: list[Problem] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return {"anchor": self.anchor.as_dict(), "events_checked": self.events_checked,
                "first_differing_event": self.first_differing}


def check_anchor(session: Any, anchor: Anchor, *, delivery_id: int | None,
                 file_hash: str | None, manifest_hash: str | None = None,
                 short_hashes: list[str] | None = None) -> AnchorCheck:
    """Check that the archive's chain still holds ``anchor`` (see module doc).

    ``delivery_id``, ``file_hash`` and ``manifest_hash`` (those held by the recipient;
    None: not known) are what the anchored event must record;
    ``short_hashes`` (from the lineage manifest) the hashes of the events before it as they
    were when it was delivered.
    """
    out = AnchorCheck(anchor)
    events = list(session.scalars(select(LedgerEvent).where(LedgerEvent.seq <= anchor.event)
                                  .order_by(LedgerEvent.seq)))
    prev = GENESIS
    for ev in events[:-1] if events and events[-1].seq == anchor.event else events:
        out.events_checked += 1
        subject = f"ledger event {ev.seq} ({ev.action})"
        if ev.prev_hash != prev or hash_of(ev) != ev.hash:
            out.problems.append(Problem("broken-chain", subject,
                                        "the event does not match its own hash or link"))
        if out.first_differing is None and short_hashes is not None:
            held = short_hashes[ev.seq - 1] if ev.seq - 1 < len(short_hashes) else None
            if held is not None and not ev.hash.startswith(held):
                out.first_differing = ev.seq
                why = ("this is another archive, or its whole history was rewritten"
                       if ev.seq == 1 else "this event was changed after the delivery and "
                       "every later hash recomputed")
                out.problems.append(Problem(
                    "history-rewritten", subject,
                    f"differs from the event delivery {delivery_id} was anchored on (hash "
                    f"{held}… then, {ev.hash[:len(held)]}… now): {why}"))
        prev = ev.hash
    last = events[-1] if events and events[-1].seq == anchor.event else None
    if prev != anchor.after and out.first_differing is None:
        n = anchor.event - 1
        out.problems.append(Problem(
            "history-rewritten", f"ledger events 1-{n}",
            f"the chain before event {anchor.event} ends in {prev[:16]}…, not in the "
            f"{anchor.after[:16]}… the delivery was anchored on: an event up to {n} was "
            "changed after the delivery (the lineage manifest's short hashes name which)"))
    if last is None:
        out.problems.append(Problem(
            "anchor-missing", f"ledger event {anchor.event}",
            "the ledger has no event with this number: events were removed"))
        return out
    payload = json.loads(last.payload) if last.payload is not None else {}
    subject = f"ledger event {last.seq} ({last.action})"
    stated = {"delivery": delivery_id, "file": file_hash, "lineage": manifest_hash}
    differs = [k for k, v in stated.items() if v is not None and payload.get(k) != v]
    if last.payload is None:
        out.problems.append(Problem(
            "anchor-mismatch", subject, "this archive is a custody bundle that carries the "
            "anchored event as its digest only: the delivery is not one of its deliveries"))
    elif last.action != "deliver" or differs:
        out.problems.append(Problem(
            "anchor-mismatch", subject,
            f"is not the event of delivery {delivery_id} as held"
            + (f" ({', '.join(differs)} differ)" if differs and last.action == "deliver"
               else "")))
    elif last.prev_hash != prev or hash_of(last) != last.hash:
        out.problems.append(Problem("broken-chain", subject,
                                    "the event does not match its own hash or link"))
    out.events_checked += 1
    return out
