"""A log as windows of bytes scanned on their own, and their records put together in order.

A log is cut into windows of a few megabytes at *safe* line ends
(:mod:`archive.ingest.nmea_windows`), so the records of a window scanned on its own (in
any thread) are exactly those a scan of the whole log would give.

Windows are then fed in order to an :class:`Assembler`. The sentences of an epoch may run
over the end of a window: the records of the last epoch started in a window (the
*tail*) are carried, with their bytes, into the room left before the records of the next
window, and assembled with it. A window's records are written from index
:data:`RESERVE` on, so the carried ones usually fit in front of them without a copy.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa

from archive.ingest import nmea_scan as ns
from archive.ingest.arrow_build import (
    booleans,
    coded_strings,
    constant_dictionary,
    dictionary_codes,
    floats,
    from_numpy,
)
from archive.ingest.ascii import COMMA, SPACE, STAR
from archive.ingest.nmea_epochs import US_PER_DAY, assemble
from archive.ingest.result import empty_rejects, line_texts, sort_fixes
from archive.ingest.schema import FIX_STORAGE_SCHEMA, REJECT_SCHEMA

RESERVE = 512  # records of room before a window's own
_REASONS = ["", ""] + [ns.STATUS_REASON[k] for k in range(2, 10)]
SENTENCES = ["GGA", "GNS", "RMC", "GLL"]
_SENTENCE_CODE = np.zeros(8, np.int64)
_SENTENCE_CODE[[ns.K_GGA, ns.K_GNS, ns.K_RMC, ns.K_GLL]] = [0, 1, 2, 3]
_TIMED = np.zeros(8, bool)
_TIMED[[ns.K_GGA, ns.K_RMC, ns.K_ZDA, ns.K_GNS, ns.K_GLL]] = True


@dataclass
class Chunk:
    """The result of one window: its fixes (``FIX_STORAGE_SCHEMA``), rejects and line counts,
    the ignored lines by sentence type and, per date of its fixes, the fixes and lines (for
    the rollover check)."""

    fixes: pa.Table
    rejects: pa.Table
    n_lines: int
    n_accepted: int
    n_rejected: int
    n_ignored: int
    ignored: dict[str, int] = field(default_factory=dict)
    days: dict[int, list[int]] = field(default_factory=dict)  # day: [fixes, first, last line]


@dataclass
class Window:
    """The records of one window: ``arrays`` columns ``first .. end - 1``."""

    buf: np.ndarray
    arrays: tuple
    first: int
    end: int
    n_lines: int
    final: bool


def scan_window(data, final: bool, checksummed: bool, arrays: tuple | None = None) -> Window:
    """Scan one window (any thread: the scanner releases the interpreter lock)."""
    buf = np.frombuffer(data, dtype=np.uint8)
    arrays, end, nline, _ = ns.scan(buf, True, checksummed, arrays, RESERVE)
    return Window(buf, arrays, RESERVE, end, nline, final)


def _epoch_cut(iv: np.ndarray, tod: np.ndarray, a: int, b: int) -> int:
    """Index of the first record of the last epoch starting in records ``a .. b-1`` (it may
    go on in the next window); ``b`` when they hold no time at all.

    Read from the end in growing tails (64 records, then 16 times more each time): the
    answer lies in the last few records of a window, and the whole window need not be
    looked at."""
    lo, span = b, 64
    while lo > a:
        lo = max(a, b - span)
        kind = iv[ns.S_KIND, lo:b]
        timed = _TIMED[kind] & (iv[ns.S_STATUS, lo:b] == ns.ST_ACCEPTED) & (tod[lo:b] >= 0)
        tb = np.flatnonzero(timed)
        if tb.size:
            t = tod[lo:b][tb]
            change = np.flatnonzero(t[1:] != t[:-1])
            if change.size:  # the last change of time lies in this tail
                return lo + int(tb[change[-1] + 1])
            if lo == a:
                return a + int(tb[0])
        span *= 16
    return b


def _type_matrix(buf: np.ndarray, at: np.ndarray) -> np.ndarray:
    """(m, 8) uint8 matrix: the sentence type of each '$' at ``at``, NUL padded (the three
    type letters of a standard sentence, up to eight characters of a proprietary one)."""
    idx = at[:, None] + np.arange(1, 9)[None, :]
    inside = idx < buf.shape[0]
    chars = np.where(inside, buf[np.minimum(idx, max(buf.shape[0] - 1, 0))], 0).astype(np.uint8)
    stop = (chars == COMMA) | (chars == STAR) | (chars <= SPACE) | (chars > 126)
    cut = np.where(stop.any(axis=1), stop.argmax(axis=1), 8)
    chars[np.arange(8)[None, :] >= cut[:, None]] = 0
    std = np.zeros_like(chars)
    std[:, :3] = chars[:, 2:5]
    return np.where((chars[:, 0] == ord("P"))[:, None], chars, std)


def _count_types(buf: np.ndarray, addr: np.ndarray, starts: np.ndarray,
                 out: dict[str, int]) -> None:
    """Add the ignored records (their ``S_ADDR`` and start) to ``out`` by type: the type
    of a sentence, ``text`` for a line that is not one, ``blank`` for an empty line. A line
    starting with '!' and a five-character address (an encapsulation sentence of NMEA 0183,
    such as AIS VDM/VDO) counts as its type too: nodekeep reads none of them."""
    text = addr == ns.A_TEXT
    encapsulated = np.zeros(addr.shape[0], dtype=bool)
    if text.any():
        st = starts[text].astype(np.int64)
        idx = st[:, None] + np.arange(7)[None, :]
        ok = (idx < buf.shape[0]).all(axis=1)
        chars = buf[np.minimum(idx, max(buf.shape[0] - 1, 0))]
        alnum = ((chars[:, 1:6] >= 48) & (chars[:, 1:6] <= 57)) | \
            ((chars[:, 1:6] >= 65) & (chars[:, 1:6] <= 90))
        hit = ok & (chars[:, 0] == ord("!")) & alnum.all(axis=1) & (chars[:, 6] == ord(","))
        encapsulated[np.flatnonzero(text)[hit]] = True
    for code, name, extra in ((ns.A_TEXT, "text", encapsulated), (ns.A_BLANK, "blank", None)):
        k = int(((addr == code) & ~extra).sum()) if extra is not None else int((addr == code).sum())
        if k:
            out[name] = out.get(name, 0) + k
    at = np.concatenate([addr[addr >= 16].astype(np.int64) - 16,
                         starts[encapsulated].astype(np.int64)])
    if at.size:
        packed = np.frombuffer(np.ascontiguousarray(_type_matrix(buf, at)).tobytes(), "<u8")
        codes, counts = np.unique(packed, return_counts=True)
        for code, k in zip(codes.tolist(), counts.tolist(), strict=True):
            name = int(code).to_bytes(8, "little").rstrip(b"\0").decode("ascii", "replace")
            out[name] = out.get(name, 0) + int(k)


class Assembler:
    """Turns the windows of one log, fed in order, into chunks of fixes and rejects."""

    def __init__(self, node: str, raw_hash: str, carry: np.ndarray) -> None:
        self.node, self.raw_hash, self.carry = node, raw_hash, carry
        self.line_base = 0  # lines of the windows fed so far
        self.tail: tuple | None = None  # (iv, tod, fv, bytes) of carried records

    def feed(self, w: Window) -> Chunk:
        """The chunk of everything complete after window ``w`` (keeps the last epoch when
        more windows follow)."""
        iv, tod, fv = w.arrays
        first = w.first
        t = 0 if self.tail is None else self.tail[1].shape[0]
        if t > first:  # a long carried epoch: make room for it
            n = w.end - first
            room = ns.record_arrays(np.zeros(0, np.uint8), None, t + n + 2)
            for dst, src in zip(room, w.arrays, strict=True):
                dst[..., t:t + n] = src[..., first:w.end]
            iv, tod, fv = room
            first, end = t, t + n
        else:
            end = w.end
        a = first - t
        if t:
            tiv, ttod, tfv, tbytes = self.tail
            iv[:, a:first] = tiv
            tod[a:first] = ttod
            fv[:, a:first] = tfv
        else:
            tbytes = np.zeros(0, np.uint8)
        cut = end if w.final else _epoch_cut(iv, tod, a, end)
        chunk = self._chunk(w.buf, tbytes, iv, tod, fv, a, first, cut)
        self.tail = self._carry(w, tbytes, iv, tod, fv, first, cut, end) if cut < end else None
        self.line_base += w.n_lines
        return chunk

    def _carry(self, w: Window, tbytes: np.ndarray, iv, tod, fv, first: int, a: int,
               b: int) -> tuple:
        """Records ``a .. b-1`` as a tail: copied, their bytes gathered into one buffer
        (offsets rebased) and their lines counted from the end of this window."""
        tiv = iv[:, a:b].copy()
        ttod = tod[a:b].copy()
        tfv = fv[:, a:b].copy()
        starts = tiv[ns.S_START].astype(np.int64)
        ends = tiv[ns.S_END].astype(np.int64)
        lengths = ends - starts
        offsets = np.zeros(b - a + 1, np.int64)
        np.cumsum(lengths, out=offsets[1:])
        own = np.arange(a, b) >= first
        parts = []
        for i in range(b - a):
            src = w.buf if own[i] else tbytes
            parts.append(src[starts[i]:ends[i]])
        newbytes = np.concatenate(parts) if parts else np.zeros(0, np.uint8)
        shift = offsets[:-1] - starts
        tiv[ns.S_START] = offsets[:-1]
        tiv[ns.S_END] = offsets[1:]
        has_addr = tiv[ns.S_ADDR] >= 16
        tiv[ns.S_ADDR] = np.where(has_addr, tiv[ns.S_ADDR] + shift, tiv[ns.S_ADDR])
        tiv[ns.S_LINE] -= w.n_lines
        return tiv, ttod, tfv, newbytes

    def _chunk(self, buf: np.ndarray, tbytes: np.ndarray, iv, tod, fv, a: int, first: int,
               cut: int) -> Chunk:
        ep = assemble(iv, tod, fv, a, cut, self.carry)
        fixes, days = self._fixes(iv, fv, ep)
        status = iv[ns.S_STATUS, a:cut]
        rj = a + np.flatnonzero(status >= ns.ST_CHECKSUM)
        if rj.size:
            texts = []
            for seg, src in ((rj[rj < first], tbytes), (rj[rj >= first], buf)):
                if seg.size:
                    texts.append(line_texts(src, iv[ns.S_START, seg], iv[ns.S_END, seg]))
            rejects = pa.table({
                "raw_line": from_numpy(self.line_base + iv[ns.S_LINE, rj].astype(np.int64) + 1,
                                       pa.int64()),
                "reason": coded_strings(iv[ns.S_STATUS, rj], _REASONS),
                "text": pa.concat_arrays(texts) if len(texts) > 1 else texts[0]},
                schema=REJECT_SCHEMA)
        else:
            rejects = empty_rejects()
        n = cut - a
        n_acc = int((status == ns.ST_ACCEPTED).sum())
        ignored_at = status == ns.ST_IGNORED
        n_ign = int(ignored_at.sum())
        ignored: dict[str, int] = {}
        if n_ign:
            addr = iv[ns.S_ADDR, a:cut]
            starts = iv[ns.S_START, a:cut]
            split = first - a
            _count_types(tbytes, addr[:split][ignored_at[:split]],
                         starts[:split][ignored_at[:split]], ignored)
            _count_types(buf, addr[split:][ignored_at[split:]],
                         starts[split:][ignored_at[split:]], ignored)
        return Chunk(fixes, rejects, n, n_acc, n - n_acc - n_ign, n_ign, ignored, days)

    def _fixes(self, iv, fv, ep) -> tuple[pa.Table, dict[int, list[int]]]:
        pos, qual, day, etod, void, ftype, pdop, vdop, ghdop, keep = ep
        k = np.flatnonzero(keep)
        m = k.shape[0]
        if m == 0:
            return pa.Table.from_batches([], schema=FIX_STORAGE_SCHEMA), {}
        pr = pos[k]
        qr = qual[k]
        hq = qr >= 0
        qi = np.where(hq, qr, 0)
        lat = fv[ns.F_LAT, pr]
        lon = fv[ns.F_LON, pr]
        quality = np.where(hq, iv[ns.S_I1, qi], -1)
        nsat = np.where(hq, iv[ns.S_I2, qi], -1)
        alt = np.where(hq, fv[ns.F_1, qi], np.nan)
        sep = np.where(hq, fv[ns.F_2, qi], np.nan)
        hd = np.where(hq, fv[ns.F_3, qi], np.nan)
        hdop = np.where(np.isfinite(hd), hd, ghdop[k])
        valid = np.where(hq, quality > 0, True) & ~void[k] & np.isfinite(lat)
        days = day[k]
        times = days * US_PER_DAY + etod[k]
        lines = self.line_base + iv[ns.S_LINE, pr].astype(np.int64) + 1
        ft = ftype[k]
        cols = [
            constant_dictionary(self.node, m),
            from_numpy(times, FIX_STORAGE_SCHEMA.field("time").type),
            from_numpy(lat, pa.float64()),
            from_numpy(lon, pa.float64()),
            floats(alt + sep),
            floats(alt),
            floats(sep),
            from_numpy(quality, pa.int8()),
            from_numpy(ft, pa.int8(), ft >= 0),
            booleans(valid),
            from_numpy(nsat, pa.int16(), nsat >= 0),
            floats(pdop[k], pa.float32()),
            floats(hdop, pa.float32()),
            floats(vdop[k], pa.float32()),
            constant_dictionary(self.raw_hash, m),
            from_numpy(lines, pa.int64()),
            dictionary_codes(_SENTENCE_CODE[iv[ns.S_KIND, pr]], SENTENCES),
            booleans(~hq & ~np.isfinite(hdop)),
            from_numpy(np.zeros(m, np.int16), pa.int16()),
        ]
        table = sort_fixes(pa.Table.from_arrays(cols, schema=FIX_STORAGE_SCHEMA))
        stats: dict[int, list[int]] = {}
        order = np.lexsort((lines, days))
        d_sorted, l_sorted = days[order], lines[order]
        starts = np.flatnonzero(np.r_[True, d_sorted[1:] != d_sorted[:-1]])
        ends = np.r_[starts[1:], m]
        for lo, hi in zip(starts.tolist(), ends.tolist(), strict=True):
            stats[int(d_sorted[lo])] = [hi - lo, int(l_sorted[lo]), int(l_sorted[hi - 1])]
        return table, stats
