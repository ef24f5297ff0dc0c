"""What changed since an earlier delivery: the records of an incremental delivery.

A crew delivers to processing every evening; processing wants the records that are new or
that changed, not the whole survey again. :func:`compare_final` compares the final-positions
table about to be delivered with the one an earlier delivery stored (its ``final_hash``),
record by record on the delivered key (line, point, point index), and says for each record
why it is delivered again:

``new``
    the key was not in the earlier delivery (a station positioned since, a new occupation,
    a part of a node found to have moved);
``position``
    the grid position moved by more than the tolerance (the shift is given, metres);
``height``
    the delivered height changed by more than the tolerance, or appeared or went;
``flags``
    the review flags still open, or those acknowledged, differ;
``node``
    another node is delivered under the key;
``time``
    the time the position holds (deployed/retrieved) changed, e.g. a node retrieved since;
``edited``
    the edits behind the record (its ``source``) differ.

Records of the earlier delivery that the new final table no longer holds (a station
rejected since, a merge undone) are listed as ``removed``: an incremental file cannot carry
them, so the lineage manifest does.

An incremental delivery's stored final table holds only the records it wrote. What
processing holds after it is the state of the delivery it was based on with those records
replaced or added and the removed ones dropped: :func:`delivered_state` rebuilds that
state along the chain of deliveries, so ``--changed-since`` may name any delivery, full or
incremental. Comparison is vectorised over the two tables (pandas
join on the key), a few milliseconds for 20,000 records.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from archive.errors import Refused, UsageError
from archive.survey.keys import station_text

if TYPE_CHECKING:  # pandas, numpy, pyarrow and the catalog load when used, not at start-up
    import numpy as np
    import pandas as pd
    import pyarrow as pa

    from archive.store.archive import Archive
    from archive.store.models import Delivery

KEY = ["line", "point", "index"]
DEFAULT_TOLERANCE = 0.001
"""Metres: below this a position or height counts as unchanged (floating-point noise of a
recomputation, far below any delivered precision)."""

DEFAULT_SHIFT = 0.10
"""Metres: a delivered position that moved less than this since the last delivery is not
counted as moved by ``nodekeep status`` (its ``--shift``)."""

REASONS = ("new", "position", "height", "flags", "node", "time", "edited")


@dataclass
class Changes:
    """The records to deliver again and why, against delivery ``since``."""

    since: int
    table: pa.Table  # the new or changed records, in the final table's order
    records: list[dict[str, Any]] = field(default_factory=list)  # one per delivered record
    removed: list[dict[str, Any]] = field(default_factory=list)  # keys no longer delivered
    unchanged: int = 0
    tolerance: float = DEFAULT_TOLERANCE

    def counts(self) -> dict[str, int]:
        """Records per reason (a record may have several), plus ``removed``."""
        out = {r: 0 for r in REASONS}
        for rec in self.records:
            for r in rec["reasons"]:
                out[r] += 1
        out = {k: v for k, v in out.items() if v}
        if self.removed:
            out["removed"] = len(self.removed)
        return out

    def as_dict(self) -> dict[str, Any]:
        """The section the lineage manifest carries."""
        return {"delivery": self.since, "tolerance_m": self.tolerance,
                "records": self.records, "removed": self.removed,
                "unchanged": self.unchanged, "counts": self.counts()}


def _frame(table: pa.Table, *, dedupe: bool = False) -> pd.DataFrame:
    """The compared columns of a final table; a column an older table lacks (deliveries
    made before occupations had windows) is taken as empty. ``dedupe`` keeps the last
    record of a key (older tables could hold two records under one key)."""
    import numpy as np
    import pyarrow as pa

    cols = KEY + ["node", "easting", "northing", "height", "flags", "flags_acknowledged",
                  "source", "deployed", "retrieved"]
    have = set(table.column_names)
    frame = table.select([c for c in cols if c in have]).to_pandas()
    for c in cols:
        if c not in have:
            frame[c] = pa.nulls(table.num_rows).to_pandas()
    frame = frame[cols].assign(row=np.arange(table.num_rows))
    return frame.drop_duplicates(KEY, keep="last") if dedupe else frame


def _differs(a: pd.Series, b: pd.Series) -> np.ndarray:
    """Element-wise "not equal", with two missing values equal."""
    both_missing = a.isna().to_numpy() & b.isna().to_numpy()
    return ~(a.eq(b).fillna(False).to_numpy(dtype=bool) | both_missing)


def compare_final(previous: pa.Table, current: pa.Table, since: int,
                  tolerance: float = DEFAULT_TOLERANCE, unit_factor: float = 1.0) -> Changes:
    """Records of ``current`` that are new or changed against ``previous`` (both final
    positions tables, :data:`archive.deliver.final.FINAL_SCHEMA`), with their reasons.
    ``tolerance`` is metres; ``unit_factor`` the metres in one unit of the survey CRS
    (grid coordinates may be feet), heights being metres."""
    import numpy as np
    import pandas as pd
    import pyarrow as pa

    old, new = _frame(previous, dedupe=True), _frame(current)
    joined = new.merge(old, on=KEY, how="left", suffixes=("", "_was"), indicator=True)
    is_new = (joined["_merge"] == "left_only").to_numpy()
    shift = unit_factor * np.hypot(
        joined["easting"] - joined["easting_was"],
        joined["northing"] - joined["northing_was"]).to_numpy(dtype=float)
    moved = ~is_new & ((shift > tolerance) | (_differs(joined["easting"].isna(),
                                                       joined["easting_was"].isna())))
    dh = (joined["height"] - joined["height_was"]).abs().to_numpy(dtype=float)
    height = ~is_new & ((dh > tolerance) | _differs(joined["height"].isna(),
                                                    joined["height_was"].isna()))
    flags = ~is_new & (_differs(joined["flags"], joined["flags_was"])
                       | _differs(joined["flags_acknowledged"], joined["flags_acknowledged_was"]))
    node = ~is_new & _differs(joined["node"], joined["node_was"])
    time = ~is_new & (_differs(joined["deployed"], joined["deployed_was"])
                      | _differs(joined["retrieved"], joined["retrieved_was"]))
    edited = ~is_new & _differs(joined["source"], joined["source_was"])
    masks = {"new": is_new, "position": moved, "height": height, "flags": flags,
             "node": node, "time": time, "edited": edited}
    changed = np.zeros(len(joined), dtype=bool)
    for m in masks.values():
        changed |= m
    rows = joined["row"].to_numpy()[changed]
    sub = joined[changed]
    cols = {c: sub[c].astype(object).where(sub[c].notna(), None).tolist()
            for c in ("line", "point", "index", "node", "flags", "flags_was", "node_was",
                      "source", "source_was")}
    picked = {k: m[changed].tolist() for k, m in masks.items()}
    records = []
    for j, i in enumerate(np.flatnonzero(changed)):  # one entry per changed record, not per fix
        entry: dict[str, Any] = {
            "line": float(cols["line"][j]), "point": float(cols["point"][j]),
            "index": int(cols["index"][j]), "node": cols["node"][j],
            "reasons": [k for k, m in picked.items() if m[j]]}
        if moved[i] and np.isfinite(shift[i]):
            entry["shift_m"] = round(float(shift[i]), 4)
        if height[i] and np.isfinite(dh[i]):
            entry["height_change_m"] = round(float(dh[i]), 4)
        if flags[i]:
            entry["flags_was"], entry["flags"] = cols["flags_was"][j], cols["flags"][j]
        if node[i]:
            entry["node_was"] = cols["node_was"][j]
        if edited[i]:
            entry["source_was"], entry["source"] = cols["source_was"][j], cols["source"][j]
        records.append(entry)
    gone = old.merge(new[KEY], on=KEY, how="left", indicator=True)
    gone = gone[gone["_merge"] == "left_only"]
    removed = [{"line": float(r.line), "point": float(r.point), "index": int(r.index),
                "node": None if pd.isna(r.node) else str(r.node)}
               for r in gone.itertuples(index=False)]
    return Changes(since=since, table=current.take(pa.array(np.sort(rows))), records=records,
                   removed=removed, unchanged=int((~changed).sum()), tolerance=tolerance)


def overlay(base: pa.Table, update: pa.Table, removed: list[dict[str, Any]]) -> pa.Table:
    """``base`` with the records of ``update`` replacing (or added to) those of the same key
    and the ``removed`` keys dropped, sorted by key: what a recipient holds after an
    incremental delivery."""
    import pyarrow as pa
    import pyarrow.compute as pc

    drop = pa.table({"line": [float(r["line"]) for r in removed]
                     + update.column("line").to_pylist(),
                     "point": [float(r["point"]) for r in removed]
                     + update.column("point").to_pylist(),
                     "index": pa.array([int(r["index"]) for r in removed]
                                       + update.column("index").to_pylist(), pa.int8()),
                     "_drop": pa.array([True] * (len(removed) + update.num_rows))})
    kept = base.join(drop, KEY, join_type="left outer")
    kept = kept.filter(pc.is_null(kept["_drop"])).drop_columns(["_drop"])
    both = pa.concat_tables([kept.select(base.column_names).cast(base.schema),
                             update.select(base.column_names).cast(base.schema)])
    return both.take(pc.sort_indices(both, [(k, "ascending") for k in KEY]))


def merged_mode(arc: Archive, d: Delivery) -> bool:
    """Whether delivery ``d`` merged indistinguishable occupations (its lineage says)."""
    doc = json.loads(arc.objects.read_bytes(d.manifest_hash))
    return bool((doc.get("delivery") or {}).get("merge_occupations"))


def unit_factor_of(arc: Archive, survey_id: int) -> float:
    """Metres in one unit of the survey's grid (1 for metres, 0.3048006 for US feet)."""
    from archive.store.models import Survey
    from archive.survey.crs import survey_crs

    with arc.session() as s:
        return float(survey_crs(s.get(Survey, survey_id).crs_epsg).unit_factor)


def changes_since(arc: Archive, survey_id: int, delivery_id: int, final: pa.Table,
                  tolerance: float = DEFAULT_TOLERANCE, *, merge: bool = False) -> Changes:
    """The records of ``final`` that are new or changed since delivery ``delivery_id`` of
    the survey; :class:`Refused` when there are none (nothing to deliver), and
    :class:`UsageError` when that delivery merged occupations and this one does not (or
    the other way round): the records would not match the recipient's."""
    from archive.store.models import Delivery

    with arc.session() as s:
        earlier = s.get(Delivery, delivery_id)
    if earlier is None or earlier.survey_id != survey_id:
        raise UsageError(f"delivery {delivery_id} is not a delivery of this survey",
                         hint="'nodekeep status' names the latest delivery, 'nodekeep history' "
                              "lists every one (deliver events)")
    if merged_mode(arc, earlier) != bool(merge):
        was = "with" if not merge else "without"
        raise UsageError(f"delivery {delivery_id} was made {was} --merge-occupations; the "
                         "records of this one would not match those the recipient holds",
                         hint=f"deliver the changes {was} --merge-occupations, as then")
    previous = delivered_state(arc, earlier)
    changes = compare_final(previous, final, delivery_id, tolerance,
                            unit_factor_of(arc, survey_id))
    if changes.table.num_rows == 0:
        gone = (f"; {len(changes.removed)} record(s) of it are no longer delivered"
                if changes.removed else "")
        raise Refused(f"nothing is new or changed since delivery {delivery_id} "
                      f"({changes.unchanged} record(s) as delivered then){gone}",
                      hint="deliver the whole survey without --changed-since to state what "
                           "is no longer delivered")
    return changes


def delivered_state(arc: Archive, d: Delivery) -> pa.Table:
    """The final positions a recipient holds after delivery ``d``: its stored table, or for
    an incremental delivery the state of the one it was based on with its records laid
    over (:func:`overlay`), back along the chain to a full one."""
    from archive.store.models import Delivery

    chain: list[tuple[Delivery, dict[str, Any]]] = []
    seen: set[int] = set()
    while True:
        doc = json.loads(arc.objects.read_bytes(d.manifest_hash))
        since = doc.get("changed_since")
        chain.append((d, since or {}))
        if not since or d.id in seen:
            break
        seen.add(d.id)
        with arc.session() as s:
            base = s.get(Delivery, int(since["delivery"]))
        if base is None:
            raise UsageError(f"delivery {since['delivery']}, which delivery {d.id} was based "
                             "on, is not in the catalog", hint="run 'nodekeep verify'")
        d = base
    state = arc.objects.read_table(chain[-1][0].final_hash)
    for d, since in reversed(chain[:-1]):
        state = overlay(state, arc.objects.read_table(d.final_hash), since.get("removed", []))
    return state


def describe(change: dict[str, Any]) -> str:
    """One line for people: the record and why it is delivered again."""
    text = f"{station_text(change['line'], change['point'], change['index'])}: "
    parts = []
    for reason in change["reasons"]:
        if reason == "position" and "shift_m" in change:
            parts.append(f"position moved {change['shift_m']:.3f} m")
        elif reason == "height" and "height_change_m" in change:
            parts.append(f"height changed {change['height_change_m']:.3f} m")
        elif reason == "flags":
            parts.append(f"flags {change.get('flags_was') or '-'} -> {change.get('flags') or '-'}")
        elif reason == "node":
            parts.append(f"node {change.get('node_was')} -> {change.get('node')}")
        else:
            parts.append(reason)
    return text + ", ".join(parts)
