"""The NMEA reader gives one result however the log is cut, and fix order matches Arrow's sort.

A log read from a file arrives as blocks (:func:`iter_chunks`), a log held in memory is read
through windows of one buffer (:func:`parse_nmea`): both must give the same fixes, rejects
and line counts for any block size. ``sort_fixes`` skips the sort of a table already in order;
its result is checked against pyarrow's own stable sort (the reference).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from archive.seeds.nmea_write import write_nmea
from hypothesis import given, settings
from hypothesis import strategies as st

from archive.ingest.nmea import combine, has_checksums, iter_chunks, parse_nmea
from archive.ingest.result import sort_fixes

H = "0" * 64
N = 12
LOG = write_nmea(np.datetime64("2024-03-01T23:59:55", "us") + np.arange(N) * np.timedelta64(1, "s"),
                 np.linspace(35.1, 35.2, N), np.linspace(-101.1, -101.2, N), np.full(N, 900.0),
                 np.full(N, -24.3), np.arange(N) % 6, np.full(N, 9), np.full(N, 1.1),
                 np.full(N, 1.9), np.full(N, 1.5), gsa=True)


def blocks(data: bytes, size: int) -> list[bytes]:
    return [data[i:i + size] for i in range(0, len(data), size)] or [b""]


def same(a, b) -> None:
    assert a.fixes.equals(b.fixes) and a.rejects.equals(b.rejects)
    assert (a.n_lines, a.n_accepted, a.n_rejected, a.n_ignored) == \
        (b.n_lines, b.n_accepted, b.n_rejected, b.n_ignored)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, len(LOG)),
                          st.sampled_from([b"\r", b"\n", b"\r\n", b"$", b"*", b",", b"\t ",
                                           b"\x00\xff", b"", b"$GPZDA,"])), max_size=6),
       st.integers(8, 300))
def test_blocks_windows_and_whole_agree(edits, size):
    data = bytearray(LOG)
    for pos, junk in edits:
        data[pos:pos] = junk
    data = bytes(data)
    whole = parse_nmea(data, node="KF-0007", raw_hash=H)
    same(parse_nmea(data, node="KF-0007", raw_hash=H, chunk_bytes=size), whole)
    # blocks shorter than the first megabyte: say what the whole log says about checksums
    same(combine(iter_chunks(blocks(data, size), node="KF-0007", raw_hash=H,
                             checksummed=has_checksums(data))), whole)


def test_clean_log_cut_anywhere():
    whole = parse_nmea(LOG, node="KF-0007", raw_hash=H)
    assert whole.n_fixes == N and whole.n_rejected == 0
    for size in (1, 2, 7, 81, 82, 83, len(LOG) - 1, len(LOG)):
        same(combine(iter_chunks(blocks(LOG, size), node="KF-0007", raw_hash=H,
                                 checksummed=True)), whole)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(0, 3), min_size=2, max_size=40), st.booleans(), st.booleans())
def test_sort_fixes_matches_arrow_sort(seconds, shuffle, lines_down):
    base = parse_nmea(LOG, node="KF-0007", raw_hash=H).fixes
    m = len(seconds)
    t = base.slice(0, m) if m <= base.num_rows else pa.concat_tables([base] * 4).slice(0, m)
    times = np.datetime64("2024-03-01T00:00:00", "us") + np.array(
        sorted(seconds) if not shuffle else seconds) * np.timedelta64(1, "s")
    lines = np.arange(m, dtype=np.int64)[::-1] if lines_down else np.arange(m, dtype=np.int64)
    t = t.set_column(t.schema.get_field_index("time"), t.schema.field("time"),
                     pa.array(times, type=t.schema.field("time").type))
    t = t.set_column(t.schema.get_field_index("raw_line"), "raw_line", pa.array(lines))
    expected = t.sort_by([("time", "ascending"), ("raw_line", "ascending")])
    assert sort_fixes(t).equals(expected)


def test_windows_read_ahead_are_the_windows_in_order_and_errors_arrive_in_order(tmp_path):
    from archive.ingest.nmea_windows import file_windows, read_ahead

    path = tmp_path / "log.nmea"
    path.write_bytes(b"".join(b"$GPTXT,%06d*00\r\n" % i for i in range(20_000)))
    direct = [(bytes(w), f) for w, f in file_windows(path, 4096)]
    ahead = [(bytes(w), f) for w, f in read_ahead(file_windows(path, 4096))]
    assert ahead == direct and len(direct) > 50

    def failing():
        yield from file_windows(path, 4096)
        raise OSError("the disk went away")

    got = []
    with pytest.raises(OSError, match="went away"):
        for w, _ in read_ahead(failing()):
            got.append(bytes(w))
    assert got == [w for w, _ in direct]  # every window before the error
    gen = read_ahead(file_windows(path, 4096))
    next(gen)
    gen.close()  # stopping early ends the reading thread


def _epoch_cut_whole(iv, tod, a, b):
    """The cut read from every record of the window (the rule of ``_epoch_cut``'s
    docstring, written out directly)."""
    from archive.ingest import nmea_scan as ns
    from archive.ingest.nmea_chunks import _TIMED

    timed = [i for i in range(a, b) if _TIMED[iv[ns.S_KIND, i]]
             and iv[ns.S_STATUS, i] == ns.ST_ACCEPTED and tod[i] >= 0]
    if not timed:
        return b
    last = timed[-1]
    first_of_last = last
    for i in reversed(timed):
        if tod[i] != tod[last]:
            break
        first_of_last = i
    return first_of_last


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.integers(1, 3000), st.booleans()), min_size=0, max_size=8),
       st.integers(0, 2**32 - 1), st.integers(0, 50))
def test_epoch_cut_read_from_the_end_matches_the_whole_window(runs, seed, lead):
    """The cut is found from growing tails of the window: an epoch of thousands of records
    (a 20 Hz log's window holds many; a run of untimed lines) must give the cut the whole
    window gives."""
    from archive.ingest import nmea_scan as ns
    from archive.ingest.nmea_chunks import _epoch_cut

    rng = np.random.default_rng(seed)
    n = lead + sum(k for k, _ in runs)
    iv, tod, _ = ns.record_arrays(np.zeros(0, np.uint8), None, n + 2)
    kinds = [ns.K_GGA, ns.K_RMC, ns.K_GNS, ns.K_GLL, ns.K_ZDA, ns.K_GSA]
    iv[ns.S_KIND, :n] = rng.choice(kinds, n)
    iv[ns.S_STATUS, :n] = np.where(rng.random(n) < 0.9, ns.ST_ACCEPTED, ns.ST_CHECKSUM)
    at = lead
    tod[:n] = -1
    for k, timed in runs:  # runs of one time each (or untimed); times may repeat or go back
        if timed:
            tod[at:at + k] = int(rng.integers(0, 3)) * 1_000_000
        at += k
    assert _epoch_cut(iv, tod, lead, n) == _epoch_cut_whole(iv, tod, lead, n)


def test_values_view_reads_sliced_and_chunked_columns_and_refuses_others():
    """The buffers read as they are: a slice starts at its offset, chunks join; a column
    of another width, or with nulls, is refused (compared with pyarrow's own to_pylist)."""
    from archive.ingest.arrow_build import values_view

    a = pa.array(np.arange(10, dtype=np.int64))
    col = pa.chunked_array([a.slice(3, 4), pa.array(np.arange(5, dtype=np.int64))[:0],
                            a.slice(7)])
    assert values_view(col, np.int64).tolist() == col.to_pylist()
    t = pa.array(np.array([5, 7], dtype="datetime64[us]")).cast(pa.timestamp("us", "UTC"))
    assert values_view(t, np.int64).tolist() == [5, 7]
    with pytest.raises(TypeError):
        values_view(pa.array(np.arange(3, dtype=np.int32)), np.int64)
    with pytest.raises(TypeError):
        values_view(pa.array([1, None], pa.int64()), np.int64)
    with pytest.raises(TypeError):
        values_view(pa.array([True, False]), np.int8)
