"""Review flags of each solved position (keys of :data:`archive.solve.schema.FLAGS`).

Every flag is a vector test over all positions; the ``flags`` column joins the keys that
apply with ";" in the fixed order of ``FLAGS``. The preplot checks use a k-d tree of the
stations: distance to the position's own station, and the nearest *other* station (a
position nearer another station than its own hints at a serial/station mix-up in the log).

:func:`count_flags` is the one way flags are counted for people: per station (occupation),
never per row (a node that moved has a row per part) nor per fix.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from archive.solve.params import setting
from archive.solve.schema import FLAGS


def station_keys(*stations: tuple[np.ndarray, np.ndarray, np.ndarray]) -> list[np.ndarray]:
    """Integer keys of (line, point, index) triples, consistent across the given sets."""
    rows = np.concatenate([np.column_stack([np.asarray(a, dtype=np.float64) for a in s])
                           for s in stations]) if stations else np.zeros((0, 3))
    if len(rows) == 0:
        return [np.zeros(0, dtype=np.int64) for _ in stations]
    _, inverse = np.unique(rows, axis=0, return_inverse=True)
    inverse = inverse.reshape(-1).astype(np.int64)
    out, at = [], 0
    for s in stations:
        out.append(inverse[at:at + len(s[0])])
        at += len(s[0])
    return out


def preplot_checks(east: np.ndarray, north: np.ndarray, own_key: np.ndarray,
                   st_key: np.ndarray, st_e: np.ndarray, st_n: np.ndarray,
                   st_line: np.ndarray, st_point: np.ndarray, *,
                   unit_factor: float = 1.0) -> dict[str, np.ndarray]:
    """Own preplot coordinates and distance, and the nearest other station and distance.

    Coordinates are in the survey CRS unit; the two distances are returned in metres
    (times ``unit_factor``, metres per CRS unit) so they compare with metre tolerances.
    """
    n = len(east)
    out = {k: np.full(n, np.nan) for k in
           ("preplot_e", "preplot_n", "dist_preplot", "nearest_line", "nearest_point",
            "dist_nearest")}
    if len(st_key) == 0:
        return out
    order = np.argsort(st_key, kind="stable")
    pos = np.clip(np.searchsorted(st_key[order], own_key), 0, len(order) - 1)
    found = st_key[order][pos] == own_key
    own = order[pos]
    out["preplot_e"] = np.where(found, st_e[own], np.nan)
    out["preplot_n"] = np.where(found, st_n[own], np.nan)
    out["dist_preplot"] = np.hypot(east - out["preplot_e"], north - out["preplot_n"]) * unit_factor
    fin = np.isfinite(east) & np.isfinite(north)
    if fin.any():
        from scipy.spatial import cKDTree  # imported when solving, not by readers of counts

        k = min(2, len(st_key))
        dist, idx = cKDTree(np.column_stack([st_e, st_n])).query(
            np.column_stack([east[fin], north[fin]]), k=k)
        dist, idx = dist.reshape(len(dist), k), idx.reshape(len(idx), k)
        first_is_own = st_key[idx[:, 0]] == own_key[fin]
        col = np.where(first_is_own & (k > 1), 1, 0)
        rows = np.arange(len(idx))
        other = idx[rows, col]
        valid = ~(first_is_own & (k == 1))
        out["nearest_line"][fin] = np.where(valid, st_line[other], np.nan)
        out["nearest_point"][fin] = np.where(valid, st_point[other], np.nan)
        out["dist_nearest"][fin] = np.where(valid, dist[rows, col] * unit_factor, np.nan)
    return out


def flag_strings(cols: dict[str, np.ndarray], p: dict[str, Any]) -> np.ndarray:
    """The ";"-joined flags of every position from its columns and the parameters.

    Thresholds relative to the window (``flags.min_fix_fraction``, ``min_span_fraction``,
    ``height_z``) are read with :func:`archive.solve.params.setting`: a run made before
    they existed keeps its absolute rules (``min_fixes``, ``min_span_hours``,
    ``height_tol``).
    """
    f = p["flags"]
    sigma0 = p["estimate"]["sigma0"]
    used = cols["n_used"]
    occupied = used > 0
    few = used < f["min_fixes"]
    share = setting(p, "flags", "min_fix_fraction")
    if share:
        few |= used < share * np.nan_to_num(cols["expected"], nan=0.0)
    span_share = setting(p, "flags", "min_span_fraction")
    short = (cols["span_s"] < f["min_span_hours"] * 3600 if span_share is None
             else cols["span_s"] < span_share * cols["allowed_s"])
    height = np.abs(cols["dh"]) > f["height_tol"]
    z = setting(p, "flags", "height_z")
    if z:
        height &= np.abs(cols["dh"]) > z * cols["dh_sigma"]
    unrated = cols.get("n_no_quality", np.zeros(len(used)))
    unrated_share = f.get("max_no_quality_share", 0.5)  # absent from manifests of earlier runs
    tests = {
        "few-fixes": occupied & few,
        "short-span": occupied & short,
        "wide-spread": occupied & (cols["unit_scale"] > f["spread_factor"] * sigma0),
        "moved": cols["moved"],
        "far-from-plan": cols["dist_preplot"] > f["far_from_plan"],
        "nearer-other": cols["dist_nearest"] < cols["dist_preplot"],
        "height-mismatch": height,
        "off-model": cols["off_model"],
        "unlogged": cols["kind"] == "unlogged",
        "unoccupied": ~occupied,
        "quality-unknown": occupied & (unrated > unrated_share * used),
    }
    assert list(tests) == list(FLAGS)
    waiting = cols["kind"] == "awaiting"  # nothing solved, nothing to review yet
    out = np.full(len(used), "", dtype=object)
    for key, hit in tests.items():
        hit = np.asarray(hit, dtype=bool) & ~waiting
        out[hit] = np.where(out[hit] == "", key, out[hit] + ";" + key)
    return out


STATION_KEY = ("line", "point", "occupation")
"""A station as review counts it: one occupation (a node's deployment there), keyed by its
line, point and delivered point index; both parts of a node that moved are one station."""


@dataclass(frozen=True)
class FlagCounts:
    """Review flags counted per station (occupation), the one way every command counts them.

    ``n_stations`` stations have delivered rows; ``n_flagged`` of them carry at least one
    flag on any of their delivered rows; ``per_flag`` counts, for each flag, the stations
    carrying it (a station with two flags counts once in ``n_flagged`` and once under each
    flag). Stationary clusters without a logged deployment are not stations: they are
    counted apart in ``n_unlogged``.
    """

    n_stations: int
    n_flagged: int
    per_flag: dict[str, int]
    n_unlogged: int

    def as_dict(self) -> dict[str, Any]:
        """Plain data (the unit is said, so no reader takes them for rows)."""
        return {"unit": "stations (occupations)", "n_stations": self.n_stations,
                "n_flagged": self.n_flagged, "per_flag": self.per_flag,
                "n_unlogged": self.n_unlogged}


STATION_SCHEMA = pa.schema([("line", pa.float64()), ("point", pa.float64()),
                            ("occupation", pa.int64()), ("node", pa.string()),
                            ("flags", pa.string())])
"""The table of :func:`station_flags`."""


def _flag_order(text: str) -> str:
    """The distinct flags of ``text`` (";"-joined) in the order of ``FLAGS``."""
    order = {k: i for i, k in enumerate(FLAGS)}
    return ";".join(sorted({f for f in text.split(";") if f}, key=order.get))


def station_flags(table: pa.Table) -> pa.Table:
    """One row per station (occupation) with delivered rows, sorted by station: line,
    point, occupation, node (the first given) and its flags (the union over its delivered
    rows, in the order of ``FLAGS``; "" for none), as :data:`STATION_SCHEMA`. A table
    without ``delivered`` and ``kind`` (a delivery's final table) is delivered whole."""
    index = table["index"].cast(pa.int64())
    occ = (pc.coalesce(table["occupation"].cast(pa.int64()), index)
           if "occupation" in table.column_names else index)
    if {"delivered", "kind"} <= set(table.column_names):
        keep = pc.fill_null(pc.and_(pc.fill_null(table["delivered"], False),
                                    pc.equal(table["kind"], "logged")), False)
    else:
        keep = pa.array(np.ones(table.num_rows, dtype=bool))
    t = pa.table({"line": table["line"].cast(pa.float64()),
                  "point": table["point"].cast(pa.float64()), "occupation": occ,
                  "node": table["node"].cast(pa.string()),
                  "flags": pc.fill_null(table["flags"].cast(pa.string()), "")}).filter(keep)
    if t.num_rows == 0:
        return pa.Table.from_batches([], schema=STATION_SCHEMA)
    t = t.take(pc.sort_indices(t, [(k, "ascending") for k in STATION_KEY]))  # stable
    line, point = t["line"].to_numpy(), t["point"].to_numpy()
    occ_n = t["occupation"].to_numpy()
    first = np.ones(t.num_rows, dtype=bool)
    first[1:] = (line[1:] != line[:-1]) | (point[1:] != point[:-1]) | (occ_n[1:] != occ_n[:-1])
    flags, node = t["flags"].combine_chunks(), t["node"].combine_chunks()
    if not first.all():  # most stations have one row; the parts of moved nodes are joined
        starts = np.flatnonzero(first)
        ends = np.append(starts[1:], t.num_rows)
        several = ends - starts > 1
        texts, nodes = flags.to_pylist(), node.to_pylist()
        for a, b in zip(starts[several].tolist(), ends[several].tolist(),
                        strict=True):  # one per moved node, not per row
            texts[a] = ";".join(texts[a:b])
            nodes[a] = next((x for x in nodes[a:b] if x is not None), None)
        flags = pa.array([texts[i] for i in starts.tolist()], pa.string())
        node = pa.array([nodes[i] for i in starts.tolist()], pa.string())
        t = t.take(starts)
    coded = pc.dictionary_encode(flags)  # a few distinct flag sets among many stations
    ordered = pa.array([_flag_order(x) for x in coded.dictionary.to_pylist()], pa.string())
    return pa.table({"line": t["line"], "point": t["point"], "occupation": t["occupation"],
                     "node": node, "flags": ordered.take(coded.indices)}, schema=STATION_SCHEMA)


def count_flags(table: pa.Table, stations: pa.Table | None = None) -> FlagCounts:
    """The review flags of a positions table counted per station (:class:`FlagCounts`);
    ``stations``: its :func:`station_flags`, when the caller has them already."""
    st = station_flags(table) if stations is None else stations
    per: dict[str, int] = {}
    n_flagged = 0
    for item in pc.value_counts(st["flags"]).to_pylist():  # one per distinct flag set
        text, n = item["values"], int(item["counts"])
        if text:
            n_flagged += n
            for f in text.split(";"):
                per[f] = per.get(f, 0) + n
    n_unlogged = (int(pc.sum(pc.equal(table["kind"], "unlogged")).as_py() or 0)
                  if "kind" in table.column_names else 0)
    return FlagCounts(n_stations=st.num_rows, n_flagged=n_flagged,
                      per_flag={k: per[k] for k in FLAGS if k in per}, n_unlogged=n_unlogged)
