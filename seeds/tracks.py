"""One node's log: its true track sampled at the logging interval, plus receiver errors, as NMEA.

The true position at each epoch is the piecewise-linear track of the plan (racks, drive,
walk, stand, ...). While the node stands at a station its antenna is 0.15 m above the
ground and each standing part has its own multipath bias; while carried it is about 1.2 m
up. Errors come from :mod:`archive.seeds.gnss_errors`; the common-mode part is taken from
one series shared by every node, indexed by epoch.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from archive.seeds.gnss_errors import ErrorModel, node_errors
from archive.seeds.layout import Occupation
from archive.seeds.nmea_write import write_nmea
from archive.seeds.terrain import Terrain

ANTENNA_STANDING = 0.15  # m above ground, node on the ground (common practice, no source)
ANTENNA_CARRIED = 1.2  # m, in a bag or on a truck bed


@dataclass(frozen=True)
class LogContext:
    """What every node log shares: time origin and grid, the common error, terrain, datum."""

    t0: np.datetime64  # scenario start, UTC (datetime64[us])
    dt: float
    common: np.ndarray  # (3, n_grid) common-mode error on the scenario grid
    terrain: Terrain
    model: ErrorModel
    geoid_sep: float
    epsg: int


def standing_parts(occs: list[Occupation]) -> list[tuple[float, float]]:
    """Time intervals during which a node stands still at a station (a move splits one)."""
    parts = []
    for o in sorted(occs, key=lambda x: x.deployed):
        if np.isfinite(o.moved_at):
            parts += [(o.deployed, o.moved_at), (o.moved_at + 60.0, o.retrieved)]
        else:
            parts.append((o.deployed, o.retrieved))
    return parts


def node_log(ctx: LogContext, track: np.ndarray, occs: list[Occupation], t_on: float,
             t_off: float, rng: np.random.Generator) -> bytes:
    """NMEA text (GGA, GSA, RMC per epoch) of one node switched on at t_on, off at t_off."""
    from archive.survey.crs import transformer

    k = np.arange(int(np.ceil(t_on / ctx.dt)), int(np.floor(t_off / ctx.dt)) + 1)
    t = k * ctx.dt
    e = np.interp(t, track[:, 0], track[:, 1])
    n = np.interp(t, track[:, 0], track[:, 2])

    parts = standing_parts(occs)
    bounds = np.array(parts, dtype=np.float64).reshape(-1, 2)
    idx = np.searchsorted(bounds[:, 0], t, side="right") - 1
    standing = (idx >= 0) & (t <= bounds[np.maximum(idx, 0), 1])
    bias = rng.normal(0.0, ctx.model.multipath_sigma, size=(len(parts), 2))

    err = node_errors(rng, t, ctx.dt, ctx.common[:, k], ctx.model)
    me = e + err.de + np.where(standing, bias[np.maximum(idx, 0), 0], 0.0)
    mn = n + err.dn + np.where(standing, bias[np.maximum(idx, 0), 1], 0.0)
    lon, lat = transformer(ctx.epsg, 4326).transform(me, mn)
    ground = ctx.terrain.height(e, n)
    h_msl = ground + np.where(standing, ANTENNA_STANDING, ANTENNA_CARRIED) + err.du
    times = ctx.t0 + (t * 1e6).astype(np.int64).astype("timedelta64[us]")
    return write_nmea(times, lat, lon, h_msl, np.full(t.size, ctx.geoid_sep), err.quality,
                      err.n_sats, err.hdop, err.pdop, err.vdop)
