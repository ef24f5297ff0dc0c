"""Real receiver captures: nodekeep's fixes against the decoder output shipped with them.

The captures and the positions their source's own decoder produced from them are in
``tests/data/nmea_captures`` (see PROVENANCE.md there: repository, path, commit, licence).
Every check below compares nodekeep with that outside output, or with what the capture's
own sentences say, never with values nodekeep produced earlier.
"""

from __future__ import annotations

import csv
import datetime as dt
from collections import Counter
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest

from archive.ingest.nmea import parse_nmea
from archive.ingest.result import ParseResult

CAPTURES = Path(__file__).resolve().parents[1] / "data" / "nmea_captures"
NAMES = ("rmc_week_rollover", "gga_rmc_10hz", "gns_multi_talker", "gll_zda_ais")
TOL_DEG = 1e-6  # the decoder prints 9 decimals; nodekeep must agree to 1e-6 degree
US_PER_DAY = 86_400_000_000
# The rollover capture was logged just after 6 April 2019 (its header says so): the node's
# deployment window used as the reference for its dates.
APRIL_2019 = (dt.datetime(2019, 4, 1, tzinfo=dt.UTC), dt.datetime(2019, 4, 30, tzinfo=dt.UTC))


def expected(name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(time µs since 1970, lat, lon) of the decoder's position reports of a capture."""
    with open(CAPTURES / f"{name}.expected.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    t = np.array([np.datetime64(r["time"].rstrip("Z"), "us").astype(np.int64) for r in rows])
    return t, np.array([float(r["lat"]) for r in rows]), np.array([float(r["lon"]) for r in rows])


def read(name: str, keep: tuple[str, ...] | None = None, **kw) -> ParseResult:
    """nodekeep's reading of a capture; ``keep`` keeps only lines whose sentence type (the
    three letters after the talker) is listed, to make one-sentence logs of real data."""
    data = (CAPTURES / f"{name}.log").read_bytes()
    if keep is not None:
        data = b"".join(line for line in data.splitlines(keepends=True)
                        if line[:1] == b"$" and line[3:6].decode() in keep)
    if name == "rmc_week_rollover":
        kw.setdefault("reference", APRIL_2019)
    return parse_nmea(data, node="CAPTURE", raw_hash="0" * 64, **kw)


def matched(fixes: pa.Table, t: np.ndarray, lat: np.ndarray, lon: np.ndarray, *,
            time_of_day: bool = False) -> np.ndarray:
    """Per expected report: nodekeep has a fix at the same UTC time (to the microsecond;
    time of day only when ``time_of_day``) within TOL_DEG in latitude and longitude."""
    ft = pc.cast(fixes.column("time"), pa.int64()).to_numpy()
    flat = fixes.column("lat").to_numpy(zero_copy_only=False)
    flon = fixes.column("lon").to_numpy(zero_copy_only=False)
    if time_of_day:
        ft, t = ft % US_PER_DAY, t % US_PER_DAY
    same = ft[None, :] == t[:, None]
    close = (np.abs(flat[None, :] - lat[:, None]) <= TOL_DEG) & \
        (np.abs(flon[None, :] - lon[:, None]) <= TOL_DEG)
    return (same & close).any(axis=1)


@pytest.mark.parametrize("name", NAMES)
def test_capture_positions_agree_with_the_decoder(name):
    t, lat, lon = expected(name)
    res = read(name)
    ok = matched(res.fixes, t, lat, lon, time_of_day=name == "rmc_week_rollover")
    # the floor is 98 % recovered; these excerpts hold no epoch nodekeep should miss
    assert ok.mean() >= 0.98 and ok.all(), (name, np.flatnonzero(~ok))
    assert res.n_accepted + res.n_rejected + res.n_ignored == res.n_lines


def test_all_captures_recovered_at_least_98_percent():
    hits = total = 0
    for name in NAMES:
        t, lat, lon = expected(name)
        ok = matched(read(name).fixes, t, lat, lon, time_of_day=name == "rmc_week_rollover")
        hits, total = hits + int(ok.sum()), total + ok.size
    assert total >= 50 and hits / total >= 0.98


def test_rmc_only_log_of_real_data_is_read_and_marked_without_quality():
    # the 10 Hz capture with its GGA lines dropped: every RMC alone must give the same position
    t, lat, lon = expected("gga_rmc_10hz")
    res = read("gga_rmc_10hz", keep=("RMC",))
    assert matched(res.fixes, t, lat, lon).all()
    assert res.fixes.column("sentence").unique().to_pylist() == ["RMC"]
    assert pc.all(res.fixes.column("no_quality")).as_py()
    assert res.fixes.column("quality").unique().to_pylist() == [-1]
    assert pc.all(pc.is_null(res.fixes.column("hdop"))).as_py()
    # with its GGA the same epochs carry quality information
    full = read("gga_rmc_10hz")
    assert not pc.any(full.fixes.column("no_quality")).as_py()
    assert full.fixes.column("sentence").unique().to_pylist() == ["GGA"]


def test_rollover_capture_is_rmc_only_too():
    res = read("rmc_week_rollover")
    assert res.fixes.column("no_quality").to_pylist() == [True]


def test_ten_hertz_capture_keeps_every_epoch_across_a_talker_change():
    res = read("gga_rmc_10hz")
    text = (CAPTURES / "gga_rmc_10hz.log").read_text()
    talkers = Counter(line[1:3] for line in text.splitlines() if line.startswith("$"))
    assert set(talkers) == {"GN", "GP"}  # the capture switches from GN to GP mid-way
    t = pc.cast(res.fixes.column("time"), pa.int64()).to_numpy()
    assert t.size == sum(talkers.values()) // 2  # one GGA + one RMC per epoch: one fix each
    assert (np.diff(t) == 100_000).all()  # 10 Hz: 100 ms apart, none merged or lost
    assert res.n_rejected == 0
    # the date comes from the RMC of each epoch (180320 = 2020-03-18)
    assert {d.date() for d in res.fixes.column("time").to_pylist()} == {dt.date(2020, 3, 18)}


def test_gns_capture_gives_positions_and_satellites_of_all_constellations():
    t, lat, lon = expected("gns_multi_talker")
    text = (CAPTURES / "gns_multi_talker.log").read_text().splitlines()
    gns = {ln.split(",")[1]: ln.split(",") for ln in text if ln.startswith("$GNGNS")
           and ln.split(",")[2]}
    gga = {ln.split(",")[1]: ln.split(",") for ln in text if ln.startswith("$GPGGA")
           and ln.split(",")[1]}
    only = read("gns_multi_talker", keep=("GNS", "RMC", "GSA"))  # GGA dropped
    assert matched(only.fixes, t, lat, lon).all()
    assert only.fixes.column("sentence").unique().to_pylist() == ["GNS"]
    assert not pc.any(only.fixes.column("no_quality")).as_py()
    # satellites in use: the GNS field counts all constellations (NMEA 0183 GNS field 7)
    times = [x.strftime("%H%M%S.%f")[:9] for x in only.fixes.column("time").to_pylist()]
    sats = dict(zip(times, only.fixes.column("n_sats").to_pylist(), strict=True))
    assert sats == {k: int(v[7]) for k, v in gns.items()}
    # GNS mode 'A' (autonomous) is the GGA quality 1 the same receiver logged beside it
    assert only.fixes.column("quality").unique().to_pylist() == \
        sorted({int(v[6]) for v in gga.values()})
    # PDOP from the GSA of the epoch (field 15; stored as float32)
    gsa = [ln.split(",") for ln in text if ln.startswith("$GPGSA") and ln.split(",")[2] == "3"]
    np.testing.assert_allclose(only.fixes.column("pdop").to_numpy(), [float(g[15]) for g in gsa],
                               rtol=1e-6)


def test_gll_capture_dated_by_zda():
    t, lat, lon = expected("gll_zda_ais")
    res = read("gll_zda_ais", keep=("GLL", "ZDA"))
    assert matched(res.fixes, t, lat, lon).all()
    assert res.fixes.column("sentence").unique().to_pylist() == ["GLL"]
    assert pc.all(res.fixes.column("no_quality")).as_py()
    assert {d.date() for d in res.fixes.column("time").to_pylist()} == {dt.date(2011, 6, 1)}


def test_unused_sentences_of_a_capture_are_counted_by_type():
    res = read("gll_zda_ais")
    lines = (CAPTURES / "gll_zda_ais.log").read_text().splitlines()
    want: Counter[str] = Counter()
    for ln in lines:
        if not ln.strip():
            want["blank"] += 1
        elif ln[0] == "$" and ln[1] == "P":
            want[ln[1:].split(",")[0]] += 1  # proprietary: the whole address
        elif ln[0] in "$!" and ln[3:6] not in ("GGA", "GLL", "RMC", "ZDA"):
            want[ln[3:6]] += 1
        elif ln[0] not in "$!":
            want["text"] += 1
    assert res.ignored == dict(want)
    assert {"VDM", "VDO", "HDT", "PFEC"} <= set(res.ignored)


def test_week_rollover_capture_moved_with_a_note():
    res = read("rmc_week_rollover")
    fix = res.fixes.to_pylist()
    assert len(fix) == 1
    # RMC date 22 08 99 read as 1999-08-22, +1024 weeks (the GPS week number's range, IS-GPS-200)
    assert dt.date(1999, 8, 22) + dt.timedelta(weeks=1024) == dt.date(2019, 4, 7)
    assert fix[0]["time"] == dt.datetime(2019, 4, 7, 0, 2, 31, 420000, tzinfo=dt.UTC)
    assert fix[0]["weeks_added"] == 1024
    (note,) = res.notes
    assert note["kind"] == "week-rollover" and note["weeks"] == 1024
    assert note["logged"] == ["1999-08-22", "1999-08-22"]
    assert note["dated"] == ["2019-04-07", "2019-04-07"]
    # the RMC with the date field '2208-1' is a reject, not a guess
    assert res.reject_counts() == {"malformed": 1}


def test_week_rollover_capture_without_evidence_is_left_alone():
    res = read("rmc_week_rollover", reference=None)
    assert [f["time"].date() for f in res.fixes.to_pylist()] == [dt.date(1999, 8, 22)]
    assert res.notes == [] and res.fixes.column("weeks_added").to_pylist() == [0]


def test_week_rollover_capture_refused_when_no_shift_fits():
    far = (dt.datetime(2031, 1, 1, tzinfo=dt.UTC), dt.datetime(2031, 2, 1, tzinfo=dt.UTC))
    res = read("rmc_week_rollover", reference=far)
    assert res.n_fixes == 0
    assert res.reject_counts() == {"malformed": 1, "rollover": 1}
    (note,) = res.notes
    assert note["kind"] == "week-rollover-refused" and note["lines"] == [16, 16]


def test_no_capture_is_refused_whole(survey_arc, tmp_path):
    import shutil

    from archive.ingest.load import load_fix_files
    from tests.support.fixlogs import survey_id

    d = tmp_path / "captures"
    d.mkdir()
    for name in NAMES:
        shutil.copy(CAPTURES / f"{name}.log", d / f"{name}.log")
    rep = load_fix_files(survey_arc, survey_id(survey_arc), [d], workers=1)
    assert [(f.node, f.status) for f in rep.files] == [(n, "loaded") for n in sorted(NAMES)]
    assert all(f.n_fixes > 0 for f in rep.files)
