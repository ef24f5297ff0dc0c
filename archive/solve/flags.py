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
import pandas as pd
import pyarrow as pa

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


def station_flags(table: pa.Table) -> pd.DataFrame:
    """One row per station (occupation) with delivered rows: line, point, occupation, node
    and its flags (the union over its delivered rows, in the order of ``FLAGS``)."""
    cols = ["line", "point", "index", "node", "kind", "delivered", "flags"]
    df = table.select([c for c in cols if c in table.column_names]).to_pandas()
    df["occupation"] = (table["occupation"].to_pandas() if "occupation" in table.column_names
                        else df["index"])
    df["occupation"] = df["occupation"].fillna(df["index"]).astype("int64")
    df = df[df["delivered"].astype(bool) & (df["kind"] == "logged")]
    keys = list(STATION_KEY)
    if df.empty:
        return pd.DataFrame({k: pd.Series(dtype="float64") for k in keys}
                            | {"node": pd.Series(dtype="object"),
                               "flags": pd.Series(dtype="object")})
    df = df.assign(flags=df["flags"].fillna(""))
    # most stations have one delivered row; only the parts of moved nodes need joining
    several = df.duplicated(keys, keep=False).to_numpy()
    parts = [df.loc[~several, [*keys, "node", "flags"]]]
    if several.any():
        parts.append(df[several].groupby(keys, sort=False).agg(
            node=("node", "first"), flags=("flags", ";".join)).reset_index())
    grouped = pd.concat(parts, ignore_index=True).sort_values(keys, ignore_index=True)
    order = {k: i for i, k in enumerate(FLAGS)}
    grouped["flags"] = [";".join(sorted({f for f in s.split(";") if f}, key=order.get))
                        for s in grouped["flags"]]
    return grouped


def count_flags(table: pa.Table, stations: pd.DataFrame | None = None) -> FlagCounts:
    """The review flags of a positions table counted per station (:class:`FlagCounts`);
    ``stations``: its :func:`station_flags`, when the caller has them already."""
    st = station_flags(table) if stations is None else stations
    per: dict[str, int] = {}
    for text in st["flags"]:
        for f in text.split(";") if text else ():
            per[f] = per.get(f, 0) + 1
    kind = table["kind"].to_pylist() if "kind" in table.column_names else []
    return FlagCounts(n_stations=len(st), n_flagged=int((st["flags"] != "").sum()),
                      per_flag={k: per[k] for k in FLAGS if k in per},
                      n_unlogged=sum(1 for k in kind if k == "unlogged"))
