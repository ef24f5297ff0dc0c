"""Hostile input through the command line: never an internal error, always a clear message.

Whatever bytes a file holds, ``nodekeep load ...`` ends with exit code 0 (loaded), 1 (the
file refused, with a message naming it) or 2 (a usage error), never 70 (an internal error,
a traceback underneath). A log that loads keeps its raw bytes byte for byte and accounts for
every line (accepted + rejected + ignored = lines). Hypothesis writes the files: damaged
copies of a real log (flipped, inserted and cut bytes), random bytes, damaged SPS, CSV and
GeoTIFF headers.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from archive.store.archive import Archive
from tests.reliability.logs import node_log
from tests.support.cli import invoke
from tests.support.reliability import make_survey_archive

INTERNAL_ERROR = 70
SAMPLE = node_log(1001, 40)
PROFILE = """
[format]
delimiter = ","
header = true
[columns]
time = "utc"
lat = "lat"
lon = "lon"
height = "h"
quality = "q"
[time]
format = "iso8601"
[coordinates]
format = "degrees"
[height]
kind = "ellipsoidal"
"""
CSV_LOG = (b"utc,lat,lon,h,q\n2025-04-07T10:00:00Z,35.51,-99.49,410.2,1\n"
           b"2025-04-07T10:00:01Z,35.51,-99.49,410.4,1\n2025-04-07T10:00:02Z,35.51,-99.49,,0\n")
HYPOTHESIS = settings(max_examples=20, deadline=None,
                      suppress_health_check=[HealthCheck.function_scoped_fixture,
                                             HealthCheck.too_slow])


def n_records(data: bytes) -> int:
    """Records between line ends (CR, LF or CR LF), counted independently of the readers."""
    if not data:
        return 0
    parts = re.split(rb"\r\n|\r|\n", data)
    return len(parts) - (1 if parts[-1] == b"" else 0)


def nmea_records(data: bytes) -> int:
    """NMEA records: the lines, plus one for every '$' after the first of a line (a line
    holding several sentences, joined by a lost line end, gives one record per sentence)."""
    if not data:
        return 0
    parts = re.split(rb"\r\n|\r|\n", data)
    if parts[-1] == b"":
        parts = parts[:-1]
    return sum(1 + max(0, p.count(b"$") - 1) for p in parts)


@st.composite
def damaged(draw, sample: bytes) -> bytes:
    """``sample`` with bytes flipped, inserted and cut, or truncated anywhere."""
    data = bytearray(sample)
    for _ in range(draw(st.integers(0, 6))):
        at = draw(st.integers(0, len(data)))
        op = draw(st.sampled_from(["flip", "insert", "cut"]))
        if op == "flip" and at < len(data):
            data[at] ^= draw(st.integers(1, 255))
        elif op == "insert":
            data[at:at] = draw(st.binary(min_size=1, max_size=40))
        else:
            del data[at:at + draw(st.integers(1, 60))]
    if draw(st.booleans()):
        data = data[:draw(st.integers(0, len(data)))]
    return bytes(data)


@pytest.fixture(scope="module")
def hostile_arc(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_survey_archive(tmp_path_factory.mktemp("hostile") / "archive", None)


def _no_internal_error(r, *, as_json: bool = False) -> None:
    assert r.exit_code != INTERNAL_ERROR, r.output
    assert "Traceback" not in r.output and "internal error" not in r.output, r.output
    if r.exit_code and not as_json:
        assert "error: " in r.output, r.output


def _check_load(root: Path, path: Path, data: bytes, r, records=n_records) -> None:
    """A load either refused the file with a message naming it, or kept it whole."""
    _no_internal_error(r, as_json=True)
    report = json.loads(r.stdout)
    (f,) = report["files"]
    if f["status"] == "failed":
        # the message names the log, or the profile when the log does not fit it (a header
        # without the profile's columns)
        assert r.exit_code == 1 and (path.name in f["error"] or ".toml" in f["error"]), f
        return
    assert f["status"] in ("loaded", "already")
    with Archive.open(root) as arc:
        assert arc.objects.read_bytes(f["raw_hash"]) == data  # raw bytes kept as received
    if f["status"] == "loaded":
        assert f["n_accepted"] + f["n_rejected"] + f["n_ignored"] == f["n_lines"]
        assert f["n_lines"] == records(data)


@HYPOTHESIS
@given(data=st.one_of(damaged(SAMPLE), st.binary(max_size=300)))
def test_load_fixes_nmea_never_breaks(hostile_arc: Path, runner, tmp_path_factory, data):
    path = tmp_path_factory.mktemp("nmea") / "N4242.nmea"
    path.write_bytes(data)
    r = invoke(runner, hostile_arc, "load", "fixes", "--workers", "1", "--json", str(path))
    _check_load(hostile_arc, path, data, r, nmea_records)


@HYPOTHESIS
@given(data=st.one_of(damaged(CSV_LOG), st.binary(max_size=200)))
def test_load_fixes_delimited_never_breaks(hostile_arc: Path, runner, tmp_path_factory, data):
    folder = tmp_path_factory.mktemp("csv")
    (folder / "logger.toml").write_text(PROFILE, encoding="utf-8")
    path = folder / "N4343.csv"
    path.write_bytes(data)
    r = invoke(runner, hostile_arc, "load", "fixes", "--workers", "1", "--json", "--profile",
               str(folder / "logger.toml"), str(path))
    _check_load(hostile_arc, path, data, r)


@pytest.fixture(scope="module")
def inputs_sample(scenario) -> dict[str, bytes]:
    return {"stations": scenario.preplot.read_bytes(),
            "deployments": scenario.deployments.read_bytes(),
            "control": scenario.control.read_bytes(), "dem": scenario.dem.read_bytes()}


def _load_input(runner, root: Path, kind: str, path: Path):
    extra = ["--vertical-datum", "NAVD88"] if kind == "dem" else []
    return invoke(runner, root, "load", kind, *extra, str(path))


@HYPOTHESIS
@given(kind=st.sampled_from(["stations", "deployments", "control"]), seed=st.data())
def test_load_survey_inputs_never_break(hostile_arc, runner, tmp_path_factory, inputs_sample,
                                        kind, seed):
    data = seed.draw(st.one_of(damaged(inputs_sample[kind]), st.binary(max_size=200)))
    path = tmp_path_factory.mktemp(kind) / ("preplot.sps" if kind == "stations"
                                            else f"{kind}.csv")
    path.write_bytes(data)
    r = _load_input(runner, hostile_arc, kind, path)
    _no_internal_error(r)
    if r.exit_code:
        assert path.name in r.output, r.output  # the message names the file


@st.composite
def damaged_header(draw, tif: bytes) -> bytes:
    """A GeoTIFF with bytes of its header and tag directory overwritten, or cut short."""
    data = bytearray(tif)
    if draw(st.booleans()):
        return bytes(data[:draw(st.integers(0, 1024))])
    for _ in range(draw(st.integers(1, 8))):
        at = draw(st.integers(0, min(len(data), 512) - 1))
        data[at] = draw(st.integers(0, 255))
    return bytes(data)


@settings(max_examples=15, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(seed=st.data())
def test_load_dem_with_damaged_header_never_breaks(hostile_arc, runner, tmp_path_factory,
                                                   inputs_sample, seed):
    data = seed.draw(damaged_header(inputs_sample["dem"]))
    path = tmp_path_factory.mktemp("dem") / "lidar dem.tif"
    path.write_bytes(data)
    r = _load_input(runner, hostile_arc, "dem", path)
    _no_internal_error(r)
    if r.exit_code:
        assert path.name in r.output, r.output


# -- names, links and secrets -------------------------------------------------------------

NAMES = ["N 1001 copy (2).nmea", "nœud-1002 ✓ Kestrel.nmea", "Ñ" * 60 + ".nmea",
         "x" * 245 + ".nmea"]


@pytest.mark.parametrize("name", NAMES, ids=["spaces", "unicode", "long-unicode", "255-bytes"])
def test_awkward_file_names_load_and_keep_their_name(tmp_path, runner, name):
    root = make_survey_archive(tmp_path / "archive", None)
    path = tmp_path / name
    path.write_bytes(SAMPLE)
    r = invoke(runner, root, "load", "fixes", "--workers", "1", "--json", str(path))
    assert r.exit_code == 0, r.output
    (f,) = json.loads(r.stdout)["files"]
    assert f["status"] == "loaded" and f["path"] == str(path)
    r = invoke(runner, root, "logs", "--json")
    assert r.exit_code == 0, r.output
    assert str(path) in r.stdout or json.dumps(str(path))[1:-1] in r.stdout
    assert invoke(runner, root, "verify").exit_code == 0


def test_symlinks(tmp_path, runner):
    root = make_survey_archive(tmp_path / "archive", None)
    real = tmp_path / "real" / "N1001.nmea"
    real.parent.mkdir()
    real.write_bytes(SAMPLE)
    link = tmp_path / "N1001-link.nmea"
    link.symlink_to(real)
    r = invoke(runner, root, "load", "fixes", "--workers", "1", "--json", str(link))
    assert r.exit_code == 0, r.output
    (f,) = json.loads(r.stdout)["files"]
    with Archive.open(root) as arc:
        assert arc.objects.read_bytes(f["raw_hash"]) == SAMPLE  # the target's bytes
    # the same bytes through the real path are the same raw file
    r = invoke(runner, root, "load", "fixes", "--workers", "1", "--json", str(real))
    assert json.loads(r.stdout)["files"][0]["status"] == "already"
    # a dangling link and a link loop are refused with a message, not a traceback
    (tmp_path / "gone.nmea").symlink_to(tmp_path / "nowhere.nmea")
    (tmp_path / "loop-a.nmea").symlink_to(tmp_path / "loop-b.nmea")
    (tmp_path / "loop-b.nmea").symlink_to(tmp_path / "loop-a.nmea")
    for bad in ("gone.nmea", "loop-a.nmea"):
        r = invoke(runner, root, "load", "fixes", str(tmp_path / bad))
        _no_internal_error(r)
        assert r.exit_code != 0 and bad in r.output
    assert invoke(runner, root, "verify").exit_code == 0


@pytest.mark.postgres
def test_database_password_is_never_printed(tmp_path, runner, pg_url):
    from sqlalchemy.engine import make_url

    from archive.cli.main import cli

    secret = "Kestrel-s3cret-pw"
    url = make_url(pg_url).set(password=secret).render_as_string(hide_password=False)
    r = runner.invoke(cli, ["init", str(tmp_path / "arc"), "--db", url])
    outputs = [r.output]
    assert r.exit_code == 0, r.output
    root = tmp_path / "arc"
    for args in (["survey", "create", "Kestrel Flats 3D", "--crs", "EPSG:32614"],
                 ["history"], ["history", "--json"], ["verify"], ["verify", "--json"],
                 ["survey", "create", "Bad", "--crs", "EPSG:4326"],
                 ["load", "fixes", str(tmp_path / "missing.nmea")]):
        r = invoke(runner, root, *args)
        _no_internal_error(r)
        outputs.append(r.output)
    # a database that does not answer: the error names it, masked
    bad = make_url(url).set(port=1, database="nowhere").render_as_string(hide_password=False)
    r = runner.invoke(cli, ["init", str(tmp_path / "arc2"), "--db", bad])
    assert r.exit_code != 0
    outputs.append(r.output)
    r = runner.invoke(cli, ["init", str(tmp_path / "arc3"), "--db", url])  # already a catalog
    assert r.exit_code == 2
    outputs.append(r.output)
    for out in outputs:
        assert secret not in out, out
    assert "***" in outputs[-1]
