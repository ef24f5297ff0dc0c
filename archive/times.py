"""Times given by people: one rule everywhere.

nodekeep works in UTC. A time given on the command line, in an edit or in the library is
ISO 8601 (``2025-04-08T10:00:00Z``, ``2025-04-08T12:00:00+02:00``, ``2025-04-08 10:00``):
**a time with an offset is converted to UTC; a time without one is taken as UTC.** A bare
date (``2025-04-08``) means the start of that day, UTC, except where a command says it means
a cut-off (``--as-of``: the end of that day). Input files follow the same rule
(:meth:`archive.survey.csvtable.Columns.times`).
"""

from __future__ import annotations

from datetime import UTC, date, datetime, time

from archive.errors import UsageError

EXAMPLE = "2025-04-08T10:00:00Z"


def parse_utc(value: str | date | datetime, what: str = "time", *,
              date_is_end: bool = False) -> datetime:
    """``value`` as an aware UTC datetime by the rule above; :class:`UsageError` naming
    ``what`` for text that is not ISO 8601. ``date_is_end``: a bare date means the last
    microsecond of that day instead of its start."""
    if isinstance(value, datetime):
        dt = value
    elif isinstance(value, date):
        dt = datetime.combine(value, time.max if date_is_end else time.min)
    else:
        text = str(value).strip()
        try:
            if len(text) == 10:
                return parse_utc(date.fromisoformat(text), what, date_is_end=date_is_end)
            dt = datetime.fromisoformat(text.replace("Z", "+00:00").replace("z", "+00:00"))
        except ValueError:
            raise UsageError(f"{what} {text!r} is not an ISO 8601 date or time",
                             hint=f"write it like {EXAMPLE} (a time without a zone is UTC)"
                             ) from None
    return dt.astimezone(UTC) if dt.tzinfo is not None else dt.replace(tzinfo=UTC)


def parse_optional(value: str | date | datetime | None, what: str = "time", *,
                   date_is_end: bool = False) -> datetime | None:
    """:func:`parse_utc`, passing None through."""
    return None if value is None else parse_utc(value, what, date_is_end=date_is_end)


def iso_z(t: datetime | None) -> str:
    """``2025-04-08T10:00:00Z`` (seconds) for an aware time, ``-`` for None."""
    if t is None:
        return "-"
    return t.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def us_array(col, fill: int):
    """A timestamp column as integer microseconds since 1970 UTC, nulls as ``fill``."""
    import pyarrow as pa
    import pyarrow.compute as pc

    arr = pc.fill_null(pc.cast(col, pa.int64()), fill)
    return arr.to_numpy(zero_copy_only=False).astype("int64")
