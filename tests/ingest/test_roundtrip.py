"""Writer and reader together: known coordinates -> NMEA text -> fixes, within field precision.

The writer is checked independently against pynmea2 (a reference NMEA library), which
parses every sentence with checksum checking on; the reader is checked against the known
input values.
"""

from __future__ import annotations

import numpy as np
import pynmea2
import pytest
from archive.seeds.nmea_write import write_nmea

from archive.ingest.nmea import parse_nmea


def epochs(n: int, seed: int = 7):
    rng = np.random.default_rng(seed)
    t0 = np.datetime64("2024-03-01T23:58:00", "us")
    times = t0 + np.arange(n) * np.timedelta64(1, "s")
    lat = rng.uniform(-89.9, 89.9, n)
    lon = rng.uniform(-179.9, 179.9, n)
    h = rng.uniform(-400, 5000, n)
    sep = rng.uniform(-100, 80, n)
    q = np.arange(n) % 9
    sats = rng.integers(0, 40, n)
    hdop, pdop, vdop = rng.uniform(0.4, 20, (3, n))
    return times, lat, lon, h, sep, q, sats, hdop, pdop, vdop


def test_writer_checked_by_pynmea2():
    times, lat, lon, h, sep, q, sats, hdop, pdop, vdop = epochs(200)
    text = write_nmea(times, lat, lon, h, sep, q, sats, hdop, pdop, vdop, talker="GN")
    lines = text.decode("ascii").split("\r\n")[:-1]
    assert len(lines) == 600
    ggas = [pynmea2.parse(s, check=True) for s in lines[0::3]]  # raises on a bad checksum
    rmcs = [pynmea2.parse(s, check=True) for s in lines[2::3]]
    assert [g.talker for g in ggas[:1]] == ["GN"]
    np.testing.assert_allclose([g.latitude for g in ggas], lat, atol=1e-5 / 60 / 2 + 1e-12)
    np.testing.assert_allclose([g.longitude for g in ggas], lon, atol=1e-5 / 60 / 2 + 1e-12)
    np.testing.assert_allclose([float(g.altitude) for g in ggas], h, atol=0.05 + 1e-9)
    np.testing.assert_array_equal([g.gps_qual for g in ggas], q)
    assert rmcs[0].datestamp.isoformat() == "2024-03-01"
    assert rmcs[-1].datestamp.isoformat() == "2024-03-02"  # after midnight
    assert len(max(lines, key=len)) + 2 <= 82  # NMEA 0183 sentence length limit


@pytest.mark.parametrize("end", [b"\r\n", b"\n"])
def test_round_trip_within_field_precision(end):
    times, lat, lon, h, sep, q, sats, hdop, pdop, vdop = epochs(5000)
    text = write_nmea(times, lat, lon, h, sep, q, sats, hdop, pdop, vdop, line_end=end)
    r = parse_nmea(text, node="KF-0042", raw_hash="0" * 64, chunk_bytes=64 << 10)
    assert (r.n_lines, r.n_accepted, r.n_rejected) == (15000, 15000, 0)
    f = r.fixes
    np.testing.assert_array_equal(f.column("time").to_numpy().astype("datetime64[us]"), times)
    # ddmm.mmmmm: 1e-5 minute, so at most half of 1e-5/60 degree off
    tol = 0.5e-5 / 60 + 1e-12
    np.testing.assert_allclose(f.column("lat").to_numpy(), lat, rtol=0, atol=tol)
    np.testing.assert_allclose(f.column("lon").to_numpy(), lon, rtol=0, atol=tol)
    np.testing.assert_allclose(f.column("h_msl").to_numpy(), h, rtol=0, atol=0.05 + 1e-9)
    np.testing.assert_allclose(f.column("geoid_sep").to_numpy(), sep, rtol=0, atol=0.05 + 1e-9)
    np.testing.assert_allclose(f.column("h_ell").to_numpy(), h + sep, rtol=0, atol=0.1 + 1e-9)
    for name, v in (("hdop", hdop), ("pdop", pdop), ("vdop", vdop)):
        np.testing.assert_allclose(f.column(name).to_numpy(), v, rtol=0, atol=0.005 + 1e-6)
    np.testing.assert_array_equal(f.column("quality").to_numpy(), q)
    np.testing.assert_array_equal(f.column("n_sats").to_numpy(), sats)
    # RMC status V for 0, 6, 7, 8 (see write_nmea); valid needs quality > 0 and status A
    np.testing.assert_array_equal(f.column("valid").to_numpy(zero_copy_only=False),
                                  np.isin(q, (1, 2, 3, 4, 5)))
