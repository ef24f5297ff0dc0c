"""NMEA 0183 logs -> canonical fix table, vectorised over whole buffers, streamed in windows.

A log is read in windows of a few megabytes cut at safe line ends
(:mod:`archive.ingest.nmea_chunks`). Each window goes once through the compiled scanner
(:mod:`archive.ingest.nmea_scan`), which classifies every record (a line, or one sentence
of a line where a lost line end joined several) and converts the fields of GGA, GNS, RMC,
GLL, GSA and ZDA into numeric columns; windows can be scanned in parallel. Their records
are then grouped into epochs in order by :mod:`archive.ingest.nmea_epochs` (the last epoch
of a window is carried into the next) and the fix table is built with array operations,
so the size of the windows cannot change the result. When most sentences of the log's
first megabyte carry a checksum, a known sentence without one is counted as truncated.

After the last chunk, :mod:`archive.ingest.rollover` checks the dates for the GPS week
number rollover (see there); :func:`parse_nmea` applies it to a log held in memory.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Iterator
from pathlib import Path

import numpy as np
import pyarrow as pa

from archive.ingest.formats import LogOptions
from archive.ingest.nmea_chunks import Assembler, Chunk, scan_window
from archive.ingest.nmea_epochs import new_carry
from archive.ingest.nmea_windows import (
    file_windows,
    read_ahead,
    windows_from_blocks,
    windows_from_memory,
)
from archive.ingest.result import ParseResult, empty_fixes, empty_rejects, sort_fixes
from archive.ingest.schema import FIX_SCHEMA

CHUNK_BYTES = 16 << 20
PARSER = "nmea-2"
__all__ = ["CHUNK_BYTES", "Chunk", "combine", "file_blocks", "file_chunks_parallel",
           "has_checksums", "iter_chunks", "iter_chunks_parallel", "memory_chunks", "parse_nmea"]


def has_checksums(head: bytes) -> bool:
    """True when most sentences of a log's first bytes carry a checksum."""
    return head.count(b"*") * 2 > head.count(b"$") > 0


def _assembler(node: str, raw_hash: str, date: dt.date | None) -> Assembler:
    date0 = None if date is None else (date - dt.date(1970, 1, 1)).days
    return Assembler(node, raw_hash, new_carry(date0))


def _first_block(blocks: Iterable[bytes]) -> tuple[bytes, Iterator[bytes]]:
    it = iter(blocks)
    first = next(it, b"")
    return first, it


def iter_chunks(blocks: Iterable[bytes], *, node: str, raw_hash: str,
                date: dt.date | None = None, checksummed: bool | None = None
                ) -> Iterator[Chunk]:
    """Parse a log given as consecutive byte blocks; yields one :class:`Chunk` per window.

    Memory stays bounded by a few times the block size, whatever the length of the log.
    ``checksummed`` (default: decided on the first megabyte) says whether the log's
    sentences carry checksums, in which case a known sentence without one is truncated.
    """
    first, rest = _first_block(blocks)
    if checksummed is None:
        checksummed = has_checksums(first[:1 << 20])
    asm = _assembler(node, raw_hash, date)
    arrays = None
    for data, final in windows_from_blocks(_chain(first, rest)):
        w = scan_window(data, final, checksummed, arrays)
        yield asm.feed(w)
        arrays = w.arrays


def file_chunks_parallel(path: str | Path, *, node: str, raw_hash: str,
                         date: dt.date | None = None, threads: int = 2,
                         size: int = CHUNK_BYTES) -> Iterator[Chunk]:
    """The chunks of a log file, its windows read straight into their buffers and scanned
    by ``threads`` threads ahead of the assembly (the scanner releases the interpreter
    lock); the same chunks as :func:`iter_chunks`, in order."""
    with open(path, "rb") as fh:
        checksummed = has_checksums(fh.read(1 << 20))
    yield from _parallel(read_ahead(file_windows(path, size)), node, raw_hash, date,
                         checksummed, threads)


def iter_chunks_parallel(blocks: Iterable[bytes], *, node: str, raw_hash: str,
                         date: dt.date | None = None, checksummed: bool | None = None,
                         threads: int = 2) -> Iterator[Chunk]:
    """:func:`iter_chunks` with the windows scanned by ``threads`` threads ahead of the
    assembly (the scanner releases the interpreter lock); the same chunks, in order."""
    first, rest = _first_block(blocks)
    if checksummed is None:
        checksummed = has_checksums(first[:1 << 20])
    yield from _parallel(windows_from_blocks(_chain(first, rest)), node, raw_hash, date,
                         checksummed, threads)


def _parallel(windows: Iterable[tuple], node: str, raw_hash: str, date: dt.date | None,
              checksummed: bool, threads: int) -> Iterator[Chunk]:
    from collections import deque
    from concurrent.futures import ThreadPoolExecutor

    asm = _assembler(node, raw_hash, date)
    spare: list[tuple] = []
    with ThreadPoolExecutor(threads, thread_name_prefix="nmea-scan") as pool:
        ahead: deque = deque()
        for data, final in windows:
            ahead.append(pool.submit(scan_window, data, final, checksummed,
                                     spare.pop() if spare else None))
            if len(ahead) > threads:
                w = ahead.popleft().result()
                yield asm.feed(w)
                spare.append(w.arrays)
        while ahead:
            yield asm.feed(ahead.popleft().result())


def _chain(first: bytes, rest: Iterator[bytes]) -> Iterator[bytes]:
    yield first
    yield from rest


def memory_chunks(data: bytes | np.ndarray, size: int = CHUNK_BYTES, *, node: str,
                  raw_hash: str, date: dt.date | None = None,
                  checksummed: bool | None = None) -> Iterator[Chunk]:
    """The chunks of a log held in memory, cut in windows of about ``size`` bytes read in
    place (no copy)."""
    raw = data.tobytes() if isinstance(data, np.ndarray) else data
    if checksummed is None:
        checksummed = has_checksums(raw[:1 << 20])
    asm = _assembler(node, raw_hash, date)
    arrays = None
    for window, final in windows_from_memory(raw, size):
        w = scan_window(window, final, checksummed, arrays)
        yield asm.feed(w)
        arrays = w.arrays


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
    fixes = pa.concat_tables(fx).cast(FIX_SCHEMA) if fx else empty_fixes()
    rejects = pa.concat_tables(rj) if rj else empty_rejects()
    return ParseResult(sort_fixes(fixes.combine_chunks()), rejects.combine_chunks(), nl, na, nr,
                       ni, dict(sorted(ignored.items()))), days


def parse_nmea(data: bytes, *, node: str, raw_hash: str, date: dt.date | None = None,
               chunk_bytes: int = CHUNK_BYTES,
               reference: tuple[dt.datetime, dt.datetime] | None = None,
               reference_text: str = "the survey") -> ParseResult:
    """Parse an NMEA 0183 log held in memory (see the module docstring for the rules).

    ``node`` and ``raw_hash`` are copied into every fix; ``date`` dates epochs of a log
    without RMC/ZDA; ``reference`` is the time window the log is expected in (the node's
    deployments; ``reference_text`` names it in notes), used to decide GPS week rollovers.
    Never raises on bad content: bad lines become rejects.
    """
    from archive.ingest.rollover import apply_rollover

    result, days = combine_with_days(memory_chunks(data, max(1, chunk_bytes), node=node,
                                         raw_hash=raw_hash, date=date))
    return apply_rollover(result, days, reference, data, reference_text)


def parse_log(data: bytes, options: LogOptions) -> ParseResult:
    """The ``nmea`` log format's parse function (:mod:`archive.ingest.formats`)."""
    return parse_nmea(data, node=options.node, raw_hash=options.raw_hash, date=options.date,
                      reference=options.reference, reference_text=options.reference_text)
