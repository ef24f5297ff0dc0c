"""Hand-built input tables for the qc tests, with the schemas of the contracts.

Coordinates are in WGS 84 / UTM zone 14N around an invented spread of the Kestrel Flats 3D
prospect; nothing here comes from a real survey.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import UTC, datetime, timedelta

import numpy as np
import pyarrow as pa

from archive.solve.schema import POSITION_SCHEMA
from archive.survey.schema import CONTROL_SCHEMA, STATION_SCHEMA

E0, N0 = 612_000.0, 3_512_000.0
T0 = datetime(2024, 3, 4, 12, 0, tzinfo=UTC)


def positions_table(rows: Sequence[dict]) -> pa.Table:
    """A positions table: every column of POSITION_SCHEMA, defaults for those not given."""
    n = len(rows)
    defaults = {
        "node": "N0001", "kind": "logged", "part": 0, "delivered": True,
        "t_start": T0, "t_end": T0 + timedelta(days=3), "lat": None, "lon": None,
        "height": None, "height_source": "model", "h_gnss": None, "h_model": None, "dh": None,
        "sigma_e": 0.4, "sigma_n": 0.4, "corr_en": 0.0, "ell_major": 0.98, "ell_minor": 0.98,
        "ell_bearing": 0.0, "r95": 0.98, "sigma_h": 0.5, "n_total": 2000, "n_used": 1900,
        "n_rejected": 100, "n_eff": 40.0, "span_s": 250000.0, "spread": 2.0,
        "preplot_e": None, "preplot_n": None, "dist_preplot": None, "nearest_line": None,
        "nearest_point": None, "dist_nearest": None, "estimator": "huber", "flags": "",
        "index": 1, "occupation": 1, "deployed": T0 - timedelta(minutes=30),
        "retrieved": T0 + timedelta(days=3, minutes=30), "from_margins": False,
    }
    # a delivered row holds for its occupation's window under the occupation's index
    same = {"point_index": "occupation", "held_from": "deployed", "held_to": "retrieved"}
    defaults["n_no_quality"] = 0
    cols = {}
    for f in POSITION_SCHEMA:
        if f.name in same:
            vals = [r.get(f.name, r.get(same[f.name], defaults[same[f.name]])
                          if r.get("delivered", True) else None) for r in rows]
        else:
            vals = [r.get(f.name, defaults.get(f.name)) for r in rows]
        cols[f.name] = pa.array(vals, type=f.type) if n else pa.array([], type=f.type)
    return pa.table(cols, schema=POSITION_SCHEMA)


def control_table(rows: Sequence[dict]) -> pa.Table:
    """A check point table of CONTROL_SCHEMA."""
    defaults = {"index": 1, "height": None, "surveyed": T0 + timedelta(days=5), "method": "RTK",
                "sigma_e": 0.02, "sigma_n": 0.02, "sigma_h": 0.03}
    cols = {}
    for f in CONTROL_SCHEMA:
        if f.name == "src_line":
            vals = [r.get("src_line", k + 2) for k, r in enumerate(rows)]
        else:
            vals = [r.get(f.name, defaults.get(f.name)) for r in rows]
        cols[f.name] = pa.array(vals, type=f.type)
    return pa.table(cols, schema=CONTROL_SCHEMA)


def stations_table(rows: Sequence[dict]) -> pa.Table:
    """A preplot station table of STATION_SCHEMA."""
    defaults = {"index": 1, "code": "G1", "elevation": None, "kind": "R"}
    cols = {}
    for f in STATION_SCHEMA:
        if f.name == "src_line":
            vals = [k + 1 for k in range(len(rows))]
        else:
            vals = [r.get(f.name, defaults.get(f.name)) for r in rows]
        cols[f.name] = pa.array(vals, type=f.type)
    return pa.table(cols, schema=STATION_SCHEMA)


# The small fixture of the hand computation in test_stats.py: five checked stations on line
# 1001, points 2001..2005, 25 m apart; the check point of each is the planned station plus
# a small offset, and the solved position is the check point plus (dE, dN, dH).
SOLVED_MINUS_CHECK = [(0.3, 0.4, 0.1), (-0.6, 0.8, -0.2), (1.2, -0.5, 0.3), (0.0, -2.0, -0.4),
                      (-3.0, 4.0, 0.5)]
PREPLOT_MINUS_CHECK = [(1.0, 0.0), (0.0, -2.0), (1.5, 2.0), (-0.6, -0.8), (0.5, 1.2)]
PREPLOT_H_MINUS_CHECK = [0.0, 1.0, -1.0, 2.0, -2.0]


def small_fixture() -> tuple[pa.Table, pa.Table, pa.Table]:
    """(positions, control, stations) of the hand computation, plus distractors.

    Distractors: an undelivered first part of station 2003 (a move) far from everything,
    a delivered station without a check point, and a check point of a station that has no
    position (both must stay out of the statistics).
    """
    pos, ctl, sta = [], [], []
    for k in range(5):
        pe, pn = E0 + 25.0 * k, N0
        pre_de, pre_dn = PREPLOT_MINUS_CHECK[k]
        ce, cn = pe - pre_de, pn - pre_dn
        ch = 300.0 + k
        de, dn, dh = SOLVED_MINUS_CHECK[k]
        pos.append({"line": 1001.0, "point": 2001.0 + k, "node": f"N{k:04d}",
                    "easting": ce + de, "northing": cn + dn, "height": ch + dh,
                    "preplot_e": pe, "preplot_n": pn, "part": 1 if k == 2 else 0,
                    "flags": "moved" if k == 2 else "", "r95": 2.5})
        ctl.append({"line": 1001.0, "point": 2001.0 + k, "easting": ce, "northing": cn,
                    "height": ch})
        sta.append({"line": 1001.0, "point": 2001.0 + k, "easting": pe, "northing": pn,
                    "elevation": ch + PREPLOT_H_MINUS_CHECK[k]})
    pos.append({"line": 1001.0, "point": 2003.0, "node": "N0002", "easting": E0 + 500.0,
                "northing": N0 + 500.0, "height": 0.0, "part": 0, "delivered": False,
                "preplot_e": E0 + 50.0, "preplot_n": N0})
    pos.append({"line": 1001.0, "point": 2006.0, "node": "N0006", "easting": E0 + 125.3,
                "northing": N0 + 0.2, "height": 305.0, "preplot_e": E0 + 125.0, "preplot_n": N0})
    ctl.append({"line": 1001.0, "point": 2099.0, "easting": E0 + 2450.0, "northing": N0,
                "height": 299.0})
    sta.append({"line": 1001.0, "point": 2006.0, "easting": E0 + 125.0, "northing": N0})
    return positions_table(pos), control_table(ctl), stations_table(sta)


def synthetic_spread(n_lines: int, n_points: int, *, seed: int = 7, flagged_every: int = 50,
                     check_every: int = 20) -> tuple[pa.Table, pa.Table, pa.Table]:
    """A larger spread: stations 25 m apart on lines 200 m apart, solved with ~0.5 m error.

    Every ``flagged_every``-th station carries a flag; every ``check_every``-th has a check
    point. Vectorised, for report tests and the benchmark.
    """
    rng = np.random.default_rng(seed)
    li, pi = np.meshgrid(np.arange(n_lines), np.arange(n_points), indexing="ij")
    li, pi = li.ravel(), pi.ravel()
    n = li.size
    pe, pn = E0 + 25.0 * pi, N0 + 200.0 * li
    stake = rng.normal(0, 0.8, (n, 2))
    true_e, true_n = pe + stake[:, 0], pn + stake[:, 1]
    err = rng.normal(0, 0.45, (n, 2))
    flags = np.where(np.arange(n) % flagged_every == 3, "wide-spread", "")
    big = np.arange(n) % (flagged_every * 3) == 3
    err[big] += 4.0
    flags = np.where(big, "wide-spread;far-from-plan", flags)
    height = 300.0 + 0.01 * pe - E0 * 0.01
    pos = pa.table({
        "line": pa.array(1001.0 + li, pa.float64()), "point": pa.array(2001.0 + pi, pa.float64()),
        "node": pa.array([f"N{k:05d}" for k in range(n)]),
        "easting": true_e + err[:, 0], "northing": true_n + err[:, 1], "height": height,
        "preplot_e": pe, "preplot_n": pn, "flags": pa.array(flags.tolist()),
        "r95": np.full(n, 1.2), "ell_major": np.full(n, 1.4), "ell_minor": np.full(n, 0.9),
        "ell_bearing": np.full(n, 30.0),
    })
    defaults = positions_table([{"line": 0.0, "point": 0.0}])
    cols = {}
    for f in POSITION_SCHEMA:
        if f.name in pos.column_names:
            cols[f.name] = pos[f.name].cast(f.type)
        else:
            cols[f.name] = pa.array([defaults[f.name][0].as_py()] * n, type=f.type)
    positions = pa.table(cols, schema=POSITION_SCHEMA)
    chk = np.flatnonzero(np.arange(n) % check_every == 0)
    control = pa.table({
        "line": pa.array(1001.0 + li[chk], pa.float64()),
        "point": pa.array(2001.0 + pi[chk], pa.float64()),
        "index": pa.array(np.ones(chk.size, dtype=np.int8)),
        "easting": true_e[chk] + rng.normal(0, 0.3, chk.size),
        "northing": true_n[chk] + rng.normal(0, 0.3, chk.size),
        "height": height[chk] + rng.normal(0, 0.2, chk.size),
        "surveyed": pa.array([T0] * chk.size, CONTROL_SCHEMA.field("surveyed").type),
        "method": pa.array(["RTK"] * chk.size), "sigma_e": np.full(chk.size, 0.02),
        "sigma_n": np.full(chk.size, 0.02), "sigma_h": np.full(chk.size, 0.03),
        "src_line": pa.array(np.arange(chk.size) + 2, pa.int64()),
    }, schema=CONTROL_SCHEMA)
    stations = pa.table({
        "line": pa.array(1001.0 + li, pa.float64()), "point": pa.array(2001.0 + pi, pa.float64()),
        "index": pa.array(np.ones(n, dtype=np.int8)), "code": pa.array(["G1"] * n),
        "easting": pe, "northing": pn, "elevation": height, "kind": pa.array(["R"] * n),
        "src_line": pa.array(np.arange(n) + 1, pa.int64()),
    }, schema=STATION_SCHEMA)
    return positions, control, stations


def synthetic_cloud(easting: float, northing: float, *, n: int = 400, seed: int = 0,
                    reject_every: int = 12) -> pa.Table:
    """A station cloud with the columns of the solver's cloud table (time, lat, lon, east,
    north, hdop, part, status, reason, raw_hash, raw_line), east/north in the survey CRS."""
    rng = np.random.default_rng(seed)
    e = easting + rng.normal(0, 1.5, n)
    nn = northing + rng.normal(0, 1.5, n)
    status = np.where(np.arange(n) % reject_every == 0, "rejected", "used")
    e = np.where(status == "rejected", e + rng.normal(0, 6.0, n), e)
    t = np.array([T0 + timedelta(seconds=30 * k) for k in range(n)], dtype="datetime64[us]")
    return pa.table({
        "time": pa.array(t, pa.timestamp("us", tz="UTC")), "lat": np.zeros(n), "lon": np.zeros(n),
        "east": e, "north": nn, "hdop": np.full(n, 1.1),
        "part": pa.array(np.zeros(n, dtype=np.int8)), "status": pa.array(status.tolist()),
        "reason": pa.array(np.where(status == "rejected", "outlier", "").tolist()),
        "raw_hash": pa.array(["0" * 64] * n), "raw_line": pa.array(np.arange(n) + 1, pa.int64()),
    })


SURVEY = {"id": 1, "name": "Kestrel Flats 3D", "crs": "EPSG:32614",
          "crs_name": "WGS 84 / UTM zone 14N", "unit": "metre", "vertical_datum": "NAVD88 (model)",
          "client": "Harrow Basin Energy", "contractor": "Bluestem Geophysical crew 7", "area": ""}


def run_data(positions: pa.Table, control: pa.Table | None, stations: pa.Table | None):
    """RunData as the archive would give it, for rendering without an archive."""
    from archive.qc.sources import InputInfo, RunData

    run = {"id": "ab" * 32, "label": "first pass", "code_version": "0.1.0",
           "n_positions": positions.num_rows, "n_flagged": 0, "positions_hash": "cd" * 32,
           "manifest_hash": "ef" * 32, "created_at": T0 + timedelta(days=6),
           "created_by": "survey data manager"}
    manifest = {"code_version": "0.1.0",
                "params": {"screen": {"max_hdop": 4.0, "min_sats": 5},
                           "estimate": {"estimator": "huber", "huber_k": 1.345}},
                "inputs": {"stations": "12" * 32, "deployments": "34" * 32,
                           "fixes": ["56" * 32, "78" * 32]}}
    inputs = {"control": InputInfo("control", 1, "9a" * 32, "9b" * 32, "check.csv",
                                   control.num_rows if control is not None else 0),
              "stations": InputInfo("stations", 2, "9c" * 32, "9d" * 32, "preplot.sps",
                                    stations.num_rows if stations is not None else 0)}
    return RunData(survey=dict(SURVEY), run=run, manifest=manifest, positions=positions,
                   control=control, stations=stations, inputs=inputs)
