"""Deciding many flagged stations at once: from a CSV file or from a filter on the queue.

A decision is *accept* (the flag is acknowledged: an ``ack-flag`` edit per flag accepted)
or *reject* (the station is not delivered: one ``reject-station`` edit). Every decision is
checked against the run's review (:mod:`archive.review.queue`) before anything is written,
then all of them are recorded in ONE catalog transaction, each edit with its own ledger
event (:func:`archive.edits.log.record_edits`): a bad row leaves nothing recorded.

The CSV file has a header row naming its columns, in any order: ``line``, ``point``,
``decision`` (``accept`` or ``reject``) and ``reason`` are required; ``index`` (the
occupation's point index; needed where a station has more than one flagged occupation)
and ``flag`` (accept only this flag; empty: every open flag of the station) are optional.
A problem names the file, its physical line and what was expected.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from archive.edits.decided import Key
from archive.edits.log import EditSpec, record_edits
from archive.errors import InputError, UsageError
from archive.review.queue import Review, Station, load_review
from archive.solve.schema import FLAGS
from archive.store.archive import Archive
from archive.survey.keys import station_text

DECISIONS = {"accept": "acknowledge the flag(s): the station is delivered as solved",
             "reject": "do not deliver the station"}
REQUIRED = ("line", "point", "decision", "reason")
OPTIONAL = ("index", "flag")


@dataclass
class Planned:
    """One decision about one station, checked and ready to record."""

    station: Station
    decision: str
    flags: list[str]  # accepted flags (accept); the station's open flags (reject)
    reason: str
    line_no: int | None = None  # physical line of the CSV file it came from

    def specs(self) -> list[EditSpec]:
        """The edits this decision records."""
        s = self.station
        occ = {"occupation": {"node": s.node,
                              "deployed": s.deployed.isoformat() if s.deployed else None,
                              "retrieved": s.retrieved.isoformat() if s.retrieved else None}}
        if self.decision == "reject":
            return [EditSpec("reject-station", s.line, s.point, s.index, occ, self.reason)]
        return [EditSpec("ack-flag", s.line, s.point, s.index, {"flag": f} | occ, self.reason)
                for f in self.flags]


@dataclass
class BulkResult:
    """What a bulk decision recorded."""

    run_id: str
    source: str
    n_stations: int
    edits: list[dict[str, Any]] = field(default_factory=list)
    dry_run: bool = False

    def as_dict(self) -> dict[str, Any]:
        """Plain data (the ``--json`` form)."""
        return {"run": self.run_id, "source": self.source, "n_stations": self.n_stations,
                "n_edits": len(self.edits), "dry_run": self.dry_run, "edits": self.edits}


def _reason(text: str | None) -> str:
    t = (text or "").strip()
    if not t:
        raise UsageError("a decision needs a reason", hint="say why with --reason TEXT")
    return t


def plan_filter(review: Review, decision: str, reason: str | None, *,
                flag: str | None = None) -> list[Planned]:
    """Decisions for every station waiting for review (with ``flag``: those whose open flags
    include it; accept then acknowledges that flag only, else every open flag)."""
    if decision not in DECISIONS:
        raise UsageError(f"unknown decision {decision!r}", hint="use accept or reject")
    if flag is not None and flag not in FLAGS:
        raise UsageError(f"unknown flag {flag!r}", hint=f"flags are: {', '.join(FLAGS)}")
    text = _reason(reason)
    out = []
    for s in review.waiting(flag):
        flags = [flag] if (flag is not None and decision == "accept") else list(s.state.open)
        out.append(Planned(s, decision, flags, text))
    return out


def _station_of(review: Review, path: str, n: int, line: float, point: float,
                index: int | None) -> Station:
    here = [s for s in review.stations if (s.line, s.point) == (line, point)
            and (index is None or s.index == index)]
    where = station_text(line, point, index)
    if not here:
        raise InputError(path, f"station {where} carries no review flag in run "
                               f"{review.run_id[:12]}", line=n,
                         expected="a flagged station of that run ('nodekeep review list')")
    if len(here) > 1:
        listed = ", ".join(f"index {s.index} (node {s.node})" for s in here)
        raise InputError(path, f"station {where} has {len(here)} flagged occupations: {listed}",
                         line=n, expected="an index column naming one of them")
    return here[0]


def _number(path: str, n: int, name: str, text: str, integer: bool = False) -> float:
    try:
        v = int(text) if integer else float(text)
    except ValueError:
        raise InputError(path, f"{name} {text!r} is not a number", line=n,
                         expected=f"{'a whole number' if integer else 'a number'} in column "
                                  f"{name!r}") from None
    if not integer and v != v:
        raise InputError(path, f"{name} is not a number", line=n, expected="a number")
    return v


def read_decisions(path: str | Path, review: Review) -> list[Planned]:
    """The decisions of a CSV file (see module doc), every row checked against ``review``;
    :class:`InputError` (file, physical line, what was expected) on the first bad row."""
    name = str(path)
    try:
        text = Path(path).read_bytes().decode("utf-8-sig")
    except FileNotFoundError:
        raise InputError(name, "no such file") from None
    except UnicodeDecodeError as exc:
        raise InputError(name, f"not UTF-8 text ({exc.reason} at byte {exc.start})",
                         expected="a UTF-8 CSV file") from None
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        return _read_rows(name, reader, review)
    except csv.Error as exc:  # a NUL byte, a field beyond the size limit
        raise InputError(name, f"not readable as CSV ({exc})", line=reader.line_num,
                         expected="comma-separated text (RFC 4180)") from None


def _read_rows(name: str, reader: Any, review: Review) -> list[Planned]:
    try:
        header = [h.strip().lower() for h in next(reader)]
    except StopIteration:
        raise InputError(name, "the file is empty", line=1,
                         expected="a header row: " + ",".join(REQUIRED)) from None
    missing = [c for c in REQUIRED if c not in header]
    if missing:
        raise InputError(name, f"the header lacks column(s) {', '.join(missing)}", line=1,
                         expected="a header row naming " + ", ".join(REQUIRED)
                                  + " (optional: " + ", ".join(OPTIONAL) + ")")
    col = {h: i for i, h in enumerate(header)}
    planned: list[Planned] = []
    seen: dict[tuple[Key, str], int] = {}
    decided: dict[Key, tuple[str, int]] = {}
    start = reader.line_num + 1
    for cells in reader:
        n, start = start, reader.line_num + 1  # physical line of the record's start
        if not any(c.strip() for c in cells):
            continue
        if len(cells) != len(header):
            raise InputError(name, f"{len(cells)} fields where the header has {len(header)}",
                             line=n, expected=f"{len(header)} comma-separated fields")
        get = {h: cells[i].strip() for h, i in col.items()}
        line = _number(name, n, "line", get["line"])
        point = _number(name, n, "point", get["point"])
        index = (int(_number(name, n, "index", get["index"], integer=True))
                 if get.get("index") else None)
        what = get["decision"].lower()
        if what not in DECISIONS:
            raise InputError(name, f"decision {get['decision']!r} is not known", line=n,
                             expected="accept or reject")
        if not get["reason"]:
            raise InputError(name, "the reason is empty", line=n,
                             expected="why, in the reason column (kept with the edit for good)")
        flag = get.get("flag") or None
        if flag is not None and flag not in FLAGS:
            raise InputError(name, f"unknown flag {flag!r}", line=n,
                             expected="one of " + ", ".join(FLAGS))
        if flag is not None and what == "reject":
            raise InputError(name, "a reject names no flag (it decides the whole station)",
                             line=n, expected="an empty flag column for reject")
        st = _station_of(review, name, n, line, point, index)
        where = station_text(st.line, st.point, st.index)
        if st.state.rejected is not None:
            raise InputError(name, f"station {where} is already rejected (edit "
                                   f"{st.state.rejected['edit']})", line=n,
                             expected="a station waiting for review")
        flags = [flag] if flag is not None else list(st.state.open)
        if what == "reject":
            flags = list(st.state.open)
        elif flag is not None and flag not in st.state.open:
            state = ("is decided already (edit "
                     f"{st.state.decided[flag]['edit']})" if flag in st.state.decided
                     else "is not a flag of it")
            raise InputError(name, f"flag {flag!r} of station {where} {state}", line=n,
                             expected="one of its open flags: "
                                      + (", ".join(st.state.open) or "none"))
        elif not flags:
            raise InputError(name, f"station {where} has no open flag left", line=n,
                             expected="a station waiting for review")
        for f in flags if what == "accept" else ["*"]:
            if (st.key, f) in seen or (st.key, "*") in seen:
                raise InputError(name, f"station {where} is decided twice (also on line "
                                       f"{seen.get((st.key, f), seen.get((st.key, '*')))})",
                                 line=n, expected="one decision per station and flag")
            seen[(st.key, f)] = n
        other = decided.get(st.key)
        if other is not None and other[0] != what:
            raise InputError(name, f"station {where} is accepted and rejected (line "
                                   f"{other[1]})", line=n, expected="one kind of decision per station")
        decided[st.key] = (what, n)
        planned.append(Planned(st, what, flags, get["reason"], n))
    if not planned:
        raise InputError(name, "the file holds no decision", expected="one row per decision")
    return planned


def apply_decisions(arc: Archive, review: Review, planned: list[Planned], *,
                    source: str, dry_run: bool = False) -> BulkResult:
    """Record the planned decisions: ONE transaction, one edit and one ledger event per
    accepted flag or rejected station (nothing with ``dry_run``)."""
    specs = [sp for p in planned for sp in p.specs()]
    result = BulkResult(review.run_id, source, len(planned), dry_run=dry_run)
    if dry_run or not specs:
        result.edits = [{"kind": sp.kind, "line": sp.line, "point": sp.point,
                         "index": sp.index, "flag": sp.payload.get("flag"),
                         "reason": sp.reason} for sp in specs]
        return result
    arc.require_writable("a review decision")
    edits = record_edits(arc, review.survey_id, specs,
                         batch={"source": source, "run": review.run_id, "size": len(specs)})
    result.edits = [{"id": e.id, "kind": e.kind, "line": e.line, "point": e.point,
                     "index": e.point_index, "flag": sp.payload.get("flag"),
                     "supersedes": e.supersedes, "reason": e.reason}
                    for e, sp in zip(edits, specs, strict=True)]
    return result


def decide(arc: Archive, survey_id: int, *, run_ref: str | None = None,
           csv_path: str | Path | None = None, decision: str | None = None,
           flag: str | None = None, reason: str | None = None,
           dry_run: bool = False) -> BulkResult:
    """Decide flagged stations of a run (the newest by default) from a CSV file, or every
    station waiting for review (``flag``: those with that open flag) with one ``decision``
    and ``reason``. All or nothing, in one transaction."""
    if (csv_path is None) == (decision is None):
        raise UsageError("give either a CSV file of decisions or one decision for a filter",
                         hint="e.g. 'nodekeep review decide --csv FILE' or "
                              "'nodekeep review decide --flag moved --accept --reason TEXT'")
    review = load_review(arc, survey_id, run_ref, figures=False)
    if csv_path is not None:
        if flag is not None or reason is not None:
            raise UsageError("a CSV file brings its own flags and reasons",
                             hint="leave out --flag and --reason with --csv")
        planned = read_decisions(csv_path, review)
        source = f"csv {Path(csv_path).name}"
    else:
        planned = plan_filter(review, str(decision), reason, flag=flag)
        if not planned:
            raise UsageError("no station waits for review" + (f" with open flag {flag!r}"
                                                              if flag else ""),
                             hint="list them with 'nodekeep review list --all'")
        source = f"filter {decision}" + (f" flag={flag}" if flag else "")
    return apply_decisions(arc, review, planned, source=source, dry_run=dry_run)
