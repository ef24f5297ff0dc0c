"""What people decided about the review flags of each occupation, from the edit log.

A flag of an occupation is *decided* when an edit in force settles it: an ``ack-flag`` of
that flag (accepted as it is), a ``reject-station`` (the occupation is not delivered: every
flag is settled by it) or a ``set-position`` (it replaces the solver's position, so it
settles the flags that describe that position, :data:`~archive.edits.kinds.POSITION_FLAGS`).
Every other flag is *open*: it waits for review. Edits name an occupation by (line, point,
delivered point index of the occupation), so a decision keeps applying to the same
occupation in a later run of the same deployment log.

Used by the review queue, the QC report and deliveries alike, so they agree on which flags
are open and who decided the others.
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from archive.edits.kinds import FINAL_KINDS, POSITION_FLAGS
from archive.edits.log import edits_in_force
from archive.store.models import Edit

Key = tuple[float, float, int]
"""An occupation as edits name it: (line, point, delivered point index of the occupation)."""

DECISION_KINDS = (*FINAL_KINDS, "undo")
"""Kinds of edit that decide (or take back a decision on) an occupation."""


def edit_key(e: Edit) -> Key:
    """The occupation an edit names."""
    return (float(e.line), float(e.point), int(e.point_index))


def decision(e: Edit) -> dict[str, Any]:
    """One decision as plain data: edit id, kind, flag (ack-flag), actor, UTC time, reason."""
    d: dict[str, Any] = {"edit": e.id, "kind": e.kind, "by": e.created_by,
                         "at": e.created_at, "reason": e.reason}
    if e.kind == "ack-flag":
        d["flag"] = json.loads(e.payload or "{}").get("flag")
    if e.kind == "undo":
        d["undoes"] = e.supersedes
    return d


@dataclass
class FlagState:
    """The flags of one occupation split into open and decided ones."""

    open: list[str] = field(default_factory=list)
    decided: dict[str, dict[str, Any]] = field(default_factory=dict)  # flag -> decision
    rejected: dict[str, Any] | None = None  # the reject-station decision, if any
    decisions: list[dict[str, Any]] = field(default_factory=list)  # every one in force


def split_flags(flags: Iterable[str], in_force: list[Edit]) -> FlagState:
    """Which of ``flags`` are still open given the edits in force on their occupation."""
    state = FlagState(decisions=[decision(e) for e in sorted(in_force, key=lambda e: e.id)])
    acks: dict[str, dict[str, Any]] = {}
    placed = None
    for e, d in zip(sorted(in_force, key=lambda e: e.id), state.decisions, strict=True):
        if e.kind == "reject-station":
            state.rejected = d
        elif e.kind == "set-position":
            placed = d
        elif e.kind == "ack-flag" and d.get("flag"):
            acks[d["flag"]] = d
    for f in flags:
        if not f:
            continue
        settled = (state.rejected or acks.get(f)
                   or (placed if f in POSITION_FLAGS else None))
        if settled is None:
            state.open.append(f)
        else:
            state.decided[f] = settled
    return state


def in_force_by_occupation(session: Session, survey_id: int, *,
                           as_of: datetime | None = None) -> dict[Key, list[Edit]]:
    """The deciding edits in force (ack, reject, set position or height), by occupation."""
    out: dict[Key, list[Edit]] = {}
    for e in edits_in_force(session, survey_id, as_of=as_of, kinds=FINAL_KINDS):
        out.setdefault(edit_key(e), []).append(e)
    return out


def latest_decisions(session: Session, survey_id: int) -> dict[Key, dict[str, Any]]:
    """The most recent deciding edit of each occupation, in force or not (an undo too):
    what decided it last time."""
    q = (select(Edit).where(Edit.survey_id == survey_id, Edit.kind.in_(DECISION_KINDS))
         .order_by(Edit.id))
    return {edit_key(e): decision(e) for e in session.scalars(q)}
