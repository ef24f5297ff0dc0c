"""The review decisions a delivered record carries, so processing learns of them.

Every delivered record names its open review flags (``flags``) and the flags people
accepted (``flags_acknowledged``) in the final table. The columns added here say what was
decided on its occupation and by whom: the deciding edits in force on it (acknowledged
flags, a set position or height; a rejected occupation is not delivered), the kinds in
``decision`` (``ack-flag:moved;set-height``), the ids in ``decision_edits``, and the actor,
UTC time and reason of the most recent one. The lineage manifest holds every edit in full.
"""

from __future__ import annotations

import json
from typing import Any

import pyarrow as pa

from archive.edits.kinds import FINAL_KINDS

DECISION_COLUMNS = ("flags_acknowledged", "decision", "decision_edits", "decided_by",
                    "decided_at", "decision_reason")
"""Columns added at the end of the CSV and GeoJSON properties, in this order."""


def _what(e: Any) -> str:
    if e.kind == "ack-flag":
        return f"ack-flag:{json.loads(e.payload or '{}').get('flag', '')}"
    return str(e.kind)


def by_occupation(edits: list[Any]) -> dict[tuple[float, float, int], list[Any]]:
    """The deciding edits (ack, set position or height) of a delivery by occupation."""
    out: dict[tuple[float, float, int], list[Any]] = {}
    for e in sorted(edits, key=lambda e: e.id):
        if e.kind in FINAL_KINDS and e.kind != "reject-station":
            out.setdefault((float(e.line), float(e.point), int(e.point_index)), []).append(e)
    return out


def with_decisions(final: pa.Table, edits: list[Any]) -> pa.Table:
    """``final`` with the :data:`DECISION_COLUMNS` appended (text; empty when undecided)."""
    found = by_occupation(edits)
    occ = (final["occupation"].to_pylist() if "occupation" in final.column_names
           else final["index"].to_pylist())
    keys = zip(final["line"].to_pylist(), final["point"].to_pylist(), occ,
               final["index"].to_pylist(), strict=True)
    cols: dict[str, list[str]] = {c: [] for c in DECISION_COLUMNS[1:]}
    for line, point, o, i in keys:  # one per delivered record
        mine = found.get((float(line), float(point), int(o if o is not None else i)), [])
        last = mine[-1] if mine else None
        cols["decision"].append(";".join(_what(e) for e in mine))
        cols["decision_edits"].append(";".join(str(e.id) for e in mine))
        cols["decided_by"].append(last.created_by if last else "")
        cols["decided_at"].append(last.created_at.strftime("%Y-%m-%dT%H:%M:%SZ") if last else "")
        cols["decision_reason"].append(last.reason if last else "")
    table = final
    if "flags_acknowledged" not in table.column_names:
        table = table.append_column("flags_acknowledged", pa.array([""] * final.num_rows))
    for name, values in cols.items():
        table = table.append_column(name, pa.array(values, pa.string()))
    return table
