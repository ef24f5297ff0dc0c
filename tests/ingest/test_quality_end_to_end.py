"""Fixes without quality information and GPS week rollovers, from the logs to the report.

Four nodes deployed on four stations in April 2019 (Kestrel Flats 3D, invented): KF-0001
logs GGA+GSA+RMC but with the dates of a receiver caught by the GPS week rollover (1024
weeks early, 1999); KF-0002 logs RMC only; KF-0003 GNS only; KF-0004 GLL only (the last two
carry no date: loaded with --date). Everything goes through the command line.
"""

from __future__ import annotations

import datetime as dt
import json
import re

import numpy as np
import pytest
from archive.seeds.nmea_write import write_nmea
from pyproj import Transformer

from tests.support.cli import SURVEY_EPSG, invoke

T0 = np.datetime64("2019-04-07T00:00:00", "us")
N = 1800  # 30 minutes at 1 Hz
ROLL = np.timedelta64(1024 * 7 * 86400, "s")  # 1024 GPS weeks (IS-GPS-200 week number range)
STATIONS = {("1001", "2001"): (612000.0, 3890000.0), ("1001", "2002"): (612025.0, 3890000.0),
            ("1001", "2003"): (612050.0, 3890000.0), ("1001", "2004"): (612075.0, 3890000.0)}


def _checksummed(body: str) -> bytes:
    cs = 0
    for c in body.encode():
        cs ^= c
    return f"${body}*{cs:02X}\r\n".encode()


def _as(kind: str, log: bytes) -> bytes:
    """The log's GGA sentences rewritten as GNS or GLL sentences of the same epochs (NMEA
    0183 field order: GNS time, lat, N/S, lon, E/W, mode, satellites, HDOP, altitude,
    separation; GLL lat, N/S, lon, E/W, time, status, mode)."""
    out = []
    for line in log.splitlines():
        if not line.startswith(b"$GPGGA"):
            continue
        f = line[1:line.index(b"*")].decode().split(",")
        t, lat, ns, lon, ew, sats, hdop, alt, sep = f[1], f[2], f[3], f[4], f[5], f[7], \
            f[8], f[9], f[11]
        if kind == "GNS":
            out.append(_checksummed(f"GNGNS,{t},{lat},{ns},{lon},{ew},AA,{sats},{hdop},{alt},"
                                    f"{sep},,"))
        else:
            out.append(_checksummed(f"GPGLL,{lat},{ns},{lon},{ew},{t},A,A"))
    return b"".join(out)


def _log(e: float, n: float, seed: int, *, shift: np.timedelta64 | None = None) -> bytes:
    rng = np.random.default_rng(seed)
    lon, lat = Transformer.from_crs(f"EPSG:{SURVEY_EPSG}", "EPSG:4326",
                                    always_xy=True).transform(e, n)
    t = T0 + np.arange(N) * np.timedelta64(1, "s")
    if shift is not None:
        t = t - shift
    m = 1.5 / 111_000  # about 1.5 m of scatter
    return write_nmea(t, lat + rng.normal(0, m, N), lon + rng.normal(0, m, N),
                      rng.normal(300, 2, N), np.full(N, -26.0), np.ones(N, int),
                      rng.integers(7, 12, N), rng.uniform(0.7, 1.4, N), rng.uniform(1.2, 2.2, N),
                      rng.uniform(1.0, 2.0, N))


@pytest.fixture
def loaded(survey_arc, runner, tmp_path):
    root = survey_arc.root
    pre = tmp_path / "preplot.csv"
    pre.write_text("line,point,easting,northing\n" + "".join(
        f"{ln},{pt},{e},{n}\n" for (ln, pt), (e, n) in STATIONS.items()))
    assert invoke(runner, root, "load", "stations", str(pre)).exit_code == 0
    dep = tmp_path / "deployments.csv"
    dep.write_text("node,line,point,deployed_utc,retrieved_utc\n" + "".join(
        f"KF-000{k},1001,200{k},2019-04-06T18:00:00Z,2019-04-07T06:00:00Z\n"
        for k in range(1, 5)))
    assert invoke(runner, root, "load", "deployments", str(dep)).exit_code == 0
    logs = tmp_path / "harvest"
    logs.mkdir()
    (logs / "KF-0001.nmea").write_bytes(_log(*STATIONS["1001", "2001"], 1, shift=ROLL))
    rmc = b"".join(ln for ln in _log(*STATIONS["1001", "2002"], 2).splitlines(keepends=True)
                   if ln.startswith(b"$GPRMC"))
    (logs / "KF-0002.nmea").write_bytes(rmc)
    r = invoke(runner, root, "load", "fixes", str(logs))
    assert r.exit_code == 0, r.output + r.stderr
    undated = tmp_path / "undated"
    undated.mkdir()
    (undated / "KF-0003.nmea").write_bytes(_as("GNS", _log(*STATIONS["1001", "2003"], 3)))
    (undated / "KF-0004.nmea").write_bytes(_as("GLL", _log(*STATIONS["1001", "2004"], 4)))
    r = invoke(runner, root, "load", "fixes", str(undated), "--date", "2019-04-07")
    assert r.exit_code == 0, r.output + r.stderr
    return root


def test_logs_show_the_rollover_note_and_the_fixes_without_quality(loaded, runner):
    r = invoke(runner, loaded, "logs", "--json")
    rows = {x["node"]: x for x in json.loads(r.output)}
    a, b = rows["KF-0001"], rows["KF-0002"]
    assert a["n_no_quality"] == 0 and b["n_no_quality"] == N
    assert rows["KF-0003"]["n_no_quality"] == 0 and rows["KF-0003"]["n_fixes"] == N
    assert rows["KF-0004"]["n_no_quality"] == N and rows["KF-0004"]["n_fixes"] == N
    (note,) = a["notes"]
    assert note["kind"] == "week-rollover" and note["weeks"] == 1024
    assert note["logged"][0] == "1999-08-22" and note["dated"][0] == "2019-04-07"
    assert a["t_first"].startswith("2019-04-07T00:00:00")
    assert b["notes"] == [] and b["ignored"] == {}
    assert a["ignored"] == {}  # GGA, GSA and RMC are all read
    text = invoke(runner, loaded, "logs").output
    assert "no quality" in text and "notes:" in text
    assert re.search(r"KF-0001 \S*KF-0001\.nmea: 1800 epochs \(lines 1-5398\) logged "
                     r"1999-08-22 moved \+1024 weeks to 2019-04-07: before the deployments "
                     r"of node KF-0001 \(2019-04-06\.\.2019-04-07\) \(GPS week rollover\)",
                     text), text


def _show(runner, root, line, point, *extra):
    r = invoke(runner, root, "show", line, point, "--json", *extra)
    assert r.exit_code == 0, r.output
    return json.loads(r.output)


def test_solve_accepts_rmc_only_fixes_and_flags_the_station(loaded, runner, tmp_path):
    r = invoke(runner, loaded, "solve")
    assert r.exit_code == 0, r.output + r.stderr
    a = _show(runner, loaded, "1001", "2001")
    b = _show(runner, loaded, "1001", "2002")
    c = _show(runner, loaded, "1001", "2003")
    d = _show(runner, loaded, "1001", "2004")
    ra, rb, rc, rd = a["rows"][0], b["rows"][0], c["rows"][0], d["rows"][0]
    for row in (ra, rc):  # GGA and GNS epochs carry their quality
        assert row["n_no_quality"] == 0 and "quality-unknown" not in row["flags"]
    for row in (rb, rd):  # RMC-only and GLL-only epochs do not
        assert row["n_no_quality"] == row["n_used"] > 0.9 * N
        assert "quality-unknown" in row["flags"].split(";")
    assert b["no_quality"] == "accept"
    # every station within half a metre of its preplot: the synthetic scatter is 1.5 m
    for row, key in zip((ra, rb, rc, rd), STATIONS, strict=True):
        e, n = STATIONS[key]
        assert np.hypot(row["easting"] - e, row["northing"] - n) < 0.5
    text = invoke(runner, loaded, "show", "1001", "2002").output
    assert f"no quality {rb['n_no_quality']} of the used fixes (RMC/GLL only; " \
           "screen.no_quality = accept)" in text
    # the station traced back to its raw log shows the rollover note of KF-0001
    tr = invoke(runner, loaded, "trace", "1001", "2001").output
    assert "note: 1800 epochs (lines 1-5398) logged 1999-08-22 moved +1024 weeks" in tr
    rep = tmp_path / "report.html"
    r = invoke(runner, loaded, "report", "--to", str(rep), "-q")
    assert r.exit_code == 0, r.output + r.stderr
    html = rep.read_text()
    assert "Fixes without quality information" in html
    assert "2 of 4 delivered stations used fixes without quality information" in html


def test_screen_rejects_them_when_asked_and_leaves_the_others_alone(loaded, runner, tmp_path):
    assert invoke(runner, loaded, "solve").exit_code == 0
    before = _show(runner, loaded, "1001", "2001")["rows"][0]
    params = tmp_path / "strict.toml"
    params.write_text('[screen]\nno_quality = "reject"\n')
    r = invoke(runner, loaded, "solve", "--params", str(params), "--label", "strict")
    assert r.exit_code == 0, r.output + r.stderr
    a = _show(runner, loaded, "1001", "2001")
    b = _show(runner, loaded, "1001", "2002")
    assert b["no_quality"] == "reject"
    rb = b["rows"][0]
    assert rb["n_used"] == 0 and "unoccupied" in rb["flags"]
    assert _show(runner, loaded, "1001", "2004")["rows"][0]["n_used"] == 0  # GLL only
    assert _show(runner, loaded, "1001", "2003")["rows"][0]["n_used"] > 0.9 * N  # GNS
    ra = a["rows"][0]
    assert (ra["easting"], ra["northing"], ra["n_used"]) == \
        (before["easting"], before["northing"], before["n_used"])
    bad = tmp_path / "bad.toml"
    bad.write_text('[screen]\nno_quality = "maybe"\n')
    r = invoke(runner, loaded, "solve", "--params", str(bad))
    assert r.exit_code != 0 and "screen.no_quality 'maybe' is unknown" in r.stderr


def test_deployment_far_from_any_rollover_refuses_the_dates(survey_arc, runner, tmp_path):
    root = survey_arc.root
    dep = tmp_path / "deployments.csv"
    pre = tmp_path / "preplot.csv"
    pre.write_text("line,point,easting,northing\n1001,2001,612000,3890000\n")
    assert invoke(runner, root, "load", "stations", str(pre)).exit_code == 0
    dep.write_text("node,line,point,deployed_utc,retrieved_utc\n"
                   "KF-0003,1001,2001,2031-01-10T00:00:00Z,2031-01-12T00:00:00Z\n")
    assert invoke(runner, root, "load", "deployments", str(dep)).exit_code == 0
    logs = tmp_path / "harvest"
    logs.mkdir()
    (logs / "KF-0003.nmea").write_bytes(_log(612000.0, 3890000.0, 3, shift=ROLL))
    r = invoke(runner, root, "load", "fixes", str(logs))
    # nothing is left to load: every date was refused, so the file fails, saying why
    assert r.exit_code != 0
    assert "rollover" in (r.output + r.stderr)
    assert dt.date(1999, 8, 22) + dt.timedelta(weeks=1024) == dt.date(2019, 4, 7)
