"""The kinds of edit and what their payloads hold.

- ``set-position``: {"easting", "northing", "source": "control"|"preplot"|"given", sigmas,
  height and the input version it came from, "occupation"}
- ``set-height``: {"height", "source", "occupation"}
- ``exclude-span``: {"node", "start", "end"} (ISO 8601 UTC; effective at the next solve)
- ``reject-station``: {"occupation"} (the occupation is not delivered)
- ``ack-flag``: {"flag", "occupation"}
- ``undo``: {} with ``supersedes`` = the edit undone

``occupation`` records the node and logged window of the occupation the edit names (edits
made before occupations were numbered have none and name index 1).
"""

from __future__ import annotations

KINDS = {
    "set-position": "deliver this position instead of the solver's",
    "set-height": "deliver this height",
    "exclude-span": "leave a span of a node's fixes out of the next solve",
    "reject-station": "do not deliver the occupation",
    "ack-flag": "a review flag accepted by a person (it no longer blocks a delivery)",
    "undo": "take an edit out of force",
}

SOURCES = {
    "control": "the station's RTK check point",
    "preplot": "the preplot station",
    "given": "values given with the edit",
}
"""Where a set position or height comes from (``--from``)."""

AUTO_SUPERSEDE = ("set-position", "set-height", "reject-station", "ack-flag")
"""Kinds whose new edit replaces the one in force for the same occupation (and flag)."""

FINAL_KINDS = ("set-position", "set-height", "reject-station", "ack-flag")
"""Kinds the final positions apply; exclude spans act at the solve and come from the run."""

POSITION_FLAGS = frozenset({"few-fixes", "short-span", "wide-spread", "moved", "far-from-plan",
                            "nearer-other", "unoccupied"})
"""Review flags that describe the solver's position: a ``set-position`` replaces that
solution, and so decides them."""
