"""Property tests: whatever the bytes, readers never crash and account for every line."""

from __future__ import annotations

import re

import numpy as np
from archive.seeds.nmea_write import write_nmea
from hypothesis import given, settings
from hypothesis import strategies as st

from archive.ingest.delimited import parse_delimited
from archive.ingest.nmea import parse_nmea
from archive.ingest.profile import profile_from_dict
from archive.ingest.schema import FIX_SCHEMA, REJECT_REASONS, REJECT_SCHEMA

SAMPLE = write_nmea(np.array(["2024-03-01T23:59:58", "2024-03-01T23:59:59",
                              "2024-03-02T00:00:00"], dtype="datetime64[us]"),
                    [35.1, -35.2, 35.3], [-101.1, 101.2, -101.3], [900.0, 901.0, 902.0],
                    [-24.3, -24.3, -24.3], [1, 0, 4], [8, 9, 10], [0.9, 1.0, 1.1],
                    [1.5, 1.6, 1.7], [1.2, 1.3, 1.4])


def n_records(data: bytes, sentences: bool = True) -> int:
    """Records counted independently of the reader: the lines between line ends (CR, LF or
    CR LF), plus, in an NMEA log (``sentences``), one for every '$' after the first of a
    line (a line holding several sentences, joined by a lost line end, gives one record
    per sentence; a delimited log has one record a line whatever it holds)."""
    if not data:
        return 0
    parts = re.split(rb"\r\n|\r|\n", data)
    if parts[-1] == b"":
        parts = parts[:-1]
    if not sentences:
        return len(parts)
    return sum(1 + max(0, p.count(b"$") - 1) for p in parts)


def check(r, data: bytes, sentences: bool = True) -> None:
    assert r.n_accepted + r.n_rejected + r.n_ignored == r.n_lines == \
        n_records(data, sentences)
    assert r.rejects.num_rows == r.n_rejected
    assert r.fixes.schema.equals(FIX_SCHEMA, check_metadata=False)
    assert r.rejects.schema.equals(REJECT_SCHEMA, check_metadata=False)
    assert set(r.rejects.column("reason").to_pylist()) <= set(REJECT_REASONS)
    assert all(len(t) <= 120 for t in r.rejects.column("text").to_pylist())


@settings(max_examples=150, deadline=None)
@given(st.binary(max_size=600))
def test_nmea_random_bytes(data):
    check(parse_nmea(data, node="n", raw_hash="0" * 64), data)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.tuples(st.integers(0, len(SAMPLE)), st.binary(max_size=8)), max_size=6),
       st.integers(1, 400))
def test_nmea_damaged_log(edits, chunk):
    data = bytearray(SAMPLE)
    for pos, junk in edits:
        data[pos:pos + len(junk)] = junk
    data = bytes(data)
    r = parse_nmea(data, node="n", raw_hash="0" * 64, chunk_bytes=chunk)
    check(r, data)
    whole = parse_nmea(data, node="n", raw_hash="0" * 64)
    assert r.n_accepted == whole.n_accepted and r.fixes.equals(whole.fixes)


PROFILE = profile_from_dict({"columns": {"time": "t", "lat": "lat", "lon": "lon",
                                         "quality": "q"}})


@settings(max_examples=150, deadline=None)
@given(st.lists(st.one_of(st.binary(max_size=40),
                          st.sampled_from([b"2024-03-01T00:00:00Z,35.1,-101.2,1",
                                           b"2024-03-01T00:00:01Z,95.1,-101.2,1",
                                           b"x,y,z", b"", b"# comment"])), max_size=12))
def test_delimited_random_lines(lines):
    data = b"t,lat,lon,q\n" + b"\n".join(lines)
    check(parse_delimited(data, profile=PROFILE, node="n", raw_hash="0" * 64), data,
          sentences=False)


def test_a_delimited_line_of_dollar_signs_is_one_record():
    """Found by the test above: '$$' in a delimited log is one unreadable line (the
    sentence rule of NMEA logs does not apply)."""
    data = b"t,lat,lon,q\n$$"
    r = parse_delimited(data, profile=PROFILE, node="n", raw_hash="0" * 64)
    check(r, data, sentences=False)
    assert (r.n_lines, r.n_rejected, r.n_ignored) == (2, 1, 1)
