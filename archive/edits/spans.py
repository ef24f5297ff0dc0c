"""Exclude spans: a time span of a node's fixes left out of the next solve.

An ``exclude-span`` edit's payload names the node and the span (ISO 8601 UTC, both ends
included); the run manifest records the edits it applied, and the solver marks every fix of
that node inside a span as screened (reason ``excluded``). Spans act on the node's fixes
whatever station they belong to; the edit's station only says which occupation it was meant
for.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np

from archive.errors import UsageError

Span = tuple[str, int, int]  # (node, start µs, end µs), UTC, both ends included
_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)


def _utc_us(t: datetime) -> int:
    """Microseconds since 1970-01-01 UTC, in integers (no float rounding)."""
    return (t - _EPOCH) // timedelta(microseconds=1)


def parse_spans(edits: Sequence[dict[str, Any]]) -> list[Span]:
    """exclude-span payloads (each with the edit's ``id``) -> spans in UTC microseconds."""
    out = []
    for e in edits:
        try:
            node = str(e["node"])
            start = datetime.fromisoformat(str(e["start"]))
            end = datetime.fromisoformat(str(e["end"]))
        except (KeyError, ValueError) as exc:
            raise UsageError(f"exclude-span edit {e.get('id', '?')} is malformed: {exc}",
                             hint="an exclude-span needs node, start and end (ISO 8601 UTC)"
                             ) from None
        if start.tzinfo is None or end.tzinfo is None:
            raise UsageError(f"exclude-span edit {e.get('id', '?')} has a time without zone",
                             hint="times of edits are UTC, e.g. 2024-05-01T10:00:00Z")
        out.append((node, _utc_us(start), _utc_us(end)))
    return out


def manifest_spans(edits: list[dict[str, Any]]) -> list[Span]:
    """The spans of a run manifest's exclude-span edits (``{"id", "payload"}`` each)."""
    return parse_spans([{"id": e["id"], **e["payload"]} for e in edits])


def excluded(node_code: np.ndarray, t_us: np.ndarray, node_names: Sequence[str],
             spans: Sequence[Span]) -> np.ndarray:
    """Bool per fix: inside a span of its node. One vector pass per span, not per fix."""
    out = np.zeros(len(t_us), dtype=bool)
    lookup = {name: i for i, name in enumerate(node_names)}
    for node, start, end in spans:
        c = lookup.get(node)
        if c is not None:
            out |= (node_code == c) & (t_us >= start) & (t_us <= end)
    return out
