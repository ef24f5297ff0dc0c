"""Stationary clusters in a node's track outside its logged windows (unlogged deployments).

The kept fixes of a node outside every logged window [deployed, retrieved] are cut into time
chunks (``chunk_min``); each chunk's median position stands for where the node was. A lone
chunk away from its two agreeing neighbours (an outlier burst) is dropped. Successive chunks
of one node, at most three chunks apart in time and closer than the radius R, are linked; a chain of linked chunks lasting at least T is a stationary cluster. A cluster
within ``match_tol`` of a preplot station is reported with that station (an unlogged
deployment, or a log error); clusters far from every station (camp, vehicles, stores) are
not. All of it is vectorised over chunks and nodes.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.spatial import cKDTree

from archive.solve.fixarrays import FixArrays
from archive.solve.segments import seg_median
from archive.solve.windows import FOREVER, Windows, no_windows
from archive.survey.crs import WGS84_GEOGRAPHIC, transformer


def find_clusters(fx: FixArrays, candidate: np.ndarray, stations_en: np.ndarray,
                  stations_id: tuple[np.ndarray, np.ndarray, np.ndarray], crs_epsg: int,
                  params: dict[str, Any], *, unit_factor: float = 1.0) -> Windows:
    """Unlogged windows from the fixes flagged ``candidate`` (kept, outside logged windows).

    ``radius`` and ``match_tol`` are metres; grid distances are in the CRS unit, so they
    are compared with the tolerances divided by ``unit_factor`` (metres per CRS unit).
    """
    empty = no_windows()
    sel = np.flatnonzero(candidate)
    if len(sel) == 0 or len(stations_en) == 0:
        return empty
    chunk_us = int(params["chunk_min"] * 60e6)
    radius = params["radius"] / unit_factor  # CRS units
    match_tol = params["match_tol"] / unit_factor
    code = fx.node_code[sel]
    t = fx.t_us[sel]
    ck = (code << 32) + (t // chunk_us)
    new = np.ones(len(sel), dtype=bool)
    new[1:] = ck[1:] != ck[:-1]
    cid = np.cumsum(new) - 1
    n_ck = int(cid[-1]) + 1
    cnt = np.bincount(cid, minlength=n_ck).astype(float)
    lat = seg_median(fx.lat[sel], cid, n_ck, 64)
    lon = seg_median(fx.lon[sel], cid, n_ck, 64)
    first = np.flatnonzero(new)
    last = np.append(first[1:] - 1, len(sel) - 1)
    t_first, t_last, ck_code = t[first], t[last], code[first]
    e, n = transformer(WGS84_GEOGRAPHIC, crs_epsg).transform(lon, lat)
    e, n = np.asarray(e), np.asarray(n)
    # a single chunk off its two neighbours, which agree with each other, is a glitch
    # (an outlier burst filling the chunk): drop it before linking
    if n_ck > 2:
        same = ck_code[1:] == ck_code[:-1]
        far = ~same | (np.hypot(np.diff(e), np.diff(n)) > radius)
        bridge = (ck_code[2:] == ck_code[:-2]) & (
            np.hypot(e[2:] - e[:-2], n[2:] - n[:-2]) <= radius)
        glitch = np.zeros(n_ck, dtype=bool)
        glitch[1:-1] = far[:-1] & far[1:] & bridge
        keep_ck = ~glitch
        e, n, cnt = e[keep_ck], n[keep_ck], cnt[keep_ck]
        t_first, t_last, ck_code = t_first[keep_ck], t_last[keep_ck], ck_code[keep_ck]
        n_ck = len(e)
    link = np.zeros(n_ck, dtype=bool)
    link[1:] = ((ck_code[1:] == ck_code[:-1])
                & (t_first[1:] - t_last[:-1] <= 3 * chunk_us)
                & (np.hypot(np.diff(e), np.diff(n)) <= radius))
    run = np.cumsum(~link) - 1
    n_run = int(run[-1]) + 1
    w_run = np.bincount(run, weights=cnt, minlength=n_run)
    ce = np.bincount(run, weights=e * cnt, minlength=n_run) / w_run
    cn = np.bincount(run, weights=n * cnt, minlength=n_run) / w_run
    r_first = np.flatnonzero(~link)
    r_last = np.append(r_first[1:] - 1, n_ck - 1)
    start, end, r_code = t_first[r_first], t_last[r_last], ck_code[r_first]
    long_enough = (end - start) >= params["min_hours"] * 3600e6
    dist, near = cKDTree(stations_en).query(np.column_stack([ce, cn]))
    keep = np.flatnonzero(long_enough & (dist <= match_tol))
    if len(keep) == 0:
        return empty
    line, point, index = stations_id
    return Windows(
        node=np.array([fx.node_names[c] for c in r_code[keep]], dtype=object),
        code=r_code[keep].astype(np.int64), start=start[keep], end=end[keep],
        line=line[near[keep]].astype(np.float64), point=point[near[keep]].astype(np.float64),
        index=index[near[keep]].astype(np.int8),
        kind=np.full(len(keep), "unlogged", dtype=object),
        occupation=np.zeros(len(keep), dtype=np.int8),
        deployed=np.full(len(keep), FOREVER, dtype=np.int64),
        retrieved=np.full(len(keep), FOREVER, dtype=np.int64),
    )
