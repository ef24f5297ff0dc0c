"""The invented demo survey, Kestrel Flats 3D, generated deterministically from a seed.

:func:`generate` writes into ``out_dir``::

    preplot.sps        SPS rev 2.1 receiver preplot (H and R records)
    deployments.csv    node,line,point,deployed_utc,retrieved_utc (as the crew logged it)
    control.csv        RTK check points on about 10 % of stations (at the sensor)
    dem.tif            bare-earth elevation model, float32 GeoTIFF, pixel-is-area
    logs/<serial>.nmea one NMEA 0183 log per node serial (GGA, GSA, RMC per epoch)
    truth.csv          where every node really stood (one row per standing part; the
                       ``occupation`` column numbers the station's occupations in time order)
    problems.json      the planted problems and the review flags that should catch them
    scenario.json      names, CRS, datum, sizes and the list of files

Planted problems: a node moved mid-deployment, two node serials swapped in the deployment
log, a node whose battery died a few hours after it was laid out, and a damaged log file.
Ordinary field work besides: a few stations are occupied again after their first pickup (one
by its own node, the others by spare nodes laid 2-6 m from the first spot; the last one three
times in all).
Everything is a pure function of ``seed`` and ``size``: the same arguments give the same
bytes.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
from archive.seeds import files
from archive.seeds.damage import damage_log
from archive.seeds.gnss_errors import ErrorModel, common_mode
from archive.seeds.layout import (
    HOUR,
    SIZES,
    Plan,
    Spread,
    add_relays,
    build_tracks,
    make_plan,
    make_spread,
)
from archive.seeds.terrain import make_terrain, write_dem
from archive.seeds.tracks import LogContext, node_log, standing_parts

SURVEY_NAME = "Kestrel Flats 3D"
CLIENT = "Harrow Basin Energy"
CONTRACTOR = "Bluestem Geophysical crew 7"
EPSG = 32614  # WGS 84 / UTM zone 14N
VERTICAL_DATUM = "NAVD88"
START = np.datetime64("2025-04-07T00:00:00", "us")  # day 0 of the scenario, UTC
ORIGIN = (583200.0, 4062400.0)  # first preplot station, survey CRS
GEOID_SEP = -27.4  # m, the receivers' GGA geoid separation here (plausible value, from memory)

# stream ids of the random generators, so each part draws from its own stream
_STREAMS = {"spread": 1, "plan": 2, "terrain": 3, "common": 4, "serials": 5, "problems": 6,
            "control": 7, "damage": 8, "relays": 9, "node": 100}


@dataclass
class Scenario:
    """Paths and facts of a generated scenario."""

    out_dir: Path
    seed: int
    size: str
    survey_name: str
    client: str
    contractor: str
    epsg: int
    vertical_datum: str
    preplot: Path
    deployments: Path
    control: Path
    dem: Path
    logs: list[Path]
    truth: Path
    problems_file: Path
    problems: list[dict[str, Any]] = field(default_factory=list)
    n_stations: int = 0
    n_nodes: int = 0
    n_deployments: int = 0
    n_check_points: int = 0
    dt: float = 0.0
    reoccupied: list[dict[str, Any]] = field(default_factory=list)  # stations laid out again

    def as_dict(self) -> dict[str, Any]:
        """Plain data (paths as text) for JSON."""
        d = {k: v for k, v in self.__dict__.items()}
        for k in ("out_dir", "preplot", "deployments", "control", "dem", "truth",
                  "problems_file"):
            d[k] = str(d[k])
        d["logs"] = [str(p) for p in self.logs]
        return d


def _rng(seed: int, stream: str, k: int = 0) -> np.random.Generator:
    return np.random.default_rng([seed, _STREAMS[stream] + k])


def _plant(seed: int, spread: Spread, plan: Plan, size_roll: int, n_nodes: int,
           per_line: int) -> dict[str, Any]:
    """Choose the planted problems among wave-1 stations whose nodes are not rolled."""
    rng = _rng(seed, "problems")
    eligible = np.arange(size_roll, n_nodes)
    # a serial swap between two stations three apart on one line
    pairs = [s for s in eligible if s + 3 in eligible and s // per_line == (s + 3) // per_line]
    a = int(rng.choice(pairs))
    b = a + 3
    rest = np.setdiff1d(eligible, [a - 1, a, a + 1, b - 1, b, b + 1])
    moved, died, damaged = (int(x) for x in rng.choice(rest, size=3, replace=False))
    occ = {o.station: o for o in plan.occupations if o.wave == 1}
    o = occ[moved]
    o.moved_at = float(np.round(o.deployed + rng.uniform(0.4, 0.6) * (o.retrieved - o.deployed)))
    dist = float(np.round(rng.uniform(15.0, 40.0), 1))
    side = float(rng.choice([-1.0, 1.0]))
    o.moved_to = (float(spread.true_e[moved] + side * dist * spread.across[0]),
                  float(spread.true_n[moved] + side * dist * spread.across[1]))
    death = float(np.round(occ[died].deployed + rng.uniform(2.0, 4.0) * HOUR))
    return {"swap": (a, b), "moved": (moved, dist), "died": (died, death), "damaged": damaged}


def generate(out_dir: str | Path, *, seed: int = 7, size: str = "demo",
             reoccupy: int = 4, relay_offset: tuple[float, float] = (2.0, 6.0),
             interval: float | None = None) -> Scenario:
    """Write the invented Kestrel Flats 3D scenario into ``out_dir`` and describe it.

    ``size`` is ``"demo"`` (240 stations on 6 lines, 3-day deployments logged every 30 s),
    ``"small"`` (30 stations on 2 lines, 3-day deployments at 60 s, for tests) or
    ``"same-day"`` (36 stations on 3 lines, 9-hour deployments at 30 s). ``interval``
    (seconds) logs every node at another interval than the size's (1 s, say).
    ``reoccupy`` stations are laid out again after their first pickup (the last one twice
    more), each new node ``relay_offset`` (2-6 m) from where the first one sat.
    """
    if size not in SIZES:
        raise ValueError(f"unknown scenario size {size!r}; use one of {', '.join(SIZES)}")
    sz = SIZES[size] if interval is None else replace(SIZES[size], dt=float(interval))
    out = Path(out_dir)
    (out / "logs").mkdir(parents=True, exist_ok=True)

    spread = make_spread(_rng(seed, "spread"), sz, ORIGIN)
    camp = (ORIGIN[0] - 1500.0 * spread.across[0] - 400.0 * spread.along[0],
            ORIGIN[1] - 1500.0 * spread.across[1] - 400.0 * spread.along[1])
    plan = make_plan(_rng(seed, "plan"), sz, spread, camp)
    planted = _plant(seed, spread, plan, sz.roll, sz.n_nodes, sz.per_line)
    avoid = {*planted["swap"], planted["moved"][0], planted["died"][0], planted["damaged"]}
    relaid = add_relays(plan, spread, sz, _rng(seed, "relays"), avoid, count=reoccupy,
                        offset=relay_offset)
    build_tracks(plan, spread, camp, _rng(seed, "plan", 1))
    died_node, death = planted["died"][0], planted["died"][1]
    plan.switch_off[died_node] = death

    srng = _rng(seed, "serials")
    serials = [str(x) for x in 300000 + np.sort(srng.choice(np.arange(1000, 99999),
                                                              sz.n_nodes, replace=False))]
    serials = [serials[i] for i in srng.permutation(sz.n_nodes)]

    extent = (sz.n_lines * sz.line_spacing, sz.per_line * sz.station_spacing)
    terrain = make_terrain(_rng(seed, "terrain"), ORIGIN, extent)
    margin = 200.0
    bounds = (min(spread.pre_e.min(), spread.head_e.min()) - margin,
              min(spread.pre_n.min(), spread.head_n.min()) - margin,
              spread.pre_e.max() + margin, spread.pre_n.max() + margin)
    write_dem(out / "dem.tif", terrain, bounds, sz.dem_res, EPSG)

    # node logs
    model = ErrorModel()
    n_grid = int(np.ceil(plan.switch_off.max() / sz.dt)) + 2
    ctx = LogContext(START, sz.dt, common_mode(_rng(seed, "common"), n_grid, sz.dt, model),
                     terrain, model, GEOID_SEP, EPSG)
    by_node: dict[int, list] = {}
    for o in plan.occupations:
        by_node.setdefault(o.node, []).append(o)
    logs, damage_counts = [], {}
    for i in range(sz.n_nodes):
        data = node_log(ctx, plan.tracks[i], by_node[i], plan.switch_on[i], plan.switch_off[i],
                        _rng(seed, "node", i))
        if i == planted["damaged"]:
            data, damage_counts = damage_log(data, _rng(seed, "damage"))
        path = out / "logs" / f"{serials[i]}.nmea"
        path.write_bytes(data)
        logs.append(path)

    _write_inputs(out, sz, spread, plan, planted, serials, terrain)
    problems = _problems(spread, plan, planted, serials, damage_counts, logs)
    ctl = _write_control(out, seed, spread, plan, planted, terrain, sz, relaid)
    _write_truth(out, spread, plan, serials, terrain)
    (out / "problems.json").write_text(json.dumps({"problems": problems}, indent=2) + "\n",
                                       encoding="utf-8")
    sc = Scenario(out_dir=out, seed=seed, size=size, survey_name=SURVEY_NAME, client=CLIENT,
                  contractor=CONTRACTOR, epsg=EPSG, vertical_datum=VERTICAL_DATUM,
                  preplot=out / "preplot.sps", deployments=out / "deployments.csv",
                  control=out / "control.csv", dem=out / "dem.tif", logs=logs,
                  truth=out / "truth.csv", problems_file=out / "problems.json",
                  problems=problems, n_stations=sz.n_stations, n_nodes=sz.n_nodes,
                  n_deployments=len(plan.occupations), n_check_points=ctl, dt=sz.dt,
                  reoccupied=[{**_station(spread, st), "occupations": sum(
                      1 for o in plan.occupations if o.station == st)} for st in relaid])
    meta = sc.as_dict()
    meta["out_dir"] = "."
    for k in ("preplot", "deployments", "control", "dem", "truth", "problems_file"):
        meta[k] = Path(meta[k]).relative_to(out).as_posix()
    meta["logs"] = [p.relative_to(out).as_posix() for p in logs]
    meta["geoid_separation"] = GEOID_SEP
    meta["start_utc"] = f"{START.astype('datetime64[s]')}Z"
    (out / "scenario.json").write_text(json.dumps(meta, indent=2) + "\n", encoding="utf-8")
    return sc


def _write_inputs(out: Path, sz, spread: Spread, plan: Plan, planted: dict[str, Any],
                  serials: list[str], terrain) -> None:
    elev = np.round(terrain.height(spread.pre_e, spread.pre_n), 1)
    headers = [
        ("H00", "SPS format version num.", "SPS 2.1 JAN2006"),
        ("H01", "Description of survey area", f"{SURVEY_NAME} (invented demo survey)"),
        ("H02", "Date of survey", f"{START.astype('datetime64[D]')}"),
        ("H03", "Client", CLIENT),
        ("H04", "Geophysical contractor", CONTRACTOR),
        ("H12", "Geodetic datum,-spheroid", "WGS 84, WGS 84"),
        ("H13", "Coordinate reference system", f"EPSG:{EPSG} WGS 84 / UTM zone 14N"),
        ("H17", "Vertical datum description", f"{VERTICAL_DATUM} (elevations from the model)"),
        ("H18", "Projection type", "Transverse Mercator (UTM)"),
        ("H19", "Projection zone", "14N"),
        ("H20", "Description of grid units", "Metres"),
        ("H201", "Factor to metre", "1.000000"),
        ("H22", "Long. of central meridian", "99 00 00.000W"),
        ("H241", "Scale factor", "0.9996"),
        ("H26", "", "Receiver preplot: 300 m line and 50 m station interval"),
    ]
    files.write_preplot(out / "preplot.sps", headers, spread.line, spread.point, spread.pre_e,
                        spread.pre_n, elev)
    a, b = planted["swap"]
    first = {o.station: o.node for o in plan.occupations if o.wave == 1}
    swapped = {a: first[b], b: first[a]}  # the crew scanned the two serials the wrong way
    occs = sorted(plan.occupations, key=lambda o: (o.deployed, o.station))
    files.write_csv(out / "deployments.csv",
                    ["node", "line", "point", "deployed_utc", "retrieved_utc"],
                    [(serials[swapped.get(o.station, o.node) if o.wave == 1 else o.node],
                      f"{spread.line[o.station]:.0f}",
                      f"{spread.point[o.station]:.0f}", d, r)
                     for o, d, r in zip(occs, files.iso(START, [o.deployed for o in occs]),
                                        files.iso(START, [o.retrieved for o in occs]),
                                        strict=True)])


def _station(spread: Spread, s: int) -> dict[str, float]:
    return {"line": float(spread.line[s]), "point": float(spread.point[s])}


def _problems(spread: Spread, plan: Plan, planted: dict[str, Any], serials: list[str],
              damage: dict[str, int], logs: list[Path]) -> list[dict[str, Any]]:
    a, b = planted["swap"]
    moved, dist = planted["moved"]
    died, death = planted["died"]
    dmg = planted["damaged"]
    occ = {o.station: o for o in plan.occupations if o.wave == 1}
    swap_flags = ["nearer-other", "far-from-plan"]
    return [
        {"kind": "moved", **_station(spread, moved), "node": serials[moved],
         "distance_m": dist, "at_utc": files.iso(START, [occ[moved].moved_at])[0],
         "expect_flags": ["moved"],
         "what": "node disturbed halfway through its deployment and left standing elsewhere"},
        {"kind": "swapped", **_station(spread, a), "node": serials[b], "true_node": serials[a],
         "expect_flags": swap_flags,
         "what": "the deployment log names the node of another station here"},
        {"kind": "swapped", **_station(spread, b), "node": serials[a], "true_node": serials[b],
         "expect_flags": swap_flags,
         "what": "the deployment log names the node of another station here"},
        {"kind": "died", **_station(spread, died), "node": serials[died],
         "log_ends_utc": files.iso(START, [death])[0],
         "expect_flags": ["short-span", "few-fixes", "unoccupied"],
         "what": "battery failed a few hours after the node was laid out"},
        {"kind": "damaged-log", **_station(spread, dmg), "node": serials[dmg],
         "file": logs[dmg].name, **damage,
         "expect_rejects": ["checksum", "binary", "truncated"],
         "what": "log with flipped characters, binary junk and cut sentences"},
    ]


def _write_control(out: Path, seed: int, spread: Spread, plan: Plan, planted: dict[str, Any],
                   terrain, sz, relaid: list[int]) -> int:
    """RTK check points on about 10 % of the stations, away from the planted problems.

    A station occupied more than once is surveyed during its last occupation, at the sensor
    of the node then in the ground (the first re-occupied station always gets one), so its
    check point belongs to one occupation only.
    """
    rng = _rng(seed, "control")
    a, b = planted["swap"]
    avoid = {a, b, planted["moved"][0], planted["died"][0], planted["damaged"]}
    cand = np.array([s for s in range(sz.n_stations) if s not in avoid])
    k = max(3, int(round(0.10 * sz.n_stations)))
    chosen = np.sort(rng.choice(cand, size=k, replace=False))
    if relaid and relaid[0] not in chosen:
        chosen = np.sort(np.r_[chosen[chosen != chosen[-1]], relaid[0]])
    occ = {}
    for o in sorted(plan.occupations, key=lambda x: x.deployed):
        occ[o.station] = o  # the last occupation of each station
    spot = np.array([occ[s].place if occ[s].place is not None
                     else (spread.true_e[s], spread.true_n[s]) for s in chosen])
    # the sensor sits up to about a metre from the node on its cable
    r = rng.uniform(0.2, 1.0, k)
    az = rng.uniform(0, 2 * np.pi, k)
    e = spot[:, 0] + r * np.sin(az) + rng.normal(0, 0.015, k)
    n = spot[:, 1] + r * np.cos(az) + rng.normal(0, 0.015, k)
    h = terrain.height(e, n) + rng.normal(0, 0.025, k)
    when = [occ[s].deployed + rng.uniform(0.2, 0.8) * (occ[s].retrieved - occ[s].deployed)
            for s in chosen]
    files.write_csv(out / "control.csv",
                    ["line", "point", "easting", "northing", "height", "surveyed_utc", "method"],
                    [(f"{spread.line[s]:.0f}", f"{spread.point[s]:.0f}", f"{x:.3f}", f"{y:.3f}",
                      f"{z:.3f}", w, "RTK")
                     for s, x, y, z, w in zip(chosen, e, n, h, files.iso(START, when),
                                              strict=True)])
    return k


def _write_truth(out: Path, spread: Spread, plan: Plan, serials: list[str], terrain) -> None:
    """Where each node really stood, one row per standing part (part 0: the whole stay)."""
    rows = []
    nth: dict[int, int] = {}
    for o in sorted(plan.occupations, key=lambda x: (x.station, x.deployed)):
        nth[o.station] = nth.get(o.station, 0) + 1  # occupations numbered in time order
        parts = standing_parts([o])
        places = [o.place if o.place is not None
                  else (spread.true_e[o.station], spread.true_n[o.station])]
        if o.moved_to is not None:
            places.append(o.moved_to)
        for j, ((t1, t2), (e, n)) in enumerate(zip(parts, places, strict=True)):
            part = 0 if len(parts) == 1 else j + 1
            rows.append((serials[o.node], f"{spread.line[o.station]:.0f}",
                         f"{spread.point[o.station]:.0f}", nth[o.station], part, f"{e:.3f}",
                         f"{n:.3f}", f"{float(terrain.height(e, n)):.3f}",
                         *files.iso(START, [t1, t2]),
                         "true" if j == len(parts) - 1 else "false"))
    files.write_csv(out / "truth.csv", ["node", "line", "point", "occupation", "part",
                                        "easting", "northing", "ground_height", "start_utc",
                                        "end_utc", "final"], rows)


__all__ = ["Scenario", "generate", "SURVEY_NAME", "CLIENT", "CONTRACTOR", "EPSG"]
