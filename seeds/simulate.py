"""Simulated node surveys with known truth, for tests, benchmarks and calibration checks.

Each node stands in a camp, is carried out to its station, stays there for its deployment
(optionally moved part way through), and is carried back; it logs every ``interval``
seconds. Its errors come from the demo's receiver error model (:mod:`archive.seeds.gnss_errors`:
fast and slow Gauss–Markov parts scaled by HDOP, a common-mode part shared by every node,
a multipath bias per stay, outlier bursts and void epochs), so the demo, the tests and the
benchmarks share one error model. On top of it, the faults the solver must catch: 2-D fixes
far off, the first minutes of a stay still being handled, moves during a deployment,
swapped serials in the log and unlogged deployments. The result is the inputs as the archive
would hold them (stations, deployment log, fix table) and the truth behind them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime

import numpy as np
import pyarrow as pa
from archive.seeds.gnss_errors import ErrorModel, common_mode, node_errors

from archive.ingest.schema import FIX_SCHEMA, FIX_SCHEMA_V1, conform_fixes
from archive.solve.segments import from_local
from archive.survey.crs import WGS84_GEOGRAPHIC, transformer
from archive.survey.schema import DEPLOYMENT_LOG_SCHEMA, STATION_SCHEMA

EPOCH = datetime(2024, 5, 1, tzinfo=UTC)

SOLVER_TEST_MODEL = ErrorModel(fast_sigma=0.5, fast_tau=1.0, slow_sigma=2.0, slow_tau=1800.0,
                               common_sigma=0.0, multipath_sigma=0.3, hdop_mean=1.1,
                               outliers_per_day=1.0, outlier_seconds=(120.0, 600.0),
                               void_fraction=0.02, void_gaps_per_day=0.0)
"""The demo's error model with heavier settings for the solver's own tests: one slow part of
2 m at 30 minutes (the long end of published correlation times, Howind et al. 1999: 5-20
min), a near-white 0.5 m part, a 0.3 m multipath bias per stay, reflections lasting 2-10
minutes and more void fixes, so that averaging is hard and the uncertainty has to be
honest."""


@dataclass
class SimConfig:
    """What to simulate (defaults: a small patch of the invented Kestrel Flats 3D)."""

    n_lines: int = 4
    n_points: int = 8
    point_spacing: float = 25.0
    line_spacing: float = 200.0
    origin: tuple[float, float] = (612000.0, 3581000.0)
    epsg: int = 32614
    days: float = 3.2
    interval: float = 30.0
    camp_hours: float = 6.0
    model: ErrorModel = field(default_factory=lambda: SOLVER_TEST_MODEL)  # receiver errors
    placement_sigma: float = 1.0
    twod_rate: float = 0.01
    n_moves: int = 2
    n_swaps: int = 1
    n_unlogged: int = 1
    move_range: tuple[float, float] = (8.0, 15.0)
    seed: int = 7
    hours: tuple[float, float] | None = None  # per-node deployment length drawn in this
    # range (hours) instead of ``days`` for every node: same-day deployments, say (6, 12)
    move_at: tuple[float, float] = (0.35, 0.65)  # when a move happens, fraction of the stay


@dataclass
class Simulation:
    """Inputs as the archive would hold them, and the truth behind them."""

    stations: pa.Table
    deployments: pa.Table
    fixes: pa.Table
    truth: dict[str, np.ndarray]  # per node: true final E/N, station, moved, swapped, logged
    camp: tuple[float, float]
    meta: dict = field(default_factory=dict)


def simulate(cfg: SimConfig | None = None) -> Simulation:
    """Simulate one node per station (see module doc); deterministic for a seed."""
    cfg = cfg or SimConfig()
    rng = np.random.default_rng(cfg.seed)
    li, pi = np.meshgrid(np.arange(cfg.n_lines), np.arange(cfg.n_points), indexing="ij")
    li, pi = li.ravel(), pi.ravel()
    n_st = len(li)
    st_line = 1001.0 + li
    st_point = 2001.0 + pi
    st_e = cfg.origin[0] + pi * cfg.point_spacing
    st_n = cfg.origin[1] + li * cfg.line_spacing
    stations = pa.table({
        "line": st_line, "point": st_point, "index": pa.array(np.ones(n_st), pa.int8()),
        "code": ["G1"] * n_st, "easting": st_e, "northing": st_n,
        "elevation": np.full(n_st, 240.0), "kind": ["R"] * n_st,
        "src_line": np.arange(1, n_st + 1, dtype=np.int64)}, schema=STATION_SCHEMA)
    camp = (cfg.origin[0] - 1500.0, cfg.origin[1] - 1200.0)
    nodes = np.array([f"KF{5000 + i:05d}" for i in range(n_st)], dtype=object)
    true_e = st_e + rng.normal(0, cfg.placement_sigma, n_st)
    true_n = st_n + rng.normal(0, cfg.placement_sigma, n_st)
    order = rng.permutation(n_st)
    moved = np.zeros(n_st, dtype=bool)
    moved[order[:cfg.n_moves]] = True
    unlogged = np.zeros(n_st, dtype=bool)
    unlogged[order[cfg.n_moves:cfg.n_moves + cfg.n_unlogged]] = True
    # swaps: pairs of neighbours along a line, logged with each other's station
    logged_station = np.arange(n_st)
    swapped = np.zeros(n_st, dtype=bool)
    cand = [i for i in order[cfg.n_moves + cfg.n_unlogged:] if pi[i] + 1 < cfg.n_points]
    for a in cand:
        if swapped.sum() >= 2 * cfg.n_swaps:
            break
        b = a + 1
        if swapped[a] or swapped[b] or moved[b] or unlogged[b] or moved[a]:
            continue
        logged_station[a], logged_station[b] = b, a
        swapped[a] = swapped[b] = True

    dt = cfg.interval
    dep_start = EPOCH.timestamp() + cfg.camp_hours * 3600 + rng.uniform(0, 3600, n_st)
    dep_len = (np.full(n_st, cfg.days * 86400) if cfg.hours is None
               else np.round(rng.uniform(*cfg.hours, n_st) * 3600))
    transit = 1800.0
    fin_e, fin_n = true_e.copy(), true_n.copy()
    move_t = np.full(n_st, np.nan)
    tables = []
    to_geo = transformer(cfg.epsg, WGS84_GEOGRAPHIC)
    # the common-mode error every node shares at the same instant, on one time grid
    k0 = int(np.floor((dep_start.min() - transit - cfg.camp_hours * 3600) / dt)) - 1
    k1 = int(np.ceil((np.max(dep_start + dep_len) + transit + cfg.camp_hours * 3600) / dt)) + 1
    common = common_mode(rng, k1 - k0 + 1, dt, cfg.model)
    for i in range(n_st):
        t0 = dep_start[i] - transit - cfg.camp_hours * 3600
        t_end = dep_start[i] + dep_len[i] + transit + cfg.camp_hours * 3600
        t = np.arange(np.ceil(t0 / dt) * dt, t_end, dt)
        n = len(t)
        pe = np.full(n, camp[0]) + rng.normal(0, 3, n)  # camp: nodes stacked in racks
        pn = np.full(n, camp[1]) + rng.normal(0, 3, n)
        go = (t >= dep_start[i] - transit) & (t < dep_start[i])
        f = (t[go] - (dep_start[i] - transit)) / transit
        pe[go], pn[go] = camp[0] + f * (true_e[i] - camp[0]), camp[1] + f * (true_n[i] - camp[1])
        on = (t >= dep_start[i]) & (t < dep_start[i] + dep_len[i])
        pe[on], pn[on] = true_e[i], true_n[i]
        handled = on & (t < dep_start[i] + 900)  # first 15 min: still being placed
        pe[handled] += rng.normal(0, 6, handled.sum())
        pn[handled] += rng.normal(0, 6, handled.sum())
        if moved[i]:
            move_t[i] = dep_start[i] + rng.uniform(*cfg.move_at) * dep_len[i]
            ang = rng.uniform(0, 2 * np.pi)
            size = rng.uniform(*cfg.move_range)
            fin_e[i], fin_n[i] = true_e[i] + size * np.sin(ang), true_n[i] + size * np.cos(ang)
            after = on & (t >= move_t[i])
            pe[after], pn[after] = fin_e[i], fin_n[i]
        back = (t >= dep_start[i] + dep_len[i]) & (t < dep_start[i] + dep_len[i] + transit)
        f = (t[back] - (dep_start[i] + dep_len[i])) / transit
        pe[back] = fin_e[i] + f * (camp[0] - fin_e[i])
        pn[back] = fin_n[i] + f * (camp[1] - fin_n[i])
        k = np.round(t / dt).astype(np.int64) - k0
        err = node_errors(rng, t, dt, common[:, k], cfg.model)
        standing = on & ~handled
        bias = rng.normal(0.0, cfg.model.multipath_sigma, (2, 2))  # multipath of each place
        place = (moved[i] & (t >= move_t[i])).astype(np.int64) if moved[i] else 0
        ee = err.de + np.where(standing, bias[0][place], 0.0)
        en = err.dn + np.where(standing, bias[1][place], 0.0)
        hdop = err.hdop
        void = err.quality == 0
        twod = ~void & (rng.random(n) < cfg.twod_rate)
        ee[twod] += rng.uniform(-300, 300, twod.sum())  # 2-D fixes land far off
        en[twod] += rng.uniform(-300, 300, twod.sum())
        lon_t, lat_t = to_geo.transform(pe, pn)
        lat, lon = from_local(ee, en, np.asarray(lat_t), np.asarray(lon_t))
        h_true = 240.0
        sep = -24.5
        h_msl = h_true + err.du
        n_sats = err.n_sats
        tables.append(conform_fixes(pa.table({
            "node": [nodes[i]] * n,
            "time": pa.array((t * 1e6).astype(np.int64), pa.int64()).cast(FIX_SCHEMA.field("time").type),
            "lat": lat, "lon": lon, "h_ell": h_msl + sep, "h_msl": h_msl,
            "geoid_sep": np.full(n, sep), "quality": pa.array(np.where(void, 0, 1), pa.int8()),
            "fix_type": pa.array(np.where(void, 1, np.where(twod, 2, 3)), pa.int8()),
            "valid": ~void, "n_sats": n_sats,
            "pdop": pa.array(err.pdop.astype(np.float32)),
            "hdop": pa.array(hdop.astype(np.float32)),
            "vdop": pa.array(err.vdop.astype(np.float32)),
            "raw_hash": [f"{i:064x}"] * n, "raw_line": np.arange(1, n + 1, dtype=np.int64),
        }, schema=FIX_SCHEMA_V1)))
    fixes = pa.concat_tables(tables)
    logged = ~unlogged
    # the log: deployment recorded within 5 min of placement, retrieval within 5 min
    dep = (dep_start + rng.uniform(-120, 300, n_st)) * 1e6
    ret = (dep_start + dep_len + rng.uniform(-300, 120, n_st)) * 1e6
    ls = logged_station[logged]
    deployments = pa.table({
        "node": list(nodes[logged]), "line": st_line[ls], "point": st_point[ls],
        "index": pa.array(np.ones(len(ls)), pa.int8()),
        "deployed": pa.array(dep[logged].astype(np.int64)).cast(DEPLOYMENT_LOG_SCHEMA.field("deployed").type),
        "retrieved": pa.array(ret[logged].astype(np.int64)).cast(DEPLOYMENT_LOG_SCHEMA.field("retrieved").type),
        "src_line": np.arange(1, logged.sum() + 1, dtype=np.int64)}, schema=DEPLOYMENT_LOG_SCHEMA)
    truth = {"node": nodes, "station": np.arange(n_st), "line": st_line, "point": st_point,
             "logged_station": logged_station, "e": fin_e, "n": fin_n, "e_first": true_e,
             "n_first": true_n, "moved": moved, "move_t": move_t, "swapped": swapped,
             "unlogged": unlogged, "h": np.full(n_st, 240.0)}
    return Simulation(stations=stations, deployments=deployments, fixes=fixes, truth=truth,
                      camp=camp, meta={"epsg": cfg.epsg, "config": cfg})
