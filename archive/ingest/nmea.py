"""NMEA 0183 logs -> canonical fix table, vectorised over whole buffers, streamed in chunks.

A log is read in chunks of a few megabytes. Each chunk goes once through the compiled
scanner (:mod:`archive.ingest.nmea_scan`), which classifies every record (a line, or one
sentence of a line where a lost line end joined several) and converts the fields of GGA,
GNS, RMC, GLL, GSA and ZDA into numeric columns; the records are then grouped into epochs
by :mod:`archive.ingest.nmea_epochs` and the fix table is built with array operations. A
chunk ends where a new epoch starts, so an epoch is never split and the size of the
chunks cannot change the result. When most sentences of the log's first megabyte carry a
checksum, a known sentence without one is counted as truncated.

After the last chunk, :mod:`archive.ingest.rollover` checks the dates for the GPS week
number rollover (see there); :func:`parse_nmea` applies it to a log held in memory.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa

from archive.ingest import nmea_scan as ns
from archive.ingest.arrow_build import (
    booleans,
    coded_strings,
    constant_strings,
    floats,
    from_numpy,
)
from archive.ingest.nmea_epochs import US_PER_DAY, assemble, new_carry
from archive.ingest.result import (
    ParseResult,
    empty_fixes,
    empty_rejects,
    line_texts,
    sort_fixes,
)
from archive.ingest.schema import FIX_SCHEMA, REJECT_SCHEMA

CHUNK_BYTES = 16 << 20
PARSER = "nmea-2"
_REASONS = ["", ""] + [ns.STATUS_REASON[k] for k in range(2, 10)]
_SENTENCE_CODE = np.full(8, 0, np.int64)
_SENTENCE_CODE[[ns.K_GGA, ns.K_GNS, ns.K_RMC, ns.K_GLL]] = [0, 1, 2, 3]
SENTENCES = ["GGA", "GNS", "RMC", "GLL"]
_TIMED = np.zeros(8, bool)
_TIMED[[ns.K_GGA, ns.K_RMC, ns.K_ZDA, ns.K_GNS, ns.K_GLL]] = True


@dataclass
class Chunk:
    """The result of one chunk: its fixes, rejects and line counts, the ignored lines by
    sentence type and, per date of its fixes, the fixes and lines (for the rollover check)."""

    fixes: pa.Table
    rejects: pa.Table
    n_lines: int
    n_accepted: int
    n_rejected: int
    n_ignored: int
    ignored: dict[str, int] = field(default_factory=dict)
    days: dict[int, list[int]] = field(default_factory=dict)  # day: [fixes, first, last line]


@dataclass
class _Reader:
    """What one chunk tells the next."""

    node: str
    raw_hash: str
    checksummed: bool
    carry: np.ndarray
    line_base: int = 0
    arrays: tuple | None = None  # the scanner's record arrays, reused


def has_checksums(head: bytes) -> bool:
    """True when most sentences of a log's first bytes carry a checksum."""
    return head.count(b"*") * 2 > head.count(b"$") > 0


def _epoch_cut(iv: np.ndarray, tod: np.ndarray, n: int) -> int:
    """Index of the first record of the last epoch that starts inside the chunk.

    That epoch may go on in the next block, so it is read with it. 0 means "the chunk
    holds one unfinished epoch: read more"; ``n`` that the chunk holds no time at all.
    """
    kind = iv[ns.S_KIND, :n]
    timed = _TIMED[kind] & (iv[ns.S_STATUS, :n] == ns.ST_ACCEPTED) & (tod[:n] >= 0)
    tb = np.flatnonzero(timed)
    if tb.size == 0:
        return n
    t = tod[tb]
    change = np.flatnonzero(t[1:] != t[:-1])
    return int(tb[change[-1] + 1]) if change.size else int(tb[0])


def _ignored_counts(buf: np.ndarray, iv: np.ndarray, n: int) -> dict[str, int]:
    """Ignored records by sentence type, ``text`` (not a sentence) and ``blank``."""
    addr = iv[ns.S_ADDR, :n][iv[ns.S_STATUS, :n] == ns.ST_IGNORED]
    out: dict[str, int] = {}
    for code, name in ((ns.A_TEXT, "text"), (ns.A_BLANK, "blank")):
        k = int((addr == code).sum())
        if k:
            out[name] = k
    at = addr[addr >= 16].astype(np.int64) - 16
    if at.size:
        packed = np.frombuffer(np.ascontiguousarray(_type_matrix(buf, at)).tobytes(), "<u8")
        codes, counts = np.unique(packed, return_counts=True)
        for code, k in zip(codes.tolist(), counts.tolist(), strict=True):
            name = int(code).to_bytes(8, "little").rstrip(b"\0").decode("ascii", "replace")
            out[name] = out.get(name, 0) + int(k)
    return out


def _type_matrix(buf: np.ndarray, at: np.ndarray) -> np.ndarray:
    """(m, 8) uint8 matrix: the sentence type of each '$' at ``at``, NUL padded."""
    cols = np.arange(1, 9)
    idx = at[:, None] + cols[None, :]
    inside = idx < buf.shape[0]
    chars = np.where(inside, buf[np.minimum(idx, buf.shape[0] - 1)], 0).astype(np.uint8)
    stop = (chars == 44) | (chars == 42) | (chars < 33) | (chars > 126)
    cut = np.where(stop.any(axis=1), stop.argmax(axis=1), 8)
    chars[np.arange(8)[None, :] >= cut[:, None]] = 0
    proprietary = chars[:, 0] == ord("P")
    std = np.zeros_like(chars)
    std[:, :3] = chars[:, 2:5]
    return np.where(proprietary[:, None], chars, std)


def _fix_table(iv, tod, fv, ep, reader: _Reader) -> tuple[pa.Table, dict[int, list[int]]]:
    pos, qual, day, etod, void, ftype, pdop, vdop, ghdop, keep = ep
    k = np.flatnonzero(keep)
    m = k.shape[0]
    if m == 0:
        return empty_fixes(), {}
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
    lines = reader.line_base + iv[ns.S_LINE, pr].astype(np.int64) + 1
    ft = ftype[k]
    cols = [
        constant_strings(reader.node, m),
        from_numpy(times, FIX_SCHEMA.field("time").type),
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
        constant_strings(reader.raw_hash, m),
        from_numpy(lines, pa.int64()),
        coded_strings(_SENTENCE_CODE[iv[ns.S_KIND, pr]], SENTENCES),
        booleans(~hq & ~np.isfinite(hdop)),
        from_numpy(np.zeros(m, np.int16), pa.int16()),
    ]
    table = sort_fixes(pa.Table.from_arrays(cols, schema=FIX_SCHEMA))
    stats: dict[int, list[int]] = {}
    if m:
        order = np.lexsort((lines, days))
        d_sorted, l_sorted = days[order], lines[order]
        starts = np.flatnonzero(np.r_[True, d_sorted[1:] != d_sorted[:-1]])
        ends = np.r_[starts[1:], m]
        for a, b in zip(starts.tolist(), ends.tolist(), strict=True):
            stats[int(d_sorted[a])] = [b - a, int(l_sorted[a]), int(l_sorted[b - 1])]
    return table, stats


def _step(buf: np.ndarray, final: bool, reader: _Reader) -> tuple[Chunk | None, int]:
    """Parse the complete epochs at the start of ``buf``: (chunk, bytes consumed).

    ``(None, 0)`` when ``buf`` holds one unfinished epoch and is not the end of the log.
    """
    arrays, nrec, nline, consumed_all = ns.scan(buf, final, reader.checksummed, reader.arrays)
    reader.arrays = arrays
    iv, tod, fv = arrays
    cut = nrec if final else _epoch_cut(iv, tod, nrec)
    if cut == 0 and not final:
        return None, 0
    consumed = int(iv[ns.S_START, cut]) if cut < nrec else (
        buf.shape[0] if final else consumed_all)
    lines_used = int(iv[ns.S_LINE, cut]) if cut < nrec else nline
    ep = assemble(iv, tod, fv, cut, reader.carry)
    fixes, days = _fix_table(iv, tod, fv, ep, reader)
    status = iv[ns.S_STATUS, :cut]
    rj = np.flatnonzero(status >= ns.ST_CHECKSUM)
    if rj.size:
        texts = line_texts(buf, iv[ns.S_START, rj], iv[ns.S_END, rj])
        rejects = pa.table({
            "raw_line": from_numpy(reader.line_base + iv[ns.S_LINE, rj].astype(np.int64) + 1,
                                   pa.int64()),
            "reason": coded_strings(status[rj], _REASONS),
            "text": texts}, schema=REJECT_SCHEMA)
    else:
        rejects = empty_rejects()
    n_acc = int((status == ns.ST_ACCEPTED).sum())
    n_ign = int((status == ns.ST_IGNORED).sum())
    chunk = Chunk(fixes, rejects, cut, n_acc, cut - n_acc - n_ign, n_ign,
                  _ignored_counts(buf, iv, cut) if n_ign else {}, days)
    reader.line_base += lines_used
    return chunk, consumed


def _start(node: str, raw_hash: str, date: dt.date | None, checksummed: bool) -> _Reader:
    date0 = None if date is None else (date - dt.date(1970, 1, 1)).days
    return _Reader(node, raw_hash, checksummed, new_carry(date0))


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
    reader = _start(node, raw_hash, date, has_checksums((block or b"")[:1 << 20])
                    if checksummed is None else checksummed)
    while block is not None:
        nxt = next(it, None)
        data = pending + block if pending else block
        chunk, consumed = _step(np.frombuffer(data, dtype=np.uint8), nxt is None, reader)
        if chunk is None:
            pending, block = data, nxt  # one unfinished epoch so far: read on
            continue
        yield chunk
        pending = data[consumed:]
        block = nxt
        if block is None and pending:
            block, pending = pending, b""


def memory_chunks(data: bytes | np.ndarray, size: int = CHUNK_BYTES, *, node: str,
                  raw_hash: str, date: dt.date | None = None,
                  checksummed: bool | None = None) -> Iterator[Chunk]:
    """The chunks :func:`iter_chunks` yields for ``data`` cut in blocks of ``size`` bytes,
    read from windows of ``data`` itself (no block is copied)."""
    buf = np.frombuffer(data, dtype=np.uint8) if not isinstance(data, np.ndarray) else data
    n = buf.shape[0]
    if checksummed is None:
        checksummed = has_checksums(buf[:1 << 20].tobytes())
    reader = _start(node, raw_hash, date, checksummed)
    start, end = 0, min(size, n)
    while True:
        final = end >= n
        chunk, consumed = _step(buf[start:end], final, reader)
        if chunk is not None:
            yield chunk
            start += consumed
        if final:
            return
        end = min(end + size, n)


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


def merge_days(total: dict[int, list[int]], part: dict[int, list[int]]) -> None:
    """Add a chunk's per-date statistics to a log's."""
    for d, (k, a, b) in part.items():
        if d in total:
            t = total[d]
            total[d] = [t[0] + k, min(t[1], a), max(t[2], b)]
        else:
            total[d] = [k, a, b]


def combine(chunks: Iterable[Chunk]) -> ParseResult:
    """One :class:`ParseResult` from chunks (fixes sorted by time), before the rollover
    check."""
    return combine_with_days(chunks)[0]


def combine_with_days(chunks: Iterable[Chunk]) -> tuple[ParseResult, dict[int, list[int]]]:
    """:func:`combine`, with the per-date statistics the rollover check reads."""
    fx, rj = [], []
    nl = na = nr = ni = 0
    ignored: dict[str, int] = {}
    days: dict[int, list[int]] = {}
    for c in chunks:
        fx.append(c.fixes)
        rj.append(c.rejects)
        nl += c.n_lines
        na += c.n_accepted
        nr += c.n_rejected
        ni += c.n_ignored
        for k, v in c.ignored.items():
            ignored[k] = ignored.get(k, 0) + v
        merge_days(days, c.days)
    fixes = pa.concat_tables(fx) if fx else empty_fixes()
    rejects = pa.concat_tables(rj) if rj else empty_rejects()
    return ParseResult(sort_fixes(fixes.combine_chunks()), rejects.combine_chunks(), nl, na, nr,
                       ni, dict(sorted(ignored.items()))), days


def parse_nmea(data: bytes, *, node: str, raw_hash: str, date: dt.date | None = None,
               chunk_bytes: int = CHUNK_BYTES,
               reference: tuple[dt.datetime, dt.datetime] | None = None) -> ParseResult:
    """Parse an NMEA 0183 log held in memory (see the module docstring for the rules).

    ``node`` and ``raw_hash`` are copied into every fix; ``date`` dates epochs of a log
    without RMC/ZDA; ``reference`` is the time window the log is expected in (the node's
    deployments), used to decide GPS week rollovers. Never raises on bad content: bad lines
    become rejects.
    """
    from archive.ingest.rollover import apply_rollover

    result, days = combine_with_days(memory_chunks(data, max(1, chunk_bytes), node=node,
                                         raw_hash=raw_hash, date=date))
    return apply_rollover(result, days, reference, data)
