"""The compiled single-pass scanner under the NMEA reader.

Two kernels, compiled once with numba and cached on disk:

- :func:`split_lines` finds the records of a buffer between line ends (CR, LF or CR LF);
  the delimited reader uses it.
- :func:`scan_buffer` walks the bytes of an NMEA buffer once: while it looks for each line
  end it finds the sentence start (the last ``$``, so a logger's prefix is skipped), notes
  non-text bytes and XORs the sentence body for the ``*hh`` checksum; then it checks the
  checksum, splits the fields and converts the ones GGA, RMC, GSA and ZDA carry into
  numeric columns, one row per line, with a status per line.

Everything about epochs (dates, DOPs, validity) is then done on whole arrays in
:mod:`archive.ingest.nmea`. Status codes are the ``ST_*`` constants; kinds the ``K_*``.
"""

from __future__ import annotations

import numpy as np
from numba import njit

ST_ACCEPTED, ST_IGNORED = 0, 1
ST_CHECKSUM, ST_TRUNCATED, ST_MALFORMED, ST_BINARY, ST_NODATE, ST_RANGE = 2, 3, 4, 5, 6, 7
STATUS_REASON = {ST_CHECKSUM: "checksum", ST_TRUNCATED: "truncated", ST_MALFORMED: "malformed",
                 ST_BINARY: "binary", ST_NODATE: "no-date", ST_RANGE: "out-of-range"}
K_OTHER, K_GGA, K_RMC, K_GSA, K_ZDA = 0, 1, 2, 3, 4
MAX_FIELDS = 40
_POW10 = np.array([10.0 ** k for k in range(19)])  # exact: every 10^k, k <= 22, is a double


@njit(cache=True, nogil=True)
def split_lines(buf, final):  # pragma: no cover - compiled
    """(starts, ends, n_complete): records between CR / LF / CR LF line ends.

    When ``final`` is false, a record without a line end at the end of the buffer (and one
    ending in a CR that is the buffer's last byte, which could be half a CR LF) is left out
    of ``n_complete`` so the caller can carry it into the next buffer.
    """
    n = buf.shape[0]
    count = 1
    for i in range(n):
        c = buf[i]
        if c == 10 or (c == 13 and not (i + 1 < n and buf[i + 1] == 10)):
            count += 1
    starts = np.empty(count, np.int64)
    ends = np.empty(count, np.int64)
    k = 0
    s = 0
    i = 0
    while i < n:
        c = buf[i]
        if c == 10 or c == 13:
            starts[k] = s
            ends[k] = i
            k += 1
            if c == 13 and i + 1 < n and buf[i + 1] == 10:
                i += 1
            s = i + 1
        i += 1
    complete = k
    if s < n:  # a last record without a line end
        starts[k] = s
        ends[k] = n
        k += 1
        if final:
            complete = k
    elif not final and k > 0 and buf[n - 1] == 13:
        complete = k - 1
    return starts[:k], ends[:k], complete


@njit(cache=True, nogil=True)
def _num(buf, a, b):  # pragma: no cover - compiled
    """(value, code): code 0 number, 1 empty, 2 not a number. Exact decimal rounding."""
    while a < b and buf[a] == 32:
        a += 1
    while b > a and buf[b - 1] == 32:
        b -= 1
    if a >= b:
        return np.nan, 1
    neg = False
    if buf[a] == 45 or buf[a] == 43:
        neg = buf[a] == 45
        a += 1
    mant = 0
    frac = 0
    ndig = 0
    dot = False
    for j in range(a, b):
        c = buf[j]
        if 48 <= c <= 57:
            if ndig >= 18:
                return np.nan, 2
            mant = mant * 10 + (c - 48)
            ndig += 1
            if dot:
                frac += 1
        elif c == 46 and not dot:
            dot = True
        else:
            return np.nan, 2
    if ndig == 0:
        return np.nan, 2
    v = mant / _POW10[frac]
    return (-v if neg else v), 0


@njit(cache=True, nogil=True)
def _angle(buf, a, b, hemi_a, hemi_b, pos, negc, maxdeg):  # pragma: no cover - compiled
    """(degrees, code) of ``d..dmm.mmm`` + hemisphere; code 0 ok, 1 empty, 2 bad, 3 range."""
    v, code = _num(buf, a, b)
    hemi = buf[hemi_a] if hemi_b - hemi_a == 1 else 0
    if code == 1:
        return np.nan, (1 if hemi_b == hemi_a else 2)
    if code == 2 or v < 0:
        return np.nan, 2
    if hemi != pos and hemi != negc:
        return np.nan, 2
    deg = np.floor(v / 100.0)
    minutes = v - deg * 100.0
    if minutes >= 60.0 or deg > maxdeg:
        return np.nan, 3
    d = deg + minutes / 60.0
    if d > maxdeg:
        return np.nan, 3
    return (-d if hemi == negc else d), 0


@njit(cache=True, nogil=True)
def _tod(buf, a, b):  # pragma: no cover - compiled
    """(microseconds of day, code) of ``hhmmss[.s...]``; code 0 ok, 1 empty, 2 bad, 3 range."""
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
        if buf[a + 6] != 46:
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


@njit(cache=True, nogil=True)
def _days(y, m, d):  # pragma: no cover - compiled
    """Days since 1970-01-01 of a valid civil date (H. Hinnant's days_from_civil)."""
    if m <= 2:
        y -= 1
    era = (y if y >= 0 else y - 399) // 400
    yoe = y - era * 400
    mp = m - 3 if m > 2 else m + 9
    doy = (153 * mp + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


@njit(cache=True, nogil=True)
def _date(y, m, d):  # pragma: no cover - compiled
    """(days since epoch, code 0 ok / 3 out of range)."""
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
    return _days(y, m, d), 0


@njit(cache=True, nogil=True)
def _int_field(buf, a, b):  # pragma: no cover - compiled
    v, code = _num(buf, a, b)
    if code == 0 and v != np.floor(v):
        return -1, 2
    return (int(v) if code == 0 else -1), code


@njit(cache=True, nogil=True)
def _hexval(c):  # pragma: no cover - compiled
    if 48 <= c <= 57:
        return c - 48
    if 65 <= c <= 70:
        return c - 55
    if 97 <= c <= 102:
        return c - 87
    return -1


@njit(cache=True, nogil=True)
def _max_records(buf):  # pragma: no cover - compiled
    """An upper bound of the records of ``buf``: its line ends (CR LF counted once) + 1."""
    n = buf.shape[0]
    count = 1
    for i in range(n - 1):
        c = buf[i]
        count += (c == 10) | ((c == 13) & (buf[i + 1] != 10))
    if n > 0:
        c = buf[n - 1]
        count += (c == 10) | (c == 13)
    return count


@njit(cache=True, nogil=True)
def scan_buffer(buf, final):  # pragma: no cover - compiled
    """Split ``buf`` into records and read each one, walking the bytes once.

    Returns ``(starts, ends, status, kind, star, tod, lat, lon, f1, f2, f3, i1, i2, date)``,
    one row per complete record. Records are split as :func:`split_lines` does; when
    ``final`` is false, a record without a line end at the end of the buffer (or one ending
    in a CR that is the buffer's last byte, which could be half a CR LF) is left out so the
    caller can carry it into the next buffer.

    While looking for the line end, the walk notes the sentence start (the last ``$``, so a
    logger's prefix is skipped), non-text bytes after it, the first ``*`` after it and the
    XOR of the bytes in between. Then the ``*hh`` checksum is checked and the fields of GGA,
    RMC, GSA and ZDA are converted: for GGA f1..f3 = altitude, separation, HDOP, i1 =
    quality, i2 = satellites; for GSA f1..f3 = PDOP, HDOP, VDOP, i1 = fix type; for RMC
    i1 = 1 status A / 0 void and date = days since 1970; for ZDA date too. Missing numbers
    are NaN / -1.
    """
    n = buf.shape[0]
    cap = _max_records(buf)
    starts = np.empty(cap, np.int64)
    ends = np.empty(cap, np.int64)
    status = np.full(cap, ST_IGNORED, np.int8)
    kind = np.zeros(cap, np.int8)
    star = np.zeros(cap, np.bool_)
    tod = np.full(cap, -1, np.int64)
    lat = np.full(cap, np.nan)
    lon = np.full(cap, np.nan)
    f1 = np.full(cap, np.nan)
    f2 = np.full(cap, np.nan)
    f3 = np.full(cap, np.nan)
    i1 = np.full(cap, -1, np.int16)
    i2 = np.full(cap, -1, np.int16)
    date = np.full(cap, -1, np.int32)
    fs = np.empty(MAX_FIELDS + 1, np.int64)
    fe = np.empty(MAX_FIELDS + 1, np.int64)
    cm = np.empty(MAX_FIELDS + 1, np.int64)
    nrec = 0
    pos = 0
    while pos < n:
        s = pos
        d = -1
        p = -1
        x = 0
        binary = False
        body = False  # between the '$' and the '*'
        nc = 0  # commas of the body, noted in cm
        c = 0
        while pos < n:
            c = buf[pos]
            if c == 36:  # a sentence starts (again): what came before is a prefix
                d = pos
                p = -1
                x = 0
                nc = 0
                binary = False
                body = True
            elif c < 32 or c > 126:
                if c == 10 or c == 13:
                    break
                if c != 9:
                    binary = True
                elif body:
                    x ^= c
            pos += 1
            if body:  # XOR the printable run of the body, up to '*'
                while pos < n:
                    c = buf[pos]
                    if c == 42 or c == 36 or c < 32 or c > 126:
                        break
                    if c == 44:
                        if nc <= MAX_FIELDS:
                            cm[nc] = pos
                        nc += 1
                    x ^= c
                    pos += 1
                if pos < n and c == 42:
                    p = pos
                    body = False
                    pos += 1
        e = pos
        if pos < n:  # a line end: CR LF, CR or LF
            if c == 13 and pos + 1 < n and buf[pos + 1] == 10:
                pos += 1
            elif c == 13 and pos + 1 == n and not final:
                break  # could be half a CR LF: carried
            pos += 1
        elif not final:
            break  # no line end yet: carried
        i = nrec
        nrec += 1
        starts[i] = s
        ends[i] = e
        while e > s and (buf[e - 1] == 32 or buf[e - 1] == 9):
            e -= 1
        if e == s:
            continue
        if binary:
            status[i] = ST_BINARY
            continue
        if d < 0:
            continue  # text that is not a sentence: ignored
        # address field: five upper-case letters / digits, then ',' (or '*')
        if e - d < 7:
            status[i] = ST_TRUNCATED
            continue
        plausible = True
        for j in range(d + 1, d + 6):
            c = buf[j]
            if not ((65 <= c <= 90) or (48 <= c <= 57)):
                plausible = False
        proprietary = buf[d + 1] == 80
        if not proprietary and (not plausible or buf[d + 6] != 44):
            status[i] = ST_MALFORMED
            continue
        body_end = e
        if p >= 0:
            star[i] = True
            body_end = p
            if e - p - 1 < 2:
                status[i] = ST_TRUNCATED
                continue
            hi = _hexval(buf[p + 1])
            lo2 = _hexval(buf[p + 2])
            if hi < 0 or lo2 < 0 or e - p - 1 > 2:
                status[i] = ST_MALFORMED
                continue
            if x != hi * 16 + lo2:
                status[i] = ST_CHECKSUM
                continue
        if proprietary:
            continue
        t0, t1, t2 = buf[d + 3], buf[d + 4], buf[d + 5]
        k = K_OTHER
        if t0 == 71 and t1 == 71 and t2 == 65:
            k = K_GGA
        elif t0 == 82 and t1 == 77 and t2 == 67:
            k = K_RMC
        elif t0 == 71 and t1 == 83 and t2 == 65:
            k = K_GSA
        elif t0 == 90 and t1 == 68 and t2 == 65:
            k = K_ZDA
        if k == K_OTHER:
            continue
        kind[i] = k
        # fields after the address
        # (the walk noted the commas of the body; the first one ends the address)
        nf = nc
        for j in range(min(nf, MAX_FIELDS)):
            fs[j] = cm[j] + 1
            fe[j] = cm[j + 1] if j + 1 < nf else body_end
        need = 14 if k == K_GGA else (11 if k == K_RMC else (17 if k == K_GSA else 4))
        if nf < need:
            status[i] = ST_TRUNCATED
            continue
        st = ST_ACCEPTED
        t, ct = _tod(buf, fs[0], fe[0])
        if k == K_GSA:
            ft, c1 = _int_field(buf, fs[1], fe[1])
            pd, c2 = _num(buf, fs[14], fe[14])
            hd, c3 = _num(buf, fs[15], fe[15])
            vd, c4 = _num(buf, fs[16], fe[16])
            if c1 == 2 or c2 == 2 or c3 == 2 or c4 == 2:
                st = ST_MALFORMED
            elif (c1 == 0 and (ft < 1 or ft > 3)) or pd < 0 or hd < 0 or vd < 0:
                st = ST_RANGE
            else:
                i1[i] = ft
                f1[i] = pd
                f2[i] = hd
                f3[i] = vd
            status[i] = st
            continue
        if ct == 2:
            status[i] = ST_MALFORMED
            continue
        if ct == 3:
            status[i] = ST_RANGE
            continue
        if k == K_ZDA:
            dd, c1 = _int_field(buf, fs[1], fe[1])
            mo, c2 = _int_field(buf, fs[2], fe[2])
            yy, c3 = _int_field(buf, fs[3], fe[3])
            if c1 == 1 and c2 == 1 and c3 == 1:
                st = ST_IGNORED  # a receiver that does not know the date yet
            elif c1 != 0 or c2 != 0 or c3 != 0:
                st = ST_MALFORMED
            else:
                dv, cd = _date(yy, mo, dd)
                if cd != 0 or yy < 1980 or yy > 2200 or t < 0:
                    st = ST_RANGE
                else:
                    date[i] = dv
                    tod[i] = t
            status[i] = st
            continue
        if k == K_GGA:
            la, c1 = _angle(buf, fs[1], fe[1], fs[2], fe[2], 78, 83, 90.0)
            lg, c2 = _angle(buf, fs[3], fe[3], fs[4], fe[4], 69, 87, 180.0)
            q, c3 = _int_field(buf, fs[5], fe[5])
            ns, c4 = _int_field(buf, fs[6], fe[6])
            hd, c5 = _num(buf, fs[7], fe[7])
            alt, c6 = _num(buf, fs[8], fe[8])
            sep, c7 = _num(buf, fs[10], fe[10])
            if t < 0 and c1 == 1 and c2 == 1:
                status[i] = ST_IGNORED  # no time and no position: nothing was said
                continue
            if t < 0 or c1 == 2 or c2 == 2 or c3 != 0 or c4 == 2 or c5 == 2 or c6 == 2 \
                    or c7 == 2 or (c1 == 1) != (c2 == 1):
                st = ST_MALFORMED
            elif c1 == 3 or c2 == 3 or q < 0 or q > 8 or ns > 999 or hd < 0:
                st = ST_RANGE
            else:
                tod[i] = t
                lat[i] = la
                lon[i] = lg
                f1[i] = alt
                f2[i] = sep
                f3[i] = hd
                i1[i] = q
                i2[i] = ns
            status[i] = st
            continue
        # RMC
        sa = fs[1]
        stv = buf[sa] if fe[1] - sa == 1 else 0
        la, c1 = _angle(buf, fs[2], fe[2], fs[3], fe[3], 78, 83, 90.0)
        lg, c2 = _angle(buf, fs[4], fe[4], fs[5], fe[5], 69, 87, 180.0)
        dv = -1
        cd = 1
        if fe[8] - fs[8] == 6:
            ok = True
            for j in range(fs[8], fe[8]):
                if not (48 <= buf[j] <= 57):
                    ok = False
            if ok:
                b8 = fs[8]
                dd = (buf[b8] - 48) * 10 + buf[b8 + 1] - 48
                mo = (buf[b8 + 2] - 48) * 10 + buf[b8 + 3] - 48
                yy = (buf[b8 + 4] - 48) * 10 + buf[b8 + 5] - 48
                yy += 2000 if yy < 80 else 1900
                dv, cd = _date(yy, mo, dd)
            else:
                cd = 2
        elif fe[8] > fs[8]:
            cd = 2
        if t < 0 and c1 == 1 and c2 == 1:
            status[i] = ST_IGNORED
            continue
        if (stv != 65 and stv != 86) or t < 0 or c1 == 2 or c2 == 2 or cd == 2 \
                or (c1 == 1) != (c2 == 1):
            st = ST_MALFORMED
        elif c1 == 3 or c2 == 3 or cd == 3:
            st = ST_RANGE
        else:
            mode = buf[fs[11]] if nf > 11 and fe[11] - fs[11] == 1 else 0
            tod[i] = t
            lat[i] = la
            lon[i] = lg
            i1[i] = 1 if (stv == 65 and mode != 78) else 0
            date[i] = dv
        status[i] = st
    m = nrec
    return (starts[:m], ends[:m], status[:m], kind[:m], star[:m], tod[:m], lat[:m], lon[:m],
            f1[:m], f2[:m], f3[:m], i1[:m], i2[:m], date[:m])
