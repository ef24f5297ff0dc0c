"""GPS week number rollover: dates 1024 weeks (or a multiple) in the past, corrected or refused.

The GPS week count wraps every 1024 weeks (7168 days, about 19.6 years; rollovers on
1999-08-22 and 2019-04-07), and receivers with old firmware can report dates a whole
number of 1024-week periods in the past. After a log is read, its dates are checked:

- **in the log itself**: a date that lies a whole number of 1024-week periods (within
  :data:`TOLERANCE_DAYS`) before the log's latest date is moved forward by that number of
  periods (a receiver that started with the right week and lost it, or the reverse);
- **against the survey**: with a reference window (the deployment window of the log's node,
  else of the survey), a date more than :data:`TOLERANCE_DAYS` before the window is moved
  forward by the whole number of periods that places it in the window (within the same
  tolerance); when no whole number does, the date cannot be decided and the position lines
  of its epochs are rejected with the reason ``rollover``.

Nothing moves silently: every correction or refusal becomes a note of the raw file
(``notes``: what was moved, by how many weeks, which lines, and why), which ``nodekeep
logs`` and ``nodekeep trace`` show, and the fixes carry the weeks added (``weeks_added``).
Dates after the window or the log's latest date are never touched: a rollover only puts
dates in the past.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from archive.ingest.arrow_build import booleans, constant_strings, from_numpy
from archive.ingest.result import ParseResult, empty_rejects, line_texts, sort_fixes
from archive.ingest.schema import FIX_SCHEMA, REJECT_SCHEMA

ROLL_WEEKS = 1024
ROLL_DAYS = 7 * ROLL_WEEKS
# how far a corrected date may lie from the log's latest date or outside the reference
# window: half a year (common practice for harvest logs of weeks, no source)
TOLERANCE_DAYS = 183
US_PER_DAY = 86_400_000_000
_EPOCH = dt.date(1970, 1, 1)


def _day(d: int) -> str:
    return (_EPOCH + dt.timedelta(days=int(d))).isoformat()


@dataclass
class RolloverPlan:
    """What to do with each date of a log: weeks to add, or refuse."""

    weeks: dict[int, int] = field(default_factory=dict)  # day -> weeks added (0: none)
    undecided: set[int] = field(default_factory=set)
    notes: list[dict[str, Any]] = field(default_factory=list)

    @property
    def changes(self) -> bool:
        """True when a date moves or is refused."""
        return bool(self.undecided) or any(self.weeks.values())


def reference_days(reference: tuple[dt.datetime, dt.datetime] | None
                   ) -> tuple[int, int] | None:
    """A reference window of UTC datetimes as (first day, last day) since 1970."""
    if reference is None:
        return None
    lo, hi = (t.astimezone(dt.UTC).date() for t in reference)
    return (lo - _EPOCH).days, (hi - _EPOCH).days


def plan_rollover(days: dict[int, list[int]], reference: tuple[int, int] | None,
                  reference_text: str = "the survey") -> RolloverPlan:
    """Decide every date of a log (see the module docstring).

    ``days`` maps each day (days since 1970) to ``[fixes, first line, last line]``;
    ``reference`` is the window as (first day, last day) or None.
    """
    plan = RolloverPlan()
    if not days:
        return plan
    latest = max(days)
    why: dict[int, str] = {}
    for d in days:
        k = 0
        if d < latest - TOLERANCE_DAYS:
            periods = round((latest - d) / ROLL_DAYS)
            if periods >= 1 and abs(latest - (d + periods * ROLL_DAYS)) <= TOLERANCE_DAYS:
                k = periods
                why[d] = (f"{ROLL_WEEKS * periods} weeks before the log's latest date "
                          f"{_day(latest)}")
        plan.weeks[d] = ROLL_WEEKS * k
    if reference is not None:
        lo, hi = reference
        for d in days:
            moved = d + plan.weeks[d] * 7
            if moved >= lo - TOLERANCE_DAYS:
                continue
            periods = math.ceil((lo - TOLERANCE_DAYS - moved) / ROLL_DAYS)
            window = f"{_day(lo)}..{_day(hi)}"
            if moved + periods * ROLL_DAYS <= hi + TOLERANCE_DAYS:
                plan.weeks[d] += ROLL_WEEKS * periods
                why[d] = f"before {reference_text} ({window})"
            else:
                plan.undecided.add(d)
                why[d] = (f"before {reference_text} ({window}) and no whole number of "
                          f"{ROLL_WEEKS} weeks places it there")
    groups: dict[tuple[int, bool, str], list[int]] = {}
    for d in sorted(days):
        if plan.weeks[d] or d in plan.undecided:
            groups.setdefault((plan.weeks[d], d in plan.undecided, why[d]), []).append(d)
    for (weeks, refused, reason), ds in groups.items():
        note: dict[str, Any] = {
            "kind": "week-rollover-refused" if refused else "week-rollover",
            "epochs": sum(days[d][0] for d in ds),
            "lines": [min(days[d][1] for d in ds), max(days[d][2] for d in ds)],
            "logged": [_day(min(ds)), _day(max(ds))], "why": reason}
        if not refused:
            note["weeks"] = weeks
            note["dated"] = [_day(min(ds) + weeks * 7), _day(max(ds) + weeks * 7)]
        plan.notes.append(note)
    return plan


def note_text(note: dict[str, Any]) -> str:
    """One line saying what a rollover note records."""
    a, b = note["lines"]
    lines = f"line {a}" if a == b else f"lines {a}-{b}"
    logged = note["logged"][0] if note["logged"][0] == note["logged"][1] \
        else "..".join(note["logged"])
    if note["kind"] == "week-rollover-refused":
        return (f"{note['epochs']} epochs ({lines}) dated {logged} refused: {note['why']}")
    dated = note["dated"][0] if note["dated"][0] == note["dated"][1] else "..".join(note["dated"])
    return (f"{note['epochs']} epochs ({lines}) logged {logged} moved +{note['weeks']} weeks "
            f"to {dated}: {note['why']} (GPS week rollover)")


def apply_plan(fixes: pa.Table, plan: RolloverPlan) -> tuple[pa.Table, np.ndarray]:
    """``fixes`` with the plan applied: times moved, ``weeks_added`` set, fixes of refused
    dates removed. Returns the table (sorted) and the raw lines of the removed fixes."""
    t = pc.cast(fixes.column("time"), pa.int64()).to_numpy(zero_copy_only=False)
    day = np.floor_divide(t, US_PER_DAY)
    known = np.array(sorted(plan.weeks), dtype=np.int64)
    weeks = np.array([plan.weeks[d] for d in known.tolist()], dtype=np.int64)
    idx = np.searchsorted(known, day)
    add = weeks[np.clip(idx, 0, len(known) - 1)]
    refused = np.isin(day, np.array(sorted(plan.undecided), dtype=np.int64))
    keep = ~refused
    lines = fixes.column("raw_line").to_numpy(zero_copy_only=False)[refused]
    t2 = (t + add * 7 * US_PER_DAY)[keep]
    out = fixes.filter(booleans(keep))
    i_time = FIX_SCHEMA.get_field_index("time")
    i_weeks = FIX_SCHEMA.get_field_index("weeks_added")
    out = out.set_column(i_time, FIX_SCHEMA.field("time"),
                         from_numpy(t2, FIX_SCHEMA.field("time").type))
    out = out.set_column(i_weeks, FIX_SCHEMA.field("weeks_added"),
                         from_numpy(add[keep], pa.int16()))
    return sort_fixes(out.combine_chunks()), lines


def refused_rejects(lines: np.ndarray, data: bytes | np.ndarray) -> pa.Table:
    """Reject rows (reason ``rollover``) for raw lines of a log held in ``data``."""
    from archive.ingest.nmea_scan import split_lines

    if lines.size == 0:
        return empty_rejects()
    buf = np.frombuffer(data, np.uint8) if not isinstance(data, np.ndarray) else data
    starts, ends, _ = split_lines(buf, True)
    lines = np.sort(lines)
    texts = line_texts(buf, starts[lines - 1], ends[lines - 1])
    return pa.table({"raw_line": from_numpy(lines, pa.int64()),
                     "reason": constant_strings("rollover", lines.size),
                     "text": texts}, schema=REJECT_SCHEMA)


def apply_rollover(result: ParseResult, days: dict[int, list[int]],
                   reference: tuple[dt.datetime, dt.datetime] | None,
                   data: bytes | np.ndarray, reference_text: str = "the survey"
                   ) -> ParseResult:
    """``result`` of the log ``data`` after the rollover check (a new result when it
    changes anything; the notes say what)."""
    plan = plan_rollover(days, reference_days(reference), reference_text)
    if not plan.changes:
        return result
    fixes, lines = apply_plan(result.fixes, plan)
    extra = refused_rejects(lines, data)
    rejects = pa.concat_tables([result.rejects, extra]).sort_by("raw_line") \
        if extra.num_rows else result.rejects
    n = int(lines.size)
    return ParseResult(fixes, rejects.combine_chunks(), result.n_lines, result.n_accepted - n,
                       result.n_rejected + n, result.n_ignored, result.ignored,
                       result.notes + plan.notes)


__all__ = ["ROLL_WEEKS", "ROLL_DAYS", "TOLERANCE_DAYS", "RolloverPlan", "plan_rollover",
           "apply_plan", "apply_rollover", "note_text", "refused_rejects", "reference_days"]
