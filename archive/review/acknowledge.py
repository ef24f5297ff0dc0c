"""Acknowledging a review flag: a person accepts it, so it no longer blocks a delivery.

The flag must be one the occupation's delivered row carries in the survey's newest run: an
acknowledgement that could have no effect is refused with the flags it does carry.
"""

from __future__ import annotations

import pyarrow.compute as pc

from archive.edits.decisions import require_reason
from archive.edits.log import record_edit
from archive.edits.targets import occupation_payload, target
from archive.errors import UsageError
from archive.solve.occupancy import run_occupations
from archive.solve.run import get_run
from archive.solve.schema import FLAGS
from archive.store.archive import Archive
from archive.store.models import Edit
from archive.survey.keys import rows_at, station_text


def carried_flags(arc: Archive, survey_id: int, line: float, point: float,
                  index: int) -> tuple[str, list[str]]:
    """The newest run's id and the flags of the occupation's delivered rows in it (both
    parts of a node that moved: an acknowledgement acts on the occupation)."""
    where = station_text(line, point, index)
    try:
        run = get_run(arc, survey_id)
    except UsageError:
        raise UsageError(f"the survey has no solution run yet, so station {where} carries no "
                         "flag to acknowledge", hint="solve first with 'nodekeep solve'") from None
    table = rows_at(run_occupations(arc, run), line, point, index, index_column="occupation")
    table = table.filter(pc.fill_null(table["delivered"], False))
    if table.num_rows == 0:
        raise UsageError(f"station {where} has no delivered position in the newest run "
                         f"{run.id[:12]}, so it carries no flag to acknowledge",
                         hint="check the line and point numbers (and --index)")
    found: list[str] = []
    for text in table["flags"].to_pylist():  # one entry per delivered part
        found += [f for f in (text or "").split(";") if f and f not in found]
    return run.id, found


def ack_flag(arc: Archive, survey_id: int, line: float, point: float,
             index: int | None = None, *, flag: str, reason: str,
             node: str | None = None) -> Edit:
    """Acknowledge a review flag of an occupation (it no longer blocks a delivery).

    Refused (UsageError) when there is no run yet, or when the occupation's delivered row in
    the newest run does not carry ``flag`` (the message names the flags it does carry).
    """
    reason = require_reason(reason)
    if flag not in FLAGS:
        raise UsageError(f"unknown flag {flag!r}", hint=f"flags are: {', '.join(FLAGS)}")
    index, _, occ = target(arc, survey_id, line, point, index, node, "ack")
    run_id, carried = carried_flags(arc, survey_id, line, point, index)
    if flag not in carried:
        has = ", ".join(carried) if carried else "no flags"
        raise UsageError(f"station {station_text(line, point, index)} does not carry flag "
                         f"{flag!r} in the newest run {run_id[:12]}; it carries: {has}",
                         hint="acknowledge one of the flags it carries, or solve again first")
    return record_edit(arc, survey_id, "ack-flag", line, point, index,
                       {"flag": flag} | occupation_payload(occ), reason)
