"""The compiled single-pass scanner under the NMEA reader.

:func:`scan_buffer` walks the bytes of an NMEA buffer once. While it looks for each line end
it finds where sentences start (``$``; text before the first one of a line is a logger's
prefix), notes non-text bytes and XORs each sentence body for its ``*hh`` checksum, noting
the field commas on the way. A line holding several sentences (a lost line end joined
them) gives one record per sentence; a sentence broken over two lines by a stray line end
is read as one when the second line completes its checksum. Each record is then checked and
the fields of GGA, GNS, RMC, GLL, GSA and ZDA converted into numeric columns, one row per
record, with a status per record. Everything about epochs is done by
:mod:`archive.ingest.nmea_epochs`; :func:`split_lines` (records between line ends) serves
the delimited reader.

The result is two matrices, ``iv`` (int64, rows ``S_*``) and ``fv`` (float64, rows ``F_*``),
one column per record. Status codes are the ``ST_*`` constants; kinds the ``K_*``. The row
``S_ADDR`` packs the type of an ignored sentence (``A_TEXT``/``A_BLANK`` for lines that are
not sentences) so that ignored sentences can be counted per type.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from archive.ingest.ascii import (
    COMMA,
    CR,
    DOLLAR,
    LF,
    SPACE,
    STAR,
    TAB,
    A,
    C,
    D,
    G,
    L,
    M,
    N,
    P,
    R,
    S,
    V,
    Z,
)
from archive.ingest.nmea_fields import (
    angle,
    borrowed,
    civil_date,
    ddmmyy,
    hexval,
    mode_quality,
    num,
    time_of_day,
    whole,
)

ST_ACCEPTED, ST_IGNORED = 0, 1
ST_CHECKSUM, ST_TRUNCATED, ST_MALFORMED, ST_BINARY, ST_NODATE, ST_RANGE = 2, 3, 4, 5, 6, 7
ST_CONFLICT, ST_ROLLOVER = 8, 9
ST_SPLIT = 99  # within the scanner only: a sentence broken over two lines, read after
STATUS_REASON = {ST_CHECKSUM: "checksum", ST_TRUNCATED: "truncated", ST_MALFORMED: "malformed",
                 ST_BINARY: "binary", ST_NODATE: "no-date", ST_RANGE: "out-of-range",
                 ST_CONFLICT: "conflict", ST_ROLLOVER: "rollover"}
K_OTHER, K_GGA, K_RMC, K_GSA, K_ZDA, K_GNS, K_GLL = 0, 1, 2, 3, 4, 5, 6
KIND_NAME = {K_GGA: "GGA", K_RMC: "RMC", K_GSA: "GSA", K_ZDA: "ZDA", K_GNS: "GNS", K_GLL: "GLL"}
A_TEXT, A_BLANK = 1, 2  # S_ADDR of a line that is not a sentence / a blank line

# rows of the int32 matrix (the time of day, in microseconds, is an int64 array of its own)
(S_START, S_END, S_LINE, S_STATUS, S_KIND, S_STAR, S_I1, S_I2, S_DATE, S_RES,
 S_ADDR) = range(11)
N_INT = 11
BLOCK = 4096  # records whose default values are set at a time
# rows of the float64 matrix: position, then f1..f3 (GGA/GNS: altitude, separation, HDOP;
# GSA: PDOP, HDOP, VDOP)
F_LAT, F_LON, F_1, F_2, F_3 = range(5)
N_FLOAT = 5
MAX_FIELDS = 40


@njit(cache=True, nogil=True, error_model="numpy")
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


@njit(cache=True, nogil=True, error_model="numpy")
def _max_records(buf):  # pragma: no cover - compiled
    """An upper bound of the records of ``buf``: one per line end (CR LF counted once), one
    per '$' not right after a line end (the start of a joined sentence, or of a sentence
    after a prefix), plus one. Used only when a buffer holds more records than the
    usual capacity (lines of 32 bytes on average)."""
    n = buf.shape[0]
    count = 1
    for i in range(1, n - 1):
        c = buf[i]
        b = buf[i - 1]
        count += (c == 10) | ((c == 13) & (buf[i + 1] != 10)) | \
            ((c == DOLLAR) & (b != LF) & (b != CR))
    if n > 0:
        count += 2
    return count


@njit(cache=True, nogil=True, error_model="numpy")
def _continuation(buf, pos, final):  # pragma: no cover - compiled
    """Look at the line starting at ``pos`` as the end of a sentence broken by a stray line
    end: (star, end, next, x) with ``star`` the index of its '*' followed by two hex digits
    and only spaces to the line end, ``end`` the line's end, ``next`` the start of the line
    after it and ``x`` the XOR of the bytes before the '*'. ``star`` is -1 when the line
    cannot be one (a '$', non-text bytes, no checksum) and -2 when the buffer ends first."""
    n = buf.shape[0]
    x = 0
    star = -1
    j = pos
    while j < n:
        c = buf[j]
        if c == 10 or c == 13:
            break
        if c == DOLLAR or c < SPACE or c > 126:
            return -1, j, j, 0
        if c == STAR and star < 0:
            star = j
        elif star < 0:
            x ^= c
        j += 1
    if j >= n and not final:
        return -2, j, j, 0
    if j < n and buf[j] == 13 and j + 1 >= n and not final:
        return -2, j, j, 0
    end = j
    nxt = j
    if j < n:
        nxt = j + 2 if (buf[j] == 13 and j + 1 < n and buf[j + 1] == 10) else j + 1
    e = end
    while e > pos and (buf[e - 1] == SPACE or buf[e - 1] == TAB):
        e -= 1
    if star < 0 or e - star != 3 or hexval(buf[star + 1]) < 0 or hexval(buf[star + 2]) < 0:
        return -1, end, nxt, 0
    return star, end, nxt, x


@njit(cache=True, nogil=True, error_model="numpy")
def _defaults(iv, tod, fv, a, b):  # pragma: no cover - compiled
    """Set the default values of records ``a`` to ``b - 1``; returns ``b - 1``, the first
    record left without (one spare record is kept for a sentence broken over two lines)."""
    for r in range(N_FLOAT):
        fv[r, a:b] = np.nan
    tod[a:b] = -1
    iv[S_STATUS, a:b] = ST_IGNORED
    iv[S_KIND, a:b] = K_OTHER
    iv[S_STAR, a:b] = 0
    iv[S_I1, a:b] = -1
    iv[S_I2, a:b] = -1
    iv[S_DATE, a:b] = -1
    iv[S_RES, a:b] = 0
    iv[S_ADDR, a:b] = 0
    return b - 1


def record_arrays(buf: np.ndarray, arrays: tuple | None = None, first: int = 0) -> tuple:
    """Arrays ``(iv, tod, fv)`` with room for ``first`` records and those of ``buf``:
    ``arrays`` when given and large enough for lines of 32 bytes on average (they are
    reused from buffer to buffer, so their memory is touched once), else new ones."""
    need = first + buf.shape[0] // 32 + 64
    if arrays is not None and arrays[1].shape[0] >= need:
        return arrays
    return (np.empty((N_INT, need), np.int32), np.empty(need, np.int64),
            np.empty((N_FLOAT, need), np.float64))


def _exact_record_arrays(buf: np.ndarray, first: int) -> tuple:
    """Arrays sized for the records ``buf`` can hold at most (logs of very short lines)."""
    need = first + int(_max_records(buf)) + 8
    return (np.empty((N_INT, need), np.int32), np.empty(need, np.int64),
            np.empty((N_FLOAT, need), np.float64))


def _read_split(buf: np.ndarray, arrays: tuple, a: int, b: int, checksummed: bool) -> None:
    """Read the sentences the scan found broken over two lines (status ``ST_SPLIT``): each
    first part (its '$' noted in ``S_ADDR``) is put together with the line completing it
    (the next record) and read as one sentence; the second line takes the same status."""
    iv, tod, fv = arrays
    for i in a + np.flatnonzero(iv[S_STATUS, a:b] == ST_SPLIT)[::2]:
        d = int(iv[S_ADDR, i]) - 16
        e = int(iv[S_END, i])
        b0, b1 = int(iv[S_START, i + 1]), int(iv[S_END, i + 1])
        text = buf[d:e].tobytes() + buf[b0:b1].tobytes().rstrip(b" \t") + b"\n"
        one = record_arrays(np.frombuffer(text, np.uint8))
        n1, _, _ = scan_buffer(np.frombuffer(text, np.uint8), True, checksummed, *one, 0)
        assert n1 == 1, "a sentence put together is one record"
        keep = iv[S_START, i], iv[S_END, i], iv[S_LINE, i]
        iv[:, i] = one[0][:, 0]
        tod[i] = one[1][0]
        fv[:, i] = one[2][:, 0]
        iv[S_START, i], iv[S_END, i], iv[S_LINE, i] = keep
        if iv[S_ADDR, i] >= 16:
            iv[S_ADDR, i] = d + 16
        iv[S_STATUS, i + 1] = iv[S_STATUS, i]
        iv[S_ADDR, i + 1] = 0


def scan(buf: np.ndarray, final: bool, checksummed: bool, arrays: tuple | None = None,
         first: int = 0):
    """Read the records of ``buf`` (see :func:`scan_buffer`) into arrays that fit, from
    index ``first`` on (room before it is left for records carried from elsewhere).

    Returns ``(arrays, end, n_lines, consumed)``: the records are ``first .. end - 1``;
    pass ``arrays`` back in to reuse them for the next buffer.
    """
    arrays = record_arrays(buf, arrays, first)
    end, nline, consumed = scan_buffer(buf, final, checksummed, *arrays, first)
    if end < 0:
        arrays = _exact_record_arrays(buf, first)
        end, nline, consumed = scan_buffer(buf, final, checksummed, *arrays, first)
    if end > first and (arrays[0][S_STATUS, first:end] == ST_SPLIT).any():
        _read_split(buf, arrays, first, end, checksummed)
    return arrays, end, nline, consumed


@njit(cache=True, nogil=True, error_model="numpy")
def scan_buffer(data, final, checksummed, iv, tod, fv, first):  # pragma: no cover - compiled
    """Split ``data`` into records and read each one into ``iv``, ``tod`` and ``fv``, from
    record index ``first`` on.

    Returns ``(end, n_lines, consumed)``: one past the last record written (records of
    complete lines only), the number of complete lines and the byte offset after the last
    of them; ``end`` is -1 when the arrays are too small (:func:`scan` then gives larger
    ones). When ``final``
    is false, a line without a line end at the end of the buffer (or one ending in a CR
    that is the buffer's last byte, which could be half a CR LF) is left for the caller to
    carry into the next buffer, and so is a line whose sentence could go on in the next
    line. ``checksummed`` says the log's sentences carry checksums: a known sentence
    without one is then counted as truncated. A sentence broken over two lines is marked
    ``ST_SPLIT`` (both records) and read by :func:`scan` afterwards.

    Everything is in this one function on purpose: helpers taking arrays would cost two
    atomic reference count updates per array and call, more than the reading itself; the
    field readers get a view of the bytes that holds no reference
    (:func:`archive.ingest.nmea_fields.borrowed`).
    """
    n = data.shape[0]
    buf = borrowed(data)
    cap = tod.shape[0] - 2
    filled = first
    cm = np.empty(MAX_FIELDS + 1, np.int64)
    fs = np.empty(MAX_FIELDS, np.int64)
    fe = np.empty(MAX_FIELDS, np.int64)
    nrec = first
    nline = 0
    pos = 0
    consumed = 0
    line_rec0 = first
    in_line = False  # the next record continues a line (after a joined sentence)
    while pos < n:
        if nrec >= filled:  # default values for the next block of records
            if nrec >= cap:
                return -1, 0, 0
            filled = _defaults(iv, tod, fv, nrec, min(nrec + BLOCK, cap + 2))
        if not in_line:
            line_rec0 = nrec
        s = pos
        d = -1
        p = -1
        x = 0
        binary = False
        body = False  # between the '$' and the '*'
        nc = 0  # commas of the body, noted in cm
        ended = False
        split = False
        c = 0
        while pos < n:
            c = buf[pos]
            if c == DOLLAR:  # a sentence starts: an open one ends here (a lost line end)
                if d >= 0:
                    split = True
                    break
                d = pos
                body = True
            elif c == 10 or c == 13:
                ended = True
                break
            elif c < 32 or c > 126:
                if c != 9:
                    binary = True
                elif body:
                    x ^= c
            pos += 1
            if body:  # XOR the printable run of the body, up to '*'
                while pos < n:
                    c = buf[pos]
                    if c == STAR or c == DOLLAR or c < SPACE or c > 126:  # noqa: SIM109 - numba
                        break
                    if c == COMMA:
                        if nc <= MAX_FIELDS:
                            cm[nc] = pos
                        nc += 1
                    x ^= c
                    pos += 1
                if pos < n and c == STAR:
                    p = pos
                    body = False
                    pos += 1
        e = pos
        if not split:
            if not ended:
                if not final:
                    nrec = line_rec0
                    break  # no line end yet: carried
            elif c == 13 and pos + 1 < n and buf[pos + 1] == 10:
                pos += 2
            elif c == 13 and pos + 1 == n and not final:
                nrec = line_rec0
                break  # could be half a CR LF: carried
            else:
                pos += 1
            if d >= 0 and p < 0 and not binary and e - d >= 7:
                if pos < n:
                    star, end2, nxt, x2 = _continuation(buf, pos, final)
                else:
                    star, end2, nxt, x2 = (-1 if final else -2), n, n, 0
                if star == -2:
                    nrec = line_rec0
                    break  # the next line may complete this sentence: carried
                if star >= 0 and (x ^ x2) == hexval(buf[star + 1]) * 16 + hexval(buf[star + 2]):
                    for r, a, b in ((nrec, s, e), (nrec + 1, pos, end2)):
                        iv[S_START, r] = a
                        iv[S_END, r] = b
                        iv[S_LINE, r] = nline + r - nrec
                        iv[S_STATUS, r] = ST_SPLIT
                    iv[S_ADDR, nrec] = d + 16
                    nrec += 2
                    nline += 2
                    pos = nxt
                    consumed = pos
                    in_line = False
                    continue
        # the record buf[s:e], its sentence (if any) starting at d
        i = nrec
        iv[S_START, i] = s
        iv[S_END, i] = e
        iv[S_LINE, i] = nline
        while e > s and (buf[e - 1] == SPACE or buf[e - 1] == TAB):
            e -= 1
        if p >= e:
            p = -1
        while True:  # one pass: 'break' ends the reading of this record
            if e == s:
                iv[S_ADDR, i] = A_BLANK
                break
            if binary:
                iv[S_STATUS, i] = ST_BINARY
                break
            if d < 0:
                iv[S_ADDR, i] = A_TEXT  # text that is not a sentence: ignored
                break
            if e - d < 7:
                iv[S_STATUS, i] = ST_TRUNCATED
                break
            plausible = True
            for j in range(d + 1, d + 6):
                c = buf[j]
                if not ((65 <= c <= 90) or (48 <= c <= 57)):
                    plausible = False
            proprietary = buf[d + 1] == P  # $P...: a maker's own sentence
            if not proprietary and (not plausible or buf[d + 6] != COMMA):
                iv[S_STATUS, i] = ST_MALFORMED
                break
            iv[S_ADDR, i] = d + 16  # where the address is, to count ignored types by
            body_end = e
            if p >= 0:
                iv[S_STAR, i] = 1
                body_end = p
                if e - p - 1 < 2:
                    iv[S_STATUS, i] = ST_TRUNCATED
                    break
                hi = hexval(buf[p + 1])
                lo = hexval(buf[p + 2])
                if hi < 0 or lo < 0 or e - p - 1 > 2:
                    iv[S_STATUS, i] = ST_MALFORMED
                    break
                if x != hi * 16 + lo:
                    iv[S_STATUS, i] = ST_CHECKSUM
                    break
            if proprietary:
                break  # ignored, counted by its address
            t0, t1, t2 = buf[d + 3], buf[d + 4], buf[d + 5]
            k = K_OTHER
            need = 0
            if t0 == G and t1 == G and t2 == A:  # GGA
                k, need = K_GGA, 11
            elif t0 == R and t1 == M and t2 == C:  # RMC
                k, need = K_RMC, 9
            elif t0 == G and t1 == S and t2 == A:  # GSA
                k, need = K_GSA, 17
            elif t0 == Z and t1 == D and t2 == A:  # ZDA
                k, need = K_ZDA, 4
            elif t0 == G and t1 == N and t2 == S:  # GNS
                k, need = K_GNS, 8
            elif t0 == G and t1 == L and t2 == L:  # GLL
                k, need = K_GLL, 6
            if k == K_OTHER:
                break
            nf = min(nc, MAX_FIELDS)
            for j in range(nf):
                fs[j] = cm[j] + 1
                fe[j] = cm[j + 1] if j + 1 < nf else body_end
            if k == K_GLL and nf == 4:
                break  # a GLL of NMEA 0183 before 2.0: no time, nothing to place
            iv[S_KIND, i] = k
            if nf < need:
                iv[S_STATUS, i] = ST_TRUNCATED
                break
            if k == K_GSA:
                ft, c1 = whole(buf, fs[1], fe[1])
                pd, c2 = num(buf, fs[14], fe[14])
                hd, c3 = num(buf, fs[15], fe[15])
                vd, c4 = num(buf, fs[16], fe[16])
                if c1 == 2 or c2 == 2 or c3 == 2 or c4 == 2:
                    iv[S_STATUS, i] = ST_MALFORMED
                elif (c1 == 0 and (ft < 1 or ft > 3)) or pd < 0 or hd < 0 or vd < 0:
                    iv[S_STATUS, i] = ST_RANGE
                else:
                    iv[S_STATUS, i] = ST_ACCEPTED
                    iv[S_I1, i] = ft
                    fv[F_1, i] = pd
                    fv[F_2, i] = hd
                    fv[F_3, i] = vd
                break
            if k == K_ZDA:
                t, ct = time_of_day(buf, fs[0], fe[0])
                if ct == 2 or ct == 3:
                    iv[S_STATUS, i] = ST_MALFORMED if ct == 2 else ST_RANGE
                    break
                dd, c1 = whole(buf, fs[1], fe[1])
                mo, c2 = whole(buf, fs[2], fe[2])
                yy, c3 = whole(buf, fs[3], fe[3])
                if c1 == 1 and c2 == 1 and c3 == 1:
                    break  # a receiver that does not know the date yet: ignored
                if c1 != 0 or c2 != 0 or c3 != 0:
                    iv[S_STATUS, i] = ST_MALFORMED
                    break
                dv, cd = civil_date(yy, mo, dd)
                if cd != 0 or yy < 1980 or yy > 2200 or t < 0:
                    iv[S_STATUS, i] = ST_RANGE
                    break
                iv[S_STATUS, i] = ST_ACCEPTED
                iv[S_DATE, i] = dv
                tod[i] = t
                break
            # the position sentences: where are time, latitude, longitude
            if k == K_GLL:
                ft, fla, flo = 4, 0, 2
            elif k == K_RMC:
                ft, fla, flo = 0, 2, 4
            else:
                ft, fla, flo = 0, 1, 3
            q, cq = -1, 1
            t, ct = time_of_day(buf, fs[ft], fe[ft])
            la, c1, rla = angle(buf, fs[fla], fe[fla], fs[fla + 1], fe[fla + 1], 78, 83, 90.0)
            lg, c2, rlo = angle(buf, fs[flo], fe[flo], fs[flo + 1], fe[flo + 1], 69, 87, 180.0)
            if k == K_GNS:
                q, cq = mode_quality(buf, fs[5], fe[5])
                if cq == 1 and c1 == 1 and c2 == 1:
                    break  # a per-constellation GNS without position or mode: ignored
            if t < 0 and ct == 1 and c1 == 1 and c2 == 1:
                break  # no time and no position (a receiver before its first fix): ignored
            if ct != 0:
                iv[S_STATUS, i] = ST_RANGE if ct == 3 else ST_MALFORMED
                break
            bad = c1 == 2 or c2 == 2 or (c1 == 1) != (c2 == 1)
            rng = c1 == 3 or c2 == 3
            if k in (K_GGA, K_GNS):
                if k == K_GGA:
                    q, cq = whole(buf, fs[5], fe[5])
                    fa, fsep = 8, 10
                else:
                    fa, fsep = 8, 9
                ns, c4 = whole(buf, fs[6], fe[6])
                hd, c5 = num(buf, fs[7], fe[7])
                alt, c6 = num(buf, fs[fa], fe[fa]) if nf > fa else (np.nan, 1)
                sep, c7 = num(buf, fs[fsep], fe[fsep]) if nf > fsep else (np.nan, 1)
                bad = bad or cq != 0 or c4 == 2 or c5 == 2 or c6 == 2 or c7 == 2
                rng = rng or q < 0 or q > 8 or ns > 999 or hd < 0
                if bad:
                    iv[S_STATUS, i] = ST_MALFORMED
                elif rng:
                    iv[S_STATUS, i] = ST_RANGE
                else:
                    iv[S_STATUS, i] = ST_ACCEPTED
                    iv[S_I1, i] = q
                    iv[S_I2, i] = ns
                    fv[F_1, i] = alt
                    fv[F_2, i] = sep
                    fv[F_3, i] = hd
            else:  # RMC, GLL: a status A/V, an optional mode (N: not valid), RMC a date
                fst = 1 if k == K_RMC else 5
                fmode = 11 if k == K_RMC else 6
                stv = buf[fs[fst]] if fe[fst] - fs[fst] == 1 else 0
                mode = buf[fs[fmode]] if nf > fmode and fe[fmode] - fs[fmode] == 1 else 0
                dv, cd = -1, 1
                if k == K_RMC:
                    dv, cd = ddmmyy(buf, fs[8], fe[8])
                bad = bad or (stv != A and stv != V) or cd == 2
                rng = rng or cd == 3
                if bad:
                    iv[S_STATUS, i] = ST_MALFORMED
                elif rng:
                    iv[S_STATUS, i] = ST_RANGE
                else:
                    iv[S_STATUS, i] = ST_ACCEPTED
                    iv[S_I1, i] = 1 if (stv == A and mode != N) else 0
                    iv[S_DATE, i] = dv
            if iv[S_STATUS, i] == ST_ACCEPTED:
                tod[i] = t
                fv[F_LAT, i] = la
                fv[F_LON, i] = lg
                iv[S_RES, i] = min(rla, rlo)
            break
        if checksummed and p < 0 and iv[S_KIND, i] != K_OTHER and \
                iv[S_STATUS, i] == ST_ACCEPTED:
            iv[S_STATUS, i] = ST_TRUNCATED  # a line cut short loses its checksum first
            tod[i] = -1
            iv[S_DATE, i] = -1
        nrec += 1
        if split:
            in_line = True
        else:
            in_line = False
            nline += 1
            consumed = pos
    if final:
        consumed = n
    return nrec, nline, consumed
