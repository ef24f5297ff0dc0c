"""Compiled readers of single NMEA 0183 fields (numbers, angles, times, dates, hex digits).

Every reader takes the bytes of a sentence and a half-open range ``[a, b)`` and returns the
value with a code: 0 read, 1 empty field, 2 not readable, 3 out of its possible range.
They are small enough for numba to inline them into the sentence walk of
:mod:`archive.ingest.nmea_scan`. Field layouts: NMEA 0183 as described in E. S. Raymond,
"NMEA Revealed" (gpsd project), sections "Encoding conventions", GGA, GNS, RMC, GLL, GSA, ZDA.
"""

from __future__ import annotations

import numpy as np
from numba import carray, njit
from numba.core import cgutils, types
from numba.extending import intrinsic

from archive.ingest.ascii import DOT, MINUS, PLUS, SPACE, A, D, E, F, M, N, P, R, S

# exact: every 10^k, k <= 22, is a double, so a decimal with up to 18 digits is scaled
# by one correctly rounded division
POW10 = np.array([10.0 ** k for k in range(19)])


@intrinsic
def _pointer(typingctx, address):  # pragma: no cover - compiled
    """The integer ``address`` as a ``void *``."""
    def codegen(context, builder, signature, args):
        return builder.inttoptr(args[0], cgutils.voidptr_t)
    return types.voidptr(address), codegen


@njit(cache=True, nogil=True, inline="always")
def borrowed(data):  # pragma: no cover - compiled
    """A view of the byte array ``data`` that owns no reference to its memory.

    Every array handed to a compiled function costs two atomic reference count updates
    (about 10 ns) per call; the field readers below are called a dozen times per sentence,
    which made that cost larger than the reading itself. The view carries no reference,
    so passing it is free; it is only used while ``data`` itself is held by the caller.
    """
    return carray(_pointer(data.ctypes.data), data.shape[0], np.uint8)


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def num(buf, a, b):  # pragma: no cover - compiled
    """(value, code) of a decimal number with optional sign; spaces around it are allowed."""
    v, code, _ = number(buf, a, b)
    return v, code


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def number(buf, a, b):  # pragma: no cover - compiled
    """(value, code, digits after the decimal point) of a decimal number (see :func:`num`)."""
    while a < b and buf[a] == SPACE:
        a += 1
    while b > a and buf[b - 1] == SPACE:
        b -= 1
    if a >= b:
        return np.nan, 1, 0
    neg = False
    if buf[a] == MINUS or buf[a] == PLUS:
        neg = buf[a] == MINUS
        a += 1
    mant = 0
    frac = 0
    ndig = 0
    dot = False
    for j in range(a, b):
        c = buf[j]
        if 48 <= c <= 57:
            if ndig >= 18:
                return np.nan, 2, 0
            mant = mant * 10 + (c - 48)
            ndig += 1
            if dot:
                frac += 1
        elif c == DOT and not dot:
            dot = True
        else:
            return np.nan, 2, 0
    if ndig == 0:
        return np.nan, 2, 0
    v = mant / POW10[frac]
    return (-v if neg else v), 0, frac


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def angle(buf, a, b, hemi_a, hemi_b, pos, negc, maxdeg):  # pragma: no cover - compiled
    """(degrees, code, digits after the decimal point of the minutes) of ``d..dmm.mmm`` and
    its hemisphere field (``pos``/``negc`` letters).

    The two digits left of the decimal point are whole minutes, the digits before them
    degrees ("NMEA Revealed", encoding conventions). West and south are negative.
    """
    v, code, frac = number(buf, a, b)
    hemi = buf[hemi_a] if hemi_b - hemi_a == 1 else 0
    if code == 1:
        return np.nan, (1 if hemi_b == hemi_a else 2), 0
    if code == 2 or v < 0:
        return np.nan, 2, 0
    if hemi != pos and hemi != negc:
        return np.nan, 2, 0
    deg = np.floor(v / 100.0)
    minutes = v - deg * 100.0
    if minutes >= 60.0 or deg > maxdeg:
        return np.nan, 3, 0
    d = deg + minutes / 60.0
    if d > maxdeg:
        return np.nan, 3, 0
    return (-d if hemi == negc else d), 0, frac


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def time_of_day(buf, a, b):  # pragma: no cover - compiled
    """(microseconds of day, code) of ``hhmmss[.s...]``; a leap second (60) is allowed."""
    if a >= b:
        return -1, 1
    if b - a < 6:
        return -1, 2
    for j in range(a, a + 6):
        if not (48 <= buf[j] <= 57):
            return -1, 2
    hh = (buf[a] - 48) * 10 + buf[a + 1] - 48
    mm = (buf[a + 2] - 48) * 10 + buf[a + 3] - 48
    ss = (buf[a + 4] - 48) * 10 + buf[a + 5] - 48
    us = 0
    if b > a + 6:
        if buf[a + 6] != DOT:
            return -1, 2
        scale = 100000
        for j in range(a + 7, b):
            c = buf[j]
            if not (48 <= c <= 57):
                return -1, 2
            us += (c - 48) * scale
            scale //= 10
    if hh > 23 or mm > 59 or ss > 60:
        return -1, 3
    return ((hh * 60 + mm) * 60 + ss) * 1_000_000 + us, 0


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def days_from_civil(y, m, d):  # pragma: no cover - compiled
    """Days since 1970-01-01 of a valid civil date (H. Hinnant's days_from_civil)."""
    if m <= 2:
        y -= 1
    era = (y if y >= 0 else y - 399) // 400
    yoe = y - era * 400
    mp = m - 3 if m > 2 else m + 9
    doy = (153 * mp + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def civil_date(y, m, d):  # pragma: no cover - compiled
    """(days since 1970-01-01, code 0 read / 3 no such date)."""
    if m < 1 or m > 12 or d < 1:
        return -1, 3
    dim = 31
    if m == 4 or m == 6 or m == 9 or m == 11:
        dim = 30
    elif m == 2:
        leap = (y % 4 == 0 and y % 100 != 0) or y % 400 == 0
        dim = 29 if leap else 28
    if d > dim:
        return -1, 3
    return days_from_civil(y, m, d), 0


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def ddmmyy(buf, a, b):  # pragma: no cover - compiled
    """(days since 1970-01-01, code) of an RMC date ``ddmmyy``; years 80-99 are 19yy,
    00-79 are 20yy (common practice for two-digit GPS years, no source)."""
    if a == b:
        return -1, 1
    if b - a != 6:
        return -1, 2
    for j in range(a, b):
        if not (48 <= buf[j] <= 57):
            return -1, 2
    dd = (buf[a] - 48) * 10 + buf[a + 1] - 48
    mo = (buf[a + 2] - 48) * 10 + buf[a + 3] - 48
    yy = (buf[a + 4] - 48) * 10 + buf[a + 5] - 48
    yy += 2000 if yy < 80 else 1900
    return civil_date(yy, mo, dd)


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def whole(buf, a, b):  # pragma: no cover - compiled
    """(integer, code) of a field holding a whole number."""
    v, code = num(buf, a, b)
    if code == 0 and v != np.floor(v):
        return -1, 2
    return (int(v) if code == 0 else -1), code


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def hexval(c):  # pragma: no cover - compiled
    """Value of one hex digit, upper or lower case; -1 for any other byte."""
    if 48 <= c <= 57:
        return c - 48
    if 65 <= c <= 70:
        return c - 55
    if 97 <= c <= 102:
        return c - 87
    return -1


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def mode_quality(buf, a, b):  # pragma: no cover - compiled
    """(GGA-style quality 0-8, code) of a GNS mode field, one letter per constellation.

    Mode letters ("NMEA Revealed", GNS): N no fix, A autonomous, D differential, P precise,
    R RTK fixed, F RTK float, E estimated, M manual, S simulator. The quality of the
    combined solution is that of the strongest letter, ranked R > F > P > D > A > E > M > S
    > N (common practice, no source), and given with the GGA code of the same mode.
    """
    if a == b:
        return -1, 1
    best = -1
    quality = 0
    for j in range(a, b):
        c = buf[j]
        rank = -1
        q = 0
        if c == R:
            rank, q = 8, 4
        elif c == F:
            rank, q = 7, 5
        elif c == P:
            rank, q = 6, 3
        elif c == D:
            rank, q = 5, 2
        elif c == A:
            rank, q = 4, 1
        elif c == E:
            rank, q = 3, 6
        elif c == M:
            rank, q = 2, 7
        elif c == S:
            rank, q = 1, 8
        elif c == N:
            rank, q = 0, 0
        else:
            return -1, 2
        if rank > best:
            best, quality = rank, q
    return quality, 0
