"""Final positions: a run's delivered rows with the edits in force applied.

One row per occupation (one deployment of a node at a station), or per part of it when the
node moved during its stay: ``index`` is the point index the record is delivered under
(the occupation's, :mod:`archive.survey.occupations`; the later part of a moved node has
its own, :mod:`archive.solve.parts`), ``station_index`` the preplot station's own index,
``occupation`` and ``part`` the occupation and part it is, ``deployed``/``retrieved`` the
time the position holds (the occupation's logged window, cut at the move for a part). An
edit names one occupation by (line, point, index of the occupation), so it never lands on
another occupation of the station; it acts on every part of it, and a set position makes
the occupation one record again, for its whole stay.
With ``merge``, occupations of a station that cannot be told apart statistically are
delivered as one position (:mod:`archive.deliver.merge`).

Every row says where its values came from in ``source``: ``solver``, or the edits that
changed it (``edit:12``, ``edit:12;edit:15``). ``flags`` keeps only the run's review flags
that no ``ack-flag`` edit has acknowledged (those go to ``flags_acknowledged``). Rejected
stations are dropped. A ``set-position`` for a station the run did not position (a node
that died, an unoccupied station) adds a row. Latitude/longitude (WGS 84) are recomputed
with pyproj from the final grid coordinates, so they always agree with them.

A ``set-position`` replaces the solver's solution for its station: the flags that describe
the solver's position (:data:`POSITION_FLAGS`) are cleared, the fix counts become 0 and the
fix-window times blank, and the height is re-derived at the new position: sampled from the
elevation model the run used (``height_source`` ``model``), else the height the position's
source carries (check point height or preplot elevation; ``height_source`` ``control`` or
``preplot``), else blank (``none``). The node is kept (it was deployed there) and ``source``
says so with ``node:deployed``. A later ``set-height`` still overrides the height.
"""

from __future__ import annotations

import contextlib
import json
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from archive.edits.kinds import POSITION_FLAGS
from archive.edits.log import edit_set
from archive.solve.run import manifest_inputs, run_manifest
from archive.store.archive import Archive
from archive.store.models import Run
from archive.survey.crs import WGS84_GEOGRAPHIC, transformer

UTC_TIME = pa.timestamp("us", tz="UTC")

FINAL_SCHEMA = pa.schema(
    [
        pa.field("line", pa.float64(), nullable=False),
        pa.field("point", pa.float64(), nullable=False),
        pa.field("index", pa.int8(), nullable=False),  # delivered point index (occupation)
        pa.field("station_index", pa.int8(), nullable=False),  # the preplot station's index
        pa.field("code", pa.string()),  # the preplot station's point code (SPS columns 25-26)
        pa.field("node", pa.string()),
        # the time the position holds: the occupation's logged window, cut at the move for
        # each part of a moved node
        pa.field("deployed", UTC_TIME),
        pa.field("retrieved", UTC_TIME),  # null: still in the ground
        pa.field("easting", pa.float64()),
        pa.field("northing", pa.float64()),
        pa.field("height", pa.float64()),
        pa.field("height_source", pa.string()),
        pa.field("lat", pa.float64()),
        pa.field("lon", pa.float64()),
        pa.field("sigma_e", pa.float64()),
        pa.field("sigma_n", pa.float64()),
        pa.field("corr_en", pa.float64()),
        pa.field("r95", pa.float64()),
        pa.field("n_used", pa.int64()),
        pa.field("n_rejected", pa.int64()),
        pa.field("t_start", UTC_TIME),
        pa.field("t_end", UTC_TIME),
        pa.field("flags", pa.string(), nullable=False),
        pa.field("flags_acknowledged", pa.string(), nullable=False),
        pa.field("source", pa.string(), nullable=False),
        pa.field("merged", pa.string(), nullable=False),  # "1;2": occupations merged here
        # the merged occupations' logged windows, "deployed/retrieved;..." (ISO 8601, an
        # empty end while still out); "" for a single occupation (its window is above)
        pa.field("windows", pa.string(), nullable=False),
        # the occupation (its point index in the deployment log) the record belongs to, and
        # which part of it: 0 the whole stay, 1 and 2 before and after a move, each part of
        # a moved node delivered as its own record (its own index and time)
        pa.field("occupation", pa.int8()),
        pa.field("part", pa.int8()),
    ],
    metadata={"nodekeep.table": "final_positions", "nodekeep.schema_version": "4"},
)

Key = tuple[float, float, int]

HeightAt = Callable[[float, float], float | None]


def _key(line: Any, point: Any, index: Any) -> Key:
    return (float(line), float(point), int(index))


def _delivered_table(positions: pa.Table) -> pa.Table:
    """The delivered rows of every occupation as a FINAL_SCHEMA table, before edits:
    ``index`` the point index each is delivered under (the occupation's, or a part's own),
    ``station_index`` the preplot station's, ``occupation`` the occupation's,
    ``deployed``/``retrieved`` the time the position holds. Column by column, no row
    leaves Arrow."""
    dl = positions.filter(pc.equal(positions["delivered"], True))
    n = dl.num_rows
    cols: dict[str, Any] = {}
    for name in FINAL_SCHEMA.names:
        cols[name] = (dl.column(name) if name in dl.column_names
                      else pa.nulls(n, FINAL_SCHEMA.field(name).type))
    cols["station_index"] = dl.column("index")
    occupation = (pc.coalesce(dl.column("occupation"), dl.column("index"))
                  if "occupation" in dl.column_names else dl.column("index"))
    cols["occupation"] = occupation
    cols["index"] = occupation
    if "point_index" in dl.column_names:
        cols["index"] = pc.coalesce(dl.column("point_index"), occupation)
        cols["deployed"] = dl.column("held_from")
        cols["retrieved"] = dl.column("held_to")
    cols["flags"] = pc.fill_null(cols["flags"], "") if "flags" in dl.column_names \
        else pa.array([""] * n, pa.string())
    for name, value in (("flags_acknowledged", ""), ("source", "solver"), ("merged", ""),
                        ("windows", "")):
        cols[name] = pa.array([value] * n, pa.string())
    return pa.table({name: pc.cast(cols[name], FINAL_SCHEMA.field(name).type)
                     for name in FINAL_SCHEMA.names}, schema=FINAL_SCHEMA)


def _new_record(key: Key) -> dict[str, Any]:
    """The record a set-position adds for an occupation the run did not position."""
    row: dict[str, Any] = {name: None for name in FINAL_SCHEMA.names}
    row["line"], row["point"], row["index"] = key
    row["station_index"] = row["occupation"] = key[2]
    row["part"] = 0
    row["flags"] = row["flags_acknowledged"] = row["merged"] = row["windows"] = ""
    row["source"], row["n_used"], row["n_rejected"] = "", 0, 0
    return row


def apply_edits(delivered: pa.Table, edits: list[Any], epsg: int, *,
                height_at: HeightAt | None = None) -> pa.Table:
    """Apply edits (Edit rows in force, oldest first) to a run's delivered rows.

    ``delivered`` holds positions rows (with the occupation columns of
    :func:`archive.solve.occupancy.upgrade_positions`); an edit names one occupation by its
    delivered point index. ``height_at(easting, northing)`` samples the run's elevation
    model (None when the run had none or the point is off the model); it re-derives the
    height of a set position. Only the records edits name become Python rows; the rest stay
    columns (a 20,000-station survey with a handful of edits costs milliseconds).
    """
    table = _delivered_table(delivered)
    keys = [_key(*e) for e in {(e.line, e.point, e.point_index) for e in edits}]
    # an edit names an occupation: it acts on every record of it (both parts of a moved node)
    touched: list[int] = []
    if keys:
        wanted = pa.table({"line": [k[0] for k in keys], "point": [k[1] for k in keys],
                           "occupation": pa.array([k[2] for k in keys], pa.int8())})
        marked = table.select(["line", "point", "occupation"]).append_column(
            "_row", pa.array(np.arange(table.num_rows)))
        hit = marked.join(wanted, ["line", "point", "occupation"], join_type="inner")
        touched = sorted(hit["_row"].to_pylist())
    rows = table.take(pa.array(touched, pa.int64())).to_pylist() if touched else []
    by_key: dict[Key, list[dict[str, Any]]] = {}
    for r in rows:
        by_key.setdefault(_key(r["line"], r["point"], r["occupation"]), []).append(r)
    rejected: set[Key] = set()

    def records(key: Key, create: bool) -> list[dict[str, Any]]:
        if key in by_key or not create:
            return by_key.get(key, [])
        by_key[key] = [_new_record(key)]
        return by_key[key]

    def one_position(found: list[dict[str, Any]]) -> dict[str, Any]:
        """A set position is one place for the whole occupation: the parts of a moved node
        become its first record, for the whole stay, under the occupation's index."""
        first = min(found, key=lambda r: (r["part"] or 0))
        if len(found) > 1:
            last = max(found, key=lambda r: (r["part"] or 0))
            first["retrieved"] = last["retrieved"]
            first["index"], first["part"] = first["occupation"], 0
            found[:] = [first]
        return first

    def mark(r: dict[str, Any], edit_id: int) -> None:
        tag = f"edit:{edit_id}"
        old = r["source"]
        r["source"] = tag if old in ("", "solver") else f"{old};{tag}"

    node_kept: list[dict[str, Any]] = []
    for e in sorted(edits, key=lambda e: (e.kind != "set-position", e.id)):
        key = _key(e.line, e.point, e.point_index)
        p = json.loads(e.payload or "{}")
        if e.kind == "reject-station":
            rejected.add(key)
        elif e.kind == "set-position":
            r = one_position(records(key, create=True))
            r["easting"], r["northing"] = p["easting"], p["northing"]
            r["sigma_e"], r["sigma_n"] = p.get("sigma_e"), p.get("sigma_n")
            r["corr_en"], r["r95"] = None, None
            r["n_used"], r["n_rejected"] = 0, 0
            r["t_start"], r["t_end"] = None, None
            r["flags"] = ";".join(f for f in r["flags"].split(";")
                                  if f and f not in POSITION_FLAGS)
            r["height"], r["height_source"] = _set_height(p, height_at)
            if r["node"] and all(r is not k for k in node_kept):
                node_kept.append(r)
            mark(r, e.id)
        elif e.kind == "set-height":
            # a height alone gives no position: applied once one exists
            for r in records(key, create=False):
                r["height"], r["height_source"] = p["height"], p["source"]
                mark(r, e.id)
        elif e.kind == "ack-flag":
            for r in records(key, create=False):
                flags = [f for f in r["flags"].split(";") if f]
                if p["flag"] in flags:
                    flags.remove(p["flag"])
                    acked = [f for f in r["flags_acknowledged"].split(";") if f]
                    r["flags_acknowledged"] = ";".join([*acked, p["flag"]])
                    r["flags"] = ";".join(flags)
    for r in node_kept:
        r["source"] += ";node:deployed"
    keep = np.ones(table.num_rows, dtype=bool)
    keep[touched] = False  # replaced by their edited rows (or dropped parts) below
    edited = [r for key, found in by_key.items() if key not in rejected for r in found]
    out = pa.concat_tables([table.filter(pa.array(keep)),
                            pa.Table.from_pylist(edited, schema=FINAL_SCHEMA)])
    return _sorted(_with_lonlat(out, epsg))


def _set_height(payload: dict[str, Any], height_at: HeightAt | None,
                ) -> tuple[float | None, str]:
    """(height, height_source) of a set position: model, else the source's height, else none."""
    if height_at is not None:
        z = height_at(float(payload["easting"]), float(payload["northing"]))
        if z is not None:
            return z, "model"
    if payload.get("height") is not None:
        return float(payload["height"]), str(payload.get("source", "given"))
    return None, "none"


def _with_lonlat(table: pa.Table, epsg: int) -> pa.Table:
    east = table.column("easting").to_numpy(zero_copy_only=False).astype(np.float64)
    north = table.column("northing").to_numpy(zero_copy_only=False).astype(np.float64)
    ok = np.isfinite(east) & np.isfinite(north)
    lon = np.full(len(east), np.nan)
    lat = np.full(len(east), np.nan)
    if ok.any():
        lon[ok], lat[ok] = transformer(epsg, WGS84_GEOGRAPHIC).transform(east[ok], north[ok])
    table = table.set_column(table.schema.get_field_index("lat"), FINAL_SCHEMA.field("lat"),
                             pa.array(lat, mask=~ok))
    return table.set_column(table.schema.get_field_index("lon"), FINAL_SCHEMA.field("lon"),
                            pa.array(lon, mask=~ok))


@dataclass
class Final:
    """Final positions and, when occupations were merged, the decision for each station
    occupied more than once (see :mod:`archive.deliver.merge`)."""

    table: pa.Table
    merges: list[dict[str, Any]] = field(default_factory=list)
    awaiting: list[dict[str, Any]] = field(default_factory=list)  # held back, see below


def awaiting_harvest(positions: pa.Table, final: pa.Table) -> list[dict[str, Any]]:
    """The run's deployments awaiting harvest (rows of ``kind`` "awaiting": no loaded log
    of the node covered them) that the final positions do not hold: what a delivery holds
    back. Each names the station, the occupation's point index, the node and its window.
    An occupation an edit gave a position (set-position) is delivered, not held back."""
    if "kind" not in positions.column_names:
        return []
    wait = positions.filter(pc.equal(positions["kind"], "awaiting"))
    if wait.num_rows == 0:
        return []
    have = set(zip(final["line"].to_pylist(), final["point"].to_pylist(),
                   final["occupation"].to_pylist(), strict=True))
    out = []
    for r in wait.select(["line", "point", "occupation", "node", "deployed",
                          "retrieved"]).to_pylist():  # one entry per deployment, not per fix
        if (r["line"], r["point"], r["occupation"]) not in have:
            out.append({"line": r["line"], "point": r["point"], "index": r["occupation"],
                        "node": r["node"], "deployed": r["deployed"],
                        "retrieved": r["retrieved"]})
    return out


def build_final(arc: Archive, survey_id: int, run: Run, as_of: datetime | None = None, *,
                edits: list[Any] | None = None, merge: bool = False,
                positions: pa.Table | None = None) -> Final:
    """The run's delivered rows (one per occupation) plus the survey's edits in force (as of
    a time, if given); with ``merge``, statistically indistinguishable occupations of a
    station become one position.

    ``edits`` overrides the edits applied (Edit rows, e.g. the set a delivery recorded);
    ``positions`` is the run's :func:`~archive.solve.occupancy.run_occupations`, when the
    caller has read them already.
    """
    from archive.solve.occupancy import run_occupations
    from archive.store.models import Survey
    from archive.survey.crs import survey_crs

    if positions is None:
        positions = run_occupations(arc, run)
    delivered = positions.filter(pc.equal(positions["delivered"], True))
    if edits is None:
        edits, _ = edit_set(arc, survey_id, as_of=as_of)
    with arc.session() as s:
        epsg = s.get(Survey, survey_id).crs_epsg
    sampler = None
    if merge or any(e.kind == "set-position" for e in edits):
        dem_version = (run_manifest(arc, run).get("input_versions") or {}).get("dem")
        from archive.survey.dem import open_dem  # rasterio loads only when a height is sampled

        sampler = open_dem(arc, survey_id, dem_version) if dem_version is not None else None
    with contextlib.ExitStack() as stack:
        height_at = None
        if sampler is not None:
            stack.enter_context(sampler)

            def height_at(x: float, y: float) -> float | None:
                z = float(sampler.sample(np.array([x]), np.array([y]), epsg)[0])
                return None if np.isnan(z) else z

        table = apply_edits(delivered, edits, epsg, height_at=height_at)
        merges: list[dict[str, Any]] = []
        if merge:
            from archive.deliver.merge import merge_occupations

            table, merges = merge_occupations(table, survey_crs(epsg).unit_factor, height_at)
            table = _sorted(_with_lonlat(table, epsg))
    stations_hash = manifest_inputs(run_manifest(arc, run)).get("stations")
    if stations_hash:
        table = with_point_codes(table, arc.objects.read_table(stations_hash))
    return Final(table, merges, awaiting_harvest(positions, table))


def with_point_codes(table: pa.Table, stations: pa.Table) -> pa.Table:
    """The final table with ``code`` set to the preplot's point code of each record's
    station (line, point, preplot index), so a delivery keeps what the preplot said about
    the point (SPS rev 2.1 columns 25-26); null where the preplot has none."""
    if "code" not in stations.column_names or table.num_rows == 0:
        return table
    if "kind" in stations.column_names:  # receiver points; a source point keeps its own code
        stations = stations.filter(pc.equal(stations["kind"], "R"))
    codes = {(float(a), float(b), int(c)): k for a, b, c, k in zip(
        stations["line"].to_pylist(), stations["point"].to_pylist(),
        stations["index"].to_pylist(), stations["code"].to_pylist(), strict=True) if k}
    keys = zip(table["line"].to_pylist(), table["point"].to_pylist(),
               table["station_index"].to_pylist(), strict=True)
    values = pa.array([codes.get((float(a), float(b), int(c))) for a, b, c in keys], pa.string())
    return table.set_column(table.schema.get_field_index("code"), FINAL_SCHEMA.field("code"),
                            values)


def final_positions(arc: Archive, survey_id: int, run: Run, as_of: datetime | None = None,
                    *, edits: list[Any] | None = None, merge: bool = False,
                    positions: pa.Table | None = None) -> pa.Table:
    """The table of :func:`build_final`."""
    return build_final(arc, survey_id, run, as_of, edits=edits, merge=merge,
                       positions=positions).table


def _sorted(table: pa.Table) -> pa.Table:
    return table.take(pc.sort_indices(table, [("line", "ascending"), ("point", "ascending"),
                                              ("index", "ascending")]))


def unacknowledged_flags(final: pa.Table) -> dict[str, int]:
    """How many stations (occupations, as status, qc and review count) carry each flag
    still unacknowledged: the two records of a moved node count once, with the flags of
    either."""
    from archive.solve.flags import count_flags

    return dict(sorted(count_flags(final).per_flag.items()))
