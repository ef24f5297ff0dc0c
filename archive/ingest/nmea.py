"""NMEA 0183 logs -> canonical fix table, vectorised over whole buffers, streamed in chunks.

A log is read in chunks of a few megabytes split at line ends. Each chunk goes once through
the compiled scanner (:mod:`archive.ingest.nmea_scan`), which classifies every line and
converts the fields of GGA, RMC, GSA and ZDA sentences into numeric columns. Epochs are then
assembled with array operations:

- one epoch per accepted GGA sentence (it gives the time of day and the position);
- its date comes from an RMC or ZDA of the same epoch (same time of day, no other GGA in
  between), else from the nearest earlier date sentence (earlier chunks included), else
  from ``date`` (``--date``); the day rolls over when the
  time of day and the date sentence's time of day are more than 12 h apart (midnight UTC).
  A GGA with no date at all is rejected as ``no-date``;
- an RMC of the same epoch with status V (or FAA mode N) makes the epoch invalid;
- the GSA sentences that follow a GGA (up to the next GGA, and before any sentence of
  another time of day) belong to its epoch. With several
  GSA per epoch (one per constellation of a multi-GNSS receiver) the PDOP, HDOP and VDOP are
  those of the first GSA carrying them: they describe the same combined solution, so every
  GSA of an epoch repeats them. The fix type is the highest of the epoch's GSA;
- HDOP is the GGA's, or the GSA's when the GGA leaves it empty.

A chunk ends where a new epoch starts (a time-of-day change), so an epoch is never split.
When most sentences of the log's first megabyte carry a checksum, a known sentence without one
is counted as truncated (a line cut short loses its checksum first).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa

from archive.ingest import nmea_scan as ns
from archive.ingest.result import (
    ParseResult,
    constant_strings,
    empty_fixes,
    empty_rejects,
    line_texts,
    rejects_table,
    sort_fixes,
)
from archive.ingest.schema import FIX_SCHEMA

CHUNK_BYTES = 16 << 20
US_PER_DAY = 86_400_000_000
HALF_DAY = US_PER_DAY // 2
PARSER = "nmea-1"
_REASON = np.array(["", ""] + [ns.STATUS_REASON[k] for k in range(2, 8)], dtype=object)


@dataclass
class _Carry:
    """What one chunk tells the next."""

    line_base: int = 0
    src_date: int = -1  # last date sentence: days since 1970
    src_tod: int = -1  # ... and its time of day (µs)
    track_tod: int = -1  # last GGA time of day, for --date rollover
    track_day: int = 0  # days added to --date so far
    checksummed: bool = False  # the log's sentences carry checksums


@dataclass
class Chunk:
    """The result of one chunk: its fixes, rejects and line counts."""

    fixes: pa.Table
    rejects: pa.Table
    n_lines: int
    n_accepted: int
    n_rejected: int
    n_ignored: int


def _group_starts(k: np.ndarray) -> np.ndarray:
    """Where each run of equal values of the sorted ``k`` starts."""
    starts = np.empty(k.shape[0], dtype=bool)
    starts[:1] = True
    np.not_equal(k[1:], k[:-1], out=starts[1:])
    return np.flatnonzero(starts)


def _first_per_epoch(k: np.ndarray, values: np.ndarray, n: int) -> np.ndarray:
    """Per epoch (``k`` sorted), the first finite value of ``values``; NaN if none."""
    out = np.full(n, np.nan)
    ok = np.isfinite(values)
    if ok.any():
        kk, vv = k[ok], values[ok]
        first = _group_starts(kk)
        out[kk[first]] = vv[first]
    return out


def _masked(values: np.ndarray, typ: pa.DataType) -> pa.Array:
    return pa.array(values, type=typ, mask=~np.isfinite(values))


def _assemble(buf, starts, ends, cols, carry: _Carry, node: str, raw_hash: str,
              date0: int | None) -> Chunk:
    status, kind, star, tod, lat, lon, f1, f2, f3, i1, i2, date = cols
    n = status.shape[0]
    if carry.checksummed:
        status[(kind > 0) & ~star & (status == ns.ST_ACCEPTED)] = ns.ST_TRUNCATED
    acc = status == ns.ST_ACCEPTED
    gga = np.flatnonzero(acc & (kind == ns.K_GGA))
    g = gga.shape[0]
    gt = tod[gga]
    day = np.full(g, -1, dtype=np.int64)
    void = np.zeros(g, dtype=bool)
    dsrc = acc & ((kind == ns.K_RMC) | (kind == ns.K_ZDA))
    ds = np.flatnonzero(dsrc & (date >= 0))
    if g:
        # date and status from the RMC / ZDA of the same epoch
        r = np.flatnonzero(dsrc)
        if r.size:
            kp = np.searchsorted(gga, r) - 1
            kn = kp + 1
            okp = kp >= 0
            okp[okp] = gt[kp[okp]] == tod[r[okp]]
            okn = kn < g
            okn[okn] = gt[kn[okn]] == tod[r[okn]]
            match = np.where(okp, kp, np.where(okn, kn, -1))
            m = match >= 0
            wd = m & (date[r] >= 0)
            day[match[wd]] = date[r[wd]]
            vd = m & (kind[r] == ns.K_RMC) & (i1[r] == 0)
            void[match[vd]] = True
        # else the nearest earlier date sentence (this chunk or one before)
        need = np.flatnonzero(day < 0)
        if need.size and (ds.size or carry.src_date >= 0):
            prev = np.searchsorted(ds, gga[need]) - 1
            has_prev = prev >= 0
            sd = np.where(has_prev, date[ds[np.maximum(prev, 0)]] if ds.size else -1,
                          carry.src_date)
            st = np.where(has_prev, tod[ds[np.maximum(prev, 0)]] if ds.size else -1,
                          carry.src_tod)
            ok = sd >= 0
            delta = st - gt[need]
            sd = sd + (delta > HALF_DAY) - (delta < -HALF_DAY)
            day[need[ok]] = sd[ok]
        # else --date, rolling over when the time of day goes back by more than 12 h
        if date0 is not None:
            prev_tod = np.concatenate([[carry.track_tod if carry.track_tod >= 0 else gt[0]],
                                       gt[:-1]])
            roll = np.cumsum(gt - prev_tod < -HALF_DAY) + carry.track_day
            fill = day < 0
            day[fill] = date0 + roll[fill]
            carry.track_tod = int(gt[-1])
            carry.track_day = int(roll[-1])
    if ds.size:
        carry.src_date = int(date[ds[-1]])
        carry.src_tod = int(tod[ds[-1]])
    nodate = day < 0
    status[gga[nodate]] = ns.ST_NODATE
    keep = ~nodate
    # DOPs and fix type from the GSA of each epoch
    pdop = np.full(g, np.nan)
    vdop = np.full(g, np.nan)
    ghdop = np.full(g, np.nan)
    ftype = np.full(g, -1, dtype=np.int16)
    gs = np.flatnonzero(acc & (kind == ns.K_GSA))
    if g and gs.size:
        k = np.searchsorted(gga, gs, side="right") - 1
        # the GSA belongs to the preceding GGA unless a sentence of another time of day
        # comes in between (then its own GGA was lost)
        tb = np.flatnonzero(acc & (tod >= 0) & ((kind == ns.K_GGA) | (kind == ns.K_RMC)
                                               | (kind == ns.K_ZDA)))
        j = np.searchsorted(tb, gs) - 1
        own = (k >= 0) & (j >= 0)
        own[own] = tod[tb[j[own]]] == gt[k[own]]
        gs, k = gs[own], k[own]
        pdop = _first_per_epoch(k, f1[gs], g)
        ghdop = _first_per_epoch(k, f2[gs], g)
        vdop = _first_per_epoch(k, f3[gs], g)
        if gs.size:
            first = _group_starts(k)
            ftype[k[first]] = np.maximum(np.maximum.reduceat(i1[gs], first), -1)
    fixes = _fix_table(gga[keep], day[keep], gt[keep], void[keep], pdop[keep], vdop[keep],
                       ghdop[keep], ftype[keep], lat, lon, f1, f2, f3, i1, i2, carry,
                       node, raw_hash)
    rj = np.flatnonzero(status >= ns.ST_CHECKSUM)
    rejects = rejects_table(carry.line_base + rj + 1, _REASON[status[rj]],
                            line_texts(buf, starts[rj], ends[rj])) if rj.size else empty_rejects()
    n_acc = int((status == ns.ST_ACCEPTED).sum())
    n_ign = int((status == ns.ST_IGNORED).sum())
    return Chunk(fixes, rejects, n, n_acc, n - n_acc - n_ign, n_ign)


def _fix_table(lines, day, gt, void, pdop, vdop, ghdop, ftype, lat, lon, alt_all, sep_all,
               hdop_all, q_all, ns_all, carry: _Carry, node: str, raw_hash: str) -> pa.Table:
    m = lines.shape[0]
    if m == 0:
        return empty_fixes()
    alt = alt_all[lines]
    sep = sep_all[lines]
    hdop = np.where(np.isfinite(hdop_all[lines]), hdop_all[lines], ghdop)
    q = q_all[lines].astype(np.int8)
    nsat = ns_all[lines]
    times = (day * US_PER_DAY + gt).astype("datetime64[us]")
    cols = {
        "node": constant_strings(node, m),
        "time": pa.array(times, type=FIX_SCHEMA.field("time").type),
        "lat": pa.array(lat[lines]),
        "lon": pa.array(lon[lines]),
        "h_ell": _masked(alt + sep, pa.float64()),
        "h_msl": _masked(alt, pa.float64()),
        "geoid_sep": _masked(sep, pa.float64()),
        "quality": pa.array(q, pa.int8()),
        "fix_type": pa.array(ftype.astype(np.int8), pa.int8(), mask=ftype < 0),
        "valid": pa.array((q > 0) & ~void),
        "n_sats": pa.array(nsat, pa.int16(), mask=nsat < 0),
        "pdop": _masked(pdop.astype(np.float32), pa.float32()),
        "hdop": _masked(hdop.astype(np.float32), pa.float32()),
        "vdop": _masked(vdop.astype(np.float32), pa.float32()),
        "raw_hash": constant_strings(raw_hash, m),
        "raw_line": pa.array(carry.line_base + lines + 1, pa.int64()),
    }
    return sort_fixes(pa.table(cols, schema=FIX_SCHEMA))


def _epoch_cut(kind: np.ndarray, tod: np.ndarray, n: int) -> int:
    """Index of the first line of the last epoch that starts inside the chunk.

    That epoch may go on in the next block, so it is parsed with it. 0 means "the chunk
    holds one unfinished epoch: read more"; ``n`` that the chunk holds no time at all.
    """
    tb = np.flatnonzero(((kind == ns.K_GGA) | (kind == ns.K_RMC) | (kind == ns.K_ZDA))
                        & (tod >= 0))
    if tb.size == 0:
        return n
    t = tod[tb]
    change = np.flatnonzero(t[1:] != t[:-1])
    return int(tb[change[-1] + 1]) if change.size else int(tb[0])


def has_checksums(head: bytes) -> bool:
    """True when most sentences of a log's first bytes carry a checksum."""
    return head.count(b"*") * 2 > head.count(b"$") > 0


def _step(buf: np.ndarray, final: bool, carry: _Carry, node: str, raw_hash: str,
          date0: int | None) -> tuple[Chunk | None, int]:
    """Parse the complete epochs at the start of ``buf``: (chunk, bytes consumed).

    ``(None, 0)`` when ``buf`` holds one unfinished epoch and is not the end of the log.
    """
    starts, ends, *cols = ns.scan_buffer(buf, final)
    ncomp = starts.shape[0]
    cut = ncomp if final else _epoch_cut(cols[1], cols[3], ncomp)
    if cut == 0 and not final:
        return None, 0
    cols = [c[:cut] for c in cols]
    consumed = int(starts[cut]) if cut < ncomp else (
        buf.shape[0] if final else _consumed_after(buf, ends, ncomp))
    chunk = _assemble(buf, starts[:cut], ends[:cut], cols, carry, node, raw_hash, date0)
    carry.line_base += cut
    return chunk, consumed


def _start(date: dt.date | None, checksummed: bool) -> tuple[_Carry, int | None]:
    carry = _Carry()
    carry.checksummed = checksummed
    return carry, None if date is None else (date - dt.date(1970, 1, 1)).days


def iter_chunks(blocks: Iterable[bytes], *, node: str, raw_hash: str,
                date: dt.date | None = None, checksummed: bool | None = None
                ) -> Iterator[Chunk]:
    """Parse a log given as consecutive byte blocks; yields one :class:`Chunk` per block.

    Memory stays bounded by a few times the block size, whatever the length of the log.
    ``checksummed`` (default: decided on the first megabyte) says whether the log's
    sentences carry checksums, in which case a known sentence without one is truncated.
    """
    pending = b""
    it = iter(blocks)
    block = next(it, None)
    carry, date0 = _start(date, has_checksums((block or b"")[:1 << 20])
                          if checksummed is None else checksummed)
    while block is not None:
        nxt = next(it, None)
        data = pending + block if pending else block
        chunk, consumed = _step(np.frombuffer(data, dtype=np.uint8), nxt is None, carry, node,
                                raw_hash, date0)
        if chunk is None:
            pending, block = data, nxt  # one unfinished epoch so far: read on
            continue
        yield chunk
        pending = data[consumed:]
        block = nxt
        if block is None and pending:
            block, pending = pending, b""


def _memory_chunks(data: bytes, size: int, *, node: str, raw_hash: str,
                   date: dt.date | None) -> Iterator[Chunk]:
    """The chunks :func:`iter_chunks` yields for ``data`` cut in blocks of ``size`` bytes,
    read from windows of ``data`` itself (no block is copied)."""
    buf = np.frombuffer(data, dtype=np.uint8)
    n = buf.shape[0]
    carry, date0 = _start(date, has_checksums(data[:1 << 20]))
    start, end = 0, min(size, n)
    while True:
        final = end >= n
        chunk, consumed = _step(buf[start:end], final, carry, node, raw_hash, date0)
        if chunk is not None:
            yield chunk
            start += consumed
        if final:
            return
        end = min(end + size, n)


def _consumed_after(buf: np.ndarray, ends: np.ndarray, ncomp: int) -> int:
    """Byte offset just after the line end of the last complete line."""
    if ncomp == 0:
        return 0
    e = int(ends[ncomp - 1])
    return e + 2 if buf[e:e + 2].tobytes() == b"\r\n" else e + 1


def file_blocks(path: str | Path, size: int = CHUNK_BYTES) -> Iterator[bytes]:
    """Consecutive blocks of a file (at least one, possibly empty)."""
    with open(path, "rb") as fh:
        first = True
        while True:
            b = fh.read(size)
            if not b and not first:
                return
            first = False
            yield b
            if len(b) < size:
                return


def combine(chunks: Iterable[Chunk]) -> ParseResult:
    """One :class:`ParseResult` from chunks (fixes sorted by time)."""
    fx, rj = [], []
    nl = na = nr = ni = 0
    for c in chunks:
        fx.append(c.fixes)
        rj.append(c.rejects)
        nl += c.n_lines
        na += c.n_accepted
        nr += c.n_rejected
        ni += c.n_ignored
    fixes = pa.concat_tables(fx) if fx else empty_fixes()
    rejects = pa.concat_tables(rj) if rj else empty_rejects()
    return ParseResult(sort_fixes(fixes.combine_chunks()), rejects.combine_chunks(), nl, na, nr,
                       ni)


def parse_nmea(data: bytes, *, node: str, raw_hash: str, date: dt.date | None = None,
               chunk_bytes: int = CHUNK_BYTES) -> ParseResult:
    """Parse an NMEA 0183 log held in memory (see the module docstring for the rules).

    ``node`` and ``raw_hash`` are copied into every fix; ``date`` dates GGA sentences of a
    log without RMC/ZDA. Never raises on bad content: bad lines become rejects.
    """
    return combine(_memory_chunks(data, max(1, chunk_bytes), node=node, raw_hash=raw_hash,
                                  date=date))
