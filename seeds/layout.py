"""The spread and its roll: preplot stations, true node placements and the crews' timetable.

Receiver lines run along a small grid bearing; stations are 50 m apart on a line, lines
300 m apart (inside the usual 10-50 m and 100-500 m ranges: common practice, no source).
Nodes are switched on in camp, carried out by one crew per line (driven to the line head,
then walked from station to station), left for the deployment, picked up the same way and
driven back to the charging racks. The trailing stations' nodes are rolled: picked up and
deployed on the leading stations for a second deployment. Times are seconds from the
scenario start (00:00 UTC of day 0).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

HOUR = 3600.0
DAY = 86400.0
DRIVE_SPEED = 8.0  # m/s on tracks between camp and the line heads
WALK_SPEED = 1.2  # m/s along a line
DEPLOY_EVERY = 240.0  # s per station when laying nodes out
PICKUP_EVERY = 150.0  # s per station when picking them up
HEAD_BACK = 80.0  # m from the line head (truck) to the first station


@dataclass(frozen=True)
class Size:
    """How big a scenario is."""

    n_lines: int
    per_line: int
    roll: int  # trailing stations whose nodes are redeployed on the leading ones
    dt: float  # logging interval, s
    days: float  # length of each deployment, days
    station_spacing: float = 50.0
    line_spacing: float = 300.0
    bearing_deg: float = 8.0  # grid bearing of the receiver lines
    dem_res: float = 2.0

    @property
    def n_stations(self) -> int:
        return self.n_lines * self.per_line

    @property
    def n_nodes(self) -> int:
        return self.n_stations - self.roll


SIZES = {
    "small": Size(n_lines=2, per_line=15, roll=6, dt=60.0, days=3.0),
    "demo": Size(n_lines=6, per_line=40, roll=60, dt=30.0, days=3.0),
    # laid out in the afternoon, picked up before dawn: 9-hour deployments
    "same-day": Size(n_lines=3, per_line=12, roll=6, dt=30.0, days=0.375),
}


@dataclass
class Spread:
    """Preplot and true placement of every station (arrays, one entry per station)."""

    line: np.ndarray
    point: np.ndarray
    line_index: np.ndarray
    pre_e: np.ndarray
    pre_n: np.ndarray
    true_e: np.ndarray
    true_n: np.ndarray
    head_e: np.ndarray  # where the crew's truck stops for the station's line
    head_n: np.ndarray
    along: np.ndarray  # unit vector along the lines (e, n)
    across: np.ndarray  # unit vector across the lines


def make_spread(rng: np.random.Generator, size: Size, origin: tuple[float, float]) -> Spread:
    """Preplot grid and where each node really went (off the stake by a little, sometimes more)."""
    b = np.radians(size.bearing_deg)
    along = np.array([np.sin(b), np.cos(b)])
    across = np.array([np.cos(b), -np.sin(b)])
    li, k = np.divmod(np.arange(size.n_stations), size.per_line)
    pre = (np.asarray(origin)[None, :] + (li * size.line_spacing)[:, None] * across
           + (k * size.station_spacing)[:, None] * along)
    pre = np.round(pre, 1)
    # placement: a few decimetres off the stake, a few stations set aside for an obstacle
    off = rng.normal(0.0, 0.6, size=pre.shape)
    obstacle = rng.random(size.n_stations) < 0.03
    r = rng.uniform(3.0, 6.0, size=size.n_stations)
    az = rng.uniform(0, 2 * np.pi, size=size.n_stations)
    off[obstacle, 0] += (r * np.sin(az))[obstacle]
    off[obstacle, 1] += (r * np.cos(az))[obstacle]
    true = pre + off
    head = (np.asarray(origin)[None, :] + (li * size.line_spacing)[:, None] * across
            - HEAD_BACK * along)
    return Spread(line=(1001.0 + li).astype(np.float64), point=(5001.0 + k).astype(np.float64),
                  line_index=li, pre_e=pre[:, 0], pre_n=pre[:, 1], true_e=true[:, 0],
                  true_n=true[:, 1], head_e=head[:, 0], head_n=head[:, 1], along=along,
                  across=across)


@dataclass
class Occupation:
    """One node really standing at one station (a part, if it was moved during the stay)."""

    node: int
    station: int
    deployed: float
    retrieved: float
    wave: int
    moved_at: float = float("nan")  # time of a planted disturbance, if any
    moved_to: tuple[float, float] | None = None
    place: tuple[float, float] | None = None  # where it stood, when not the station's spot


@dataclass
class Plan:
    """Who stood where and when, and each node's track waypoints (t, e, n)."""

    occupations: list[Occupation]
    tracks: list[np.ndarray] = field(default_factory=list)
    switch_on: np.ndarray = field(default_factory=lambda: np.zeros(0))
    switch_off: np.ndarray = field(default_factory=lambda: np.zeros(0))


def _crew_times(spread: Spread, stations: np.ndarray, start: float, every: float,
                rng: np.random.Generator) -> np.ndarray:
    """Time at each of ``stations``: one crew per line, working from the line head outwards."""
    t = np.empty(stations.size)
    for li in np.unique(spread.line_index[stations]):
        sel = np.flatnonzero(spread.line_index[stations] == li)
        order = sel[np.argsort(spread.point[stations[sel]])]
        steps = np.arange(1, order.size + 1) * every
        t[order] = start + 600.0 * li + steps + rng.uniform(-30, 30, order.size)
    return np.round(t)


def make_plan(rng: np.random.Generator, size: Size, spread: Spread,
              camp: tuple[float, float]) -> Plan:
    """Deployments of both waves (rolled nodes go from trailing to leading stations)."""
    n_nodes, roll = size.n_nodes, size.roll
    wave1 = np.arange(n_nodes)  # node i first goes to station i
    dep1 = _crew_times(spread, wave1, 14 * HOUR, DEPLOY_EVERY, rng)
    ret1 = _crew_times(spread, wave1, size.days * DAY + 14 * HOUR, PICKUP_EVERY, rng)
    rolled = np.arange(roll)  # trailing stations: their nodes move to the leading ones
    wave2 = n_nodes + rolled
    start2 = ret1[rolled].max() + 1.5 * HOUR
    dep2 = _crew_times(spread, wave2, start2, DEPLOY_EVERY, rng)
    ret2 = _crew_times(spread, wave2, 2 * size.days * DAY + 14 * HOUR, PICKUP_EVERY, rng)

    occ = [Occupation(int(i), int(i), float(dep1[i]), float(ret1[i]), 1) for i in wave1]
    occ += [Occupation(int(i), int(wave2[i]), float(dep2[i]), float(ret2[i]), 2) for i in rolled]
    plan = Plan(occ)
    plan.switch_on = np.round(11 * HOUR + rng.uniform(0, 1800, n_nodes))
    plan.switch_off = np.zeros(n_nodes)
    return plan


def _walk(spread: Spread, s: int) -> float:
    """Seconds to walk between station ``s`` and its line head."""
    return float(np.hypot(spread.true_e[s] - spread.head_e[s],
                          spread.true_n[s] - spread.head_n[s]) / WALK_SPEED)


def add_relays(plan: Plan, spread: Spread, size: Size, rng: np.random.Generator,
               avoid: set[int], count: int = 4,
               offset: tuple[float, float] = (2.0, 6.0)) -> list[int]:
    """Occupy ``count`` stations again after their first pickup (a station occupied twice is
    ordinary field work: a node re-laid after a flood, a replacement for a failed node).

    The first chosen station gets its own node back; the others get a node picked up earlier
    on the same line (a spare), each laid ``offset`` (2-6 m) from where the first node sat;
    the last one
    is occupied a third time by another spare. Stations in ``avoid`` (planted problems) and
    rolled stations take no part. Returns the stations re-occupied.
    """
    first = {o.station: o for o in plan.occupations if o.wave == 1}
    rolled = {o.node for o in plan.occupations if o.wave == 2}
    free = [s for s in sorted(first) if s not in avoid and first[s].node not in rolled]
    if len(free) < 2 or count < 1:
        return []
    chosen = sorted(int(x) for x in rng.choice(free, size=min(count, len(free) // 2),
                                               replace=False))
    spares = [s for s in free if s not in chosen]
    end = 2 * size.days * DAY + 14 * HOUR  # the second wave's pickup day
    for k, s in enumerate(chosen):
        o1 = first[s]
        if k == 0:
            donors = [s]  # its own node, re-laid (after a flood, say)
        else:
            wanted = 2 if k == len(chosen) - 1 else 1
            near = sorted(spares, key=lambda d: (spread.line_index[d] != spread.line_index[s],
                                                 first[d].retrieved >= o1.retrieved, d))
            donors = near[:wanted]
            for d in donors:
                spares.remove(d)
        stops = [end] if len(donors) == 1 else [0.5 * (o1.retrieved + end), end]
        t = o1.retrieved
        for donor, stop in zip(donors, stops, strict=True):
            node = first[donor].node
            prev = max(x.retrieved for x in plan.occupations if x.node == node)
            ready = prev + _walk(spread, donor) + _walk(spread, s) + 900.0
            start = float(np.round(max(t, ready) + rng.uniform(1.0, 2.0) * HOUR))
            r = rng.uniform(*offset)
            az = rng.uniform(0, 2 * np.pi)
            place = (float(spread.true_e[s] + r * np.sin(az)),
                     float(spread.true_n[s] + r * np.cos(az)))
            stop = float(np.round(stop + rng.uniform(-0.5, 0.5) * HOUR))
            plan.occupations.append(Occupation(node, s, start, stop, 3, place=place))
            t = stop
    return chosen


def build_tracks(plan: Plan, spread: Spread, camp: tuple[float, float],
                 rng: np.random.Generator) -> None:
    """Waypoints of every node: racks in camp, drive, walk, stand, walk, drive, racks."""
    by_node: dict[int, list[Occupation]] = {}
    for o in plan.occupations:
        by_node.setdefault(o.node, []).append(o)
    plan.tracks = []
    for node in range(plan.switch_on.size):
        slot = np.array(camp) + [0.5 * (node % 24), 0.6 * (node // 24)]
        occs = sorted(by_node[node], key=lambda o: o.deployed)
        pts: list[tuple[float, float, float]] = [(plan.switch_on[node], *slot)]
        prev_exit: tuple[float, float, float] | None = None
        for o in occs:
            s = o.station
            head = (spread.head_e[s], spread.head_n[s])
            here = o.place if o.place is not None else (spread.true_e[s], spread.true_n[s])
            walk = np.hypot(here[0] - head[0], here[1] - head[1]) / WALK_SPEED
            if prev_exit is None:  # from the racks: drive to the head, wait, walk out
                drive = np.hypot(head[0] - slot[0], head[1] - slot[1]) / DRIVE_SPEED
                leave = max(o.deployed - walk - drive - 1200.0, plan.switch_on[node] + 600.0)
                pts += [(leave, *slot), (leave + drive, *head)]
            else:  # rolled: from the last head straight to the new one
                drive = np.hypot(head[0] - prev_exit[1], head[1] - prev_exit[2]) / DRIVE_SPEED
                pts += [(o.deployed - walk - drive - 300.0, *prev_exit[1:]),
                        (o.deployed - walk - 300.0, *head)]
            pts += [(o.deployed - walk, *head), (o.deployed, *here)]
            if o.moved_to is not None:
                pts += [(o.moved_at, *here), (o.moved_at + 60.0, *o.moved_to)]
                here = o.moved_to
            back = np.hypot(here[0] - head[0], here[1] - head[1]) / WALK_SPEED
            pts += [(o.retrieved, *here), (o.retrieved + back, *head)]
            prev_exit = (o.retrieved + back, *head)
        drive = np.hypot(slot[0] - prev_exit[1], slot[1] - prev_exit[2]) / DRIVE_SPEED
        arrive = prev_exit[0] + 1800.0 + drive
        pts += [(prev_exit[0] + 1800.0, *prev_exit[1:]), (arrive, *slot)]
        plan.switch_off[node] = np.round(arrive + rng.uniform(1.0, 2.0) * HOUR)
        pts.append((plan.switch_off[node] + 1.0, *slot))
        track = np.array(pts, dtype=np.float64)
        # the crews' timetable never runs backwards; guard against equal stamps
        track[:, 0] = np.maximum.accumulate(track[:, 0]) + np.arange(len(track)) * 1e-3
        plan.tracks.append(track)
