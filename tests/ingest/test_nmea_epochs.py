"""Epochs assembled from every position sentence, and the quirks of real logs.

Field layouts: NMEA 0183 as described in E. S. Raymond, "NMEA Revealed" v2.24 (GGA, GNS,
RMC, GLL, GSA, ZDA sections). Published example sentences are marked with their source;
the others are built here with their checksum (XOR of the bytes between '$' and '*').
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pyarrow.compute as pc
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.ingest.test_nmea_sentences import G1, R1, S1, nmea, parse, row

# DePriest "NMEA data" GLL example (4916.45,N 12311.12,W at 22:54:44, status A; checksum 1D)
L1 = b"$GPGLL,4916.45,N,12311.12,W,225444,A,*1D"
# GNS of the same instant and place as G1 (field 6 mode 'AA' = autonomous GPS and GLONASS,
# field 7 satellites 11 across both, field 8 HDOP 0.8)
N1 = nmea("GNS,123519,4807.038,N,01131.000,E,AA,11,0.8,545.4,46.9,,", "GN")


def test_gll_example_alone_is_a_fix_without_quality():
    r = parse(L1, date=dt.date(2024, 5, 1))
    f = row(r)
    assert r.n_accepted == 1 and f["sentence"] == "GLL" and f["no_quality"]
    # DePriest: 4916.45,N = 49 deg 16.45 min; 12311.12,W = -(123 deg 11.12 min)
    assert f["lat"] == pytest.approx(49 + 16.45 / 60, abs=1e-12)
    assert f["lon"] == pytest.approx(-(123 + 11.12 / 60), abs=1e-12)
    assert f["time"] == dt.datetime(2024, 5, 1, 22, 54, 44, tzinfo=dt.UTC)
    assert f["valid"] and f["quality"] == -1 and f["n_sats"] is None and f["hdop"] is None


def test_gll_void_status_is_not_valid():
    r = parse(nmea("GLL,4916.45,N,12311.12,W,225444,V,N"), date=dt.date(2024, 5, 1))
    assert not row(r)["valid"]


L_G1 = nmea("GLL,4807.038,N,01131.000,E,123519,A,A")  # G1's place and time as a GLL


@pytest.mark.parametrize("lines,sentence,quality,sats,hdop,unrated", [
    ((G1, N1, R1, L_G1), "GGA", 1, 8, 0.9, False),
    ((N1, R1, L_G1), "GNS", 1, 11, 0.8, False),
    ((L_G1, R1), "RMC", -1, None, None, True),
    # a GSA gives DOPs: the fix can be screened and weighted by its HDOP
    ((R1, S1), "RMC", -1, None, 1.3, False),
    ((L_G1,), "GLL", -1, None, None, True),
])
def test_position_and_quality_from_the_best_sentence_present(lines, sentence, quality, sats,
                                                              hdop, unrated):
    r = parse(*lines, date=dt.date(1994, 3, 23))
    assert r.n_rejected == 0 and r.fixes.num_rows == 1
    f = row(r)
    assert f["sentence"] == sentence and f["quality"] == quality and f["n_sats"] == sats
    assert f["hdop"] == (pytest.approx(hdop) if hdop is not None else None)
    assert f["no_quality"] == unrated
    # all four sentences put the place at 48 deg 07.038 N, 11 deg 31.000 E (DePriest)
    assert f["lat"] == pytest.approx(48 + 7.038 / 60, abs=1e-12)
    assert f["time"] == dt.datetime(1994, 3, 23, 12, 35, 19, tzinfo=dt.UTC)


def test_gns_mode_letters_give_the_quality():
    # NMEA Revealed, GNS mode indicator: N no fix, A autonomous, D differential, R RTK fixed,
    # F RTK float, E estimated; the GGA quality codes of the same meaning are 0, 1, 2, 4, 5, 6
    want = {"N": 0, "A": 1, "D": 2, "R": 4, "F": 5, "E": 6}
    for mode, q in want.items():
        line = nmea(f"GNS,123519,4807.038,N,01131.000,E,{mode}{mode},11,0.8,545.4,46.9,,", "GN")
        f = row(parse(line, date=dt.date(2024, 5, 1)))
        assert f["quality"] == q and not f["no_quality"], mode


def test_conflicting_sentences_of_one_epoch_are_rejected_and_counted():
    far = R1.replace(b"4807.038", b"4807.138")  # 0.1 minute (185 m) north of the GGA
    far = nmea(far[3:far.index(b"*")].decode())
    r = parse(G1, S1, far)
    assert r.fixes.num_rows == 0 and r.reject_counts() == {"conflict": 2}
    assert sorted(r.rejects.column("raw_line").to_pylist()) == [1, 3]
    assert r.n_accepted + r.n_rejected + r.n_ignored == r.n_lines


def test_agreement_within_the_last_digit_of_the_coarser_sentence():
    # an RMC writing 4 decimals of minutes and a GGA writing 6 agree when they round alike
    gga = nmea("GGA,123519,4807.038449,N,01131.000049,E,1,08,0.9,545.4,M,46.9,M,,")
    rmc = nmea("RMC,123519,A,4807.0384,N,01131.0000,E,022.4,084.4,230394,003.1,W")
    r = parse(gga, rmc)
    assert r.n_rejected == 0 and row(r)["lat"] == pytest.approx(48 + 7.038449 / 60, abs=1e-12)
    off = nmea("RMC,123519,A,4807.0386,N,01131.0000,E,022.4,084.4,230394,003.1,W")
    assert parse(gga, off).reject_counts() == {"conflict": 2}


def test_two_dates_in_one_epoch_conflict():
    zda = nmea("ZDA,123519,24,03,1994,00,00")  # RMC R1 says 23 March 1994
    assert parse(G1, R1, zda).reject_counts() == {"conflict": 3}


def test_lowercase_checksum_hex_is_accepted():
    # NMEA 0183 writes the checksum in upper-case hex; some loggers write lower case
    # (common practice, no source). The value must still match.
    low = R1[:-2] + R1[-2:].lower()
    assert low.endswith(b"*6a")
    r = parse(G1, low)
    assert r.n_rejected == 0 and r.fixes.num_rows == 1 and r.n_accepted == 2
    wrong = R1[:-2] + b"6b"
    assert parse(G1, wrong, date=dt.date(1994, 3, 23)).reject_counts() == {"checksum": 1}


def test_empty_fields_are_nulls_not_zeros():
    gga = nmea("GGA,123519,4807.038,N,01131.000,E,1,,,,M,,M,,")
    f = row(parse(gga, R1))
    assert f["n_sats"] is None and f["hdop"] is None and f["h_msl"] is None
    assert f["quality"] == 1 and not f["no_quality"]


@pytest.mark.parametrize("hz", [1, 2, 5, 10, 20])
def test_sub_second_epochs_at_common_rates(hz):
    step = 1000 // hz
    lines = []
    for k in range(3 * hz):
        ms = k * step
        t = f"1235{19 + ms // 1000:02d}.{(ms % 1000) // 10:02d}"
        lines += [nmea(f"GGA,{t},4807.038,N,01131.000,E,1,08,0.9,545.4,M,46.9,M,,"),
                  nmea(f"RMC,{t},A,4807.038,N,01131.000,E,022.4,084.4,230394,003.1,W")]
    r = parse(*lines)
    t = r.fixes.column("time").cast("int64").to_numpy()
    assert r.fixes.num_rows == 3 * hz and (np.diff(t) == step * 1000).all()


def test_sentences_joined_by_a_lost_line_end_are_both_read():
    r = parse(G1 + R1, S1)
    assert r.n_rejected == 0 and r.fixes.num_rows == 1
    assert row(r)["pdop"] == pytest.approx(2.5) and row(r)["sentence"] == "GGA"


def test_sentence_split_by_a_stray_line_end_is_rejoined():
    # the checksum covers the joined text: only a true continuation is taken
    r = parse(G1[:20], G1[20:], R1)
    assert r.n_rejected == 0 and r.fixes.num_rows == 1 and row(r)["n_sats"] == 8
    assert r.n_lines == 3 and r.n_accepted + r.n_ignored == 3
    bad = parse(G1[:20], b"X" + G1[21:], R1)  # a damaged tail does not fit
    assert bad.fixes.column("sentence").to_pylist() == ["RMC"]


def test_unknown_and_proprietary_sentences_are_counted_by_type():
    lines = (G1, R1, nmea("VTG,054.7,T,034.4,M,005.5,N,010.2,K"), nmea("GSV,1,1,00"),
             nmea("UBX,00,123519.00", "P"), nmea("TXT,01,01,02,hello"), b"# a comment line")
    r = parse(*lines)
    assert r.ignored == {"VTG": 1, "GSV": 1, "PUBX": 1, "TXT": 1, "text": 1}


def test_one_node_many_overlapping_files_keep_one_fix_per_time(survey_arc, tmp_path):
    from archive.ingest.load import load_fix_files
    from archive.ingest.read import node_fixes
    from tests.support.fixlogs import log_bytes, survey_id

    a = log_bytes(300, "2024-03-01T10:00:00", seed=5)
    b = log_bytes(300, "2024-03-01T10:04:00", seed=5)  # 60 s of overlap with a
    d = tmp_path / "harvest"
    d.mkdir()
    (d / "KF-0009_part1.nmea").write_bytes(a)
    (d / "KF-0009_part2.nmea").write_bytes(b)
    sid = survey_id(survey_arc)
    rep = load_fix_files(survey_arc, sid, [d], node_pattern=r"^(KF-\d+)_")
    assert [f.status for f in rep.files] == ["loaded", "loaded"]
    t = node_fixes(survey_arc, sid, "KF-0009").column("time")
    assert len(t) == 540 and pc.count_distinct(t).as_py() == 540


# -- an epoch is the best sentence present, whatever the mix (property) -----------------

_KINDS = ("GGA", "GNS", "RMC", "GLL")


def _sentence(kind: str, hhmmss: str) -> bytes:
    body = {
        "GGA": f"GGA,{hhmmss},4807.038,N,01131.000,E,1,08,0.9,545.4,M,46.9,M,,",
        "GNS": f"GNS,{hhmmss},4807.038,N,01131.000,E,AA,11,0.8,545.4,46.9,,",
        "RMC": f"RMC,{hhmmss},A,4807.038,N,01131.000,E,022.4,084.4,230394,003.1,W",
        "GLL": f"GLL,4807.038,N,01131.000,E,{hhmmss},A,A",
    }[kind]
    return nmea(body, "GN" if kind == "GNS" else "GP")


@settings(max_examples=60, deadline=None)
@given(st.lists(st.lists(st.sampled_from(_KINDS), min_size=1, max_size=4, unique=True),
                min_size=1, max_size=12),
       st.randoms(use_true_random=False))
def test_epoch_takes_the_best_sentence_present(epochs, rnd):
    lines, want = [], []
    for k, kinds in enumerate(epochs):
        kinds = list(kinds)
        rnd.shuffle(kinds)  # any order inside the epoch
        hhmmss = f"1235{10 + k:02d}"
        lines += [_sentence(x, hhmmss) for x in kinds]
        want.append(min(kinds, key=_KINDS.index))
    r = parse(*lines, date=dt.date(1994, 3, 23))
    assert r.n_rejected == 0 and r.n_accepted == len(lines)
    assert r.fixes.column("sentence").to_pylist() == want
    assert r.fixes.column("no_quality").to_pylist() == [w in ("RMC", "GLL") for w in want]
