"""Epochs from the records of the NMEA scanner: one compiled walk over the records of a chunk.

The sentences a receiver writes for one instant share their time of day. An epoch is a run
of records whose timed sentences (GGA, GNS, RMC, GLL, ZDA) carry the same time of day; the
untimed GSA sentences belong to the epoch they are written in. For every epoch:

- the position comes from the best position sentence present: GGA, then GNS, then RMC,
  then GLL (the first of that type with coordinates);
- fix quality, satellites, HDOP, altitude and geoid separation come from the GGA, else the
  GNS (an epoch with neither has no quality information: see ``no_quality``);
- PDOP and VDOP come from the first GSA giving them, HDOP too when the GGA/GNS has none,
  and the fix type is the highest of its GSA;
- the date comes from its RMC or ZDA, else from the latest date sentence before it (the day
  rolls over when their times of day are more than 12 h apart: midnight UTC), else from the
  date given for the log (``date0``, rolling over when the time of day goes back by more
  than 12 h), else the epoch has no date and its position lines are rejected (``no-date``);
- an RMC or GLL saying void (status V, or mode N) makes the epoch not valid;
- sentences of the epoch that disagree (positions further apart than one unit of the last
  digit the coarser of them writes, or two different dates) reject every position and
  date line of the epoch as ``conflict``: no choice is made silently.

Everything runs in one function over whole arrays: see the note in
:mod:`archive.ingest.nmea_scan` on reference counts.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from archive.ingest.nmea_scan import (
    F_1,
    F_2,
    F_3,
    F_LAT,
    F_LON,
    K_GGA,
    K_GLL,
    K_GNS,
    K_GSA,
    K_RMC,
    K_ZDA,
    S_DATE,
    S_I1,
    S_KIND,
    S_RES,
    S_STATUS,
    ST_ACCEPTED,
    ST_CONFLICT,
    ST_NODATE,
)

US_PER_DAY = 86_400_000_000
HALF_DAY = US_PER_DAY // 2
# carry: what one chunk tells the next
C_SRC_DATE, C_SRC_TOD, C_TRACK_TOD, C_TRACK_DAY, C_DATE0 = range(5)
N_CARRY = 5


def new_carry(date0: int | None) -> np.ndarray:
    """The carry of a log's first chunk; ``date0`` is the given date (days since 1970)."""
    carry = np.full(N_CARRY, -1, np.int64)
    carry[C_TRACK_DAY] = 0
    if date0 is not None:
        carry[C_DATE0] = date0
    return carry


@njit(cache=True, nogil=True, error_model="numpy")
def assemble(iv, tod, fv, a, b, carry):  # pragma: no cover - compiled
    """Epochs of records ``a .. b-1`` (see the module docstring); ``carry`` is updated.

    Returns ``(pos, qual, day, etod, void, ftype, pdop, vdop, ghdop, keep)``, one row per
    epoch: the record giving the position, the record giving the quality (-1 none), the
    day (days since 1970, -1 none), the time of day (µs), void, GSA fix type (-1 none),
    the GSA PDOP, VDOP and HDOP, and whether the epoch gives a fix. Statuses of rejected
    records are changed in ``iv``.
    """
    status = iv[S_STATUS]
    kind = iv[S_KIND]
    i1 = iv[S_I1]
    date = iv[S_DATE]
    res = iv[S_RES]
    lat = fv[F_LAT]
    lon = fv[F_LON]
    f1 = fv[F_1]
    f2 = fv[F_2]
    f3 = fv[F_3]
    # 1. epochs: runs of equal time of day among the timed sentences
    ep_of = np.full(b - a, -1, np.int64)
    m = 0
    for i in range(a, b):
        k = kind[i]
        if status[i] == ST_ACCEPTED and k != K_GSA and k != 0 and tod[i] >= 0:
            m += 1
    etod = np.empty(m, np.int64)
    e = -1
    for i in range(a, b):
        if status[i] != ST_ACCEPTED:
            continue
        k = kind[i]
        if k != K_GSA and k != 0 and tod[i] >= 0:
            if e < 0 or tod[i] != etod[e]:
                e += 1
                etod[e] = tod[i]
            ep_of[i - a] = e
        elif k == K_GSA and e >= 0:
            ep_of[i - a] = e
    ne = e + 1
    # 2. what each epoch says
    pos = np.full(ne, -1, np.int64)
    rank = np.full(ne, 9, np.int64)
    anchor = np.full(ne, -1, np.int64)
    qual = np.full(ne, -1, np.int64)
    own = np.full(ne, -1, np.int64)
    void = np.zeros(ne, np.bool_)
    conflict = np.zeros(ne, np.bool_)
    has_pos = np.zeros(ne, np.bool_)
    ftype = np.full(ne, -1, np.int64)
    pdop = np.full(ne, np.nan)
    vdop = np.full(ne, np.nan)
    ghdop = np.full(ne, np.nan)
    for i in range(a, b):
        e = ep_of[i - a]
        if e < 0:
            continue
        k = kind[i]
        if k == K_GSA:
            if i1[i] > ftype[e]:
                ftype[e] = i1[i]
            if np.isnan(pdop[e]) and not np.isnan(f1[i]):
                pdop[e] = f1[i]
            if np.isnan(ghdop[e]) and not np.isnan(f2[i]):
                ghdop[e] = f2[i]
            if np.isnan(vdop[e]) and not np.isnan(f3[i]):
                vdop[e] = f3[i]
            continue
        if date[i] >= 0:  # RMC or ZDA with a date
            if own[e] < 0:
                own[e] = date[i]
            elif own[e] != date[i]:
                conflict[e] = True
        if k == K_ZDA:
            continue
        has_pos[e] = True
        if k in (K_RMC, K_GLL) and i1[i] == 0:
            void[e] = True
        gga_first = k == K_GGA and (qual[e] < 0 or kind[qual[e]] != K_GGA)
        if gga_first or (k == K_GNS and qual[e] < 0):
            qual[e] = i  # the quality of the GGA, else of the GNS
        r = 0 if k == K_GGA else (1 if k == K_GNS else (2 if k == K_RMC else 3))
        if not np.isnan(lat[i]):
            an = anchor[e]
            if an < 0:
                anchor[e] = i
            else:  # one unit of the last digit of the coarser field, in degrees
                tol = 10.0 ** (-min(res[an], res[i])) / 60.0 + 1e-12
                if abs(lat[i] - lat[an]) > tol or abs(lon[i] - lon[an]) > tol:
                    conflict[e] = True
            if r < rank[e]:
                rank[e] = r
                pos[e] = i
        elif pos[e] < 0:
            pos[e] = i  # no coordinates (a void GGA): kept unless a sentence has some
    # 3. dates, in epoch order
    src_date = carry[0]
    src_tod = carry[1]
    track_tod = carry[2]
    track_day = carry[3]
    date0 = carry[4]
    day = np.full(ne, -1, np.int64)
    for e in range(ne):
        t = etod[e]
        if track_tod >= 0 and t - track_tod < -HALF_DAY:
            track_day += 1
        track_tod = t
        if own[e] >= 0:
            day[e] = own[e]
        elif src_date >= 0:
            delta = src_tod - t
            day[e] = src_date + (1 if delta > HALF_DAY else 0) - (1 if delta < -HALF_DAY else 0)
        elif date0 >= 0:
            day[e] = date0 + track_day
        if own[e] >= 0 and not conflict[e]:
            src_date = own[e]
            src_tod = t
    carry[0] = src_date
    carry[1] = src_tod
    carry[2] = track_tod
    carry[3] = track_day
    # 4. rejected lines, and which epochs give a fix
    keep = has_pos & (day >= 0) & ~conflict
    for i in range(a, b):
        e = ep_of[i - a]
        if e < 0:
            continue
        k = kind[i]
        if k == K_GSA:
            continue
        if conflict[e]:
            status[i] = ST_CONFLICT
        elif day[e] < 0 and k != K_ZDA:
            status[i] = ST_NODATE
    return pos, qual, day, etod, void, ftype, pdop, vdop, ghdop, keep
