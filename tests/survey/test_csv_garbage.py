"""The CSV readers never crash on garbage: a table, or an InputError naming the file."""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from archive.errors import InputError
from archive.survey.deployments import read_deployments
from archive.survey.stations import read_control, read_stations

HEADERS = {
    "stations": "line,point,easting,northing\n",
    "control": "line,point,easting,northing,height,surveyed_utc\n",
    "deployments": "node,line,point,deployed_utc,retrieved_utc\n",
}
READERS = {
    "stations": lambda d: read_stations(d, "f.csv", "csv"),
    "control": lambda d: read_control(d, "f.csv", "csv"),
    "deployments": lambda d: read_deployments(d, "f.csv"),
}
cell = st.text(alphabet="0123456789.-:TZ ,x\"\n", max_size=12)


@settings(max_examples=200, deadline=None)
@given(st.sampled_from(sorted(READERS)), st.lists(cell, max_size=25), st.binary(max_size=40))
def test_garbage_never_crashes(kind, cells, tail):
    data = (HEADERS[kind] + ",".join(cells)).encode() + tail
    try:
        parsed = READERS[kind](data)
    except InputError as exc:
        assert str(exc).startswith("f.csv")
        return
    t = parsed.table
    # every record kept points back at a line of the file
    assert t.num_rows <= data.count(b"\n") + 1
    assert all(1 < n <= data.count(b"\n") + 1 for n in t["src_line"].to_pylist())


DEP_OK = ("node,line,point,deployed_utc,retrieved_utc\n"
          "N101,1001,5001,2025-04-07T14:03:33Z,2025-04-07T23:02:30Z\n")


def _refusal(data: bytes) -> InputError:
    try:
        read_deployments(data, "dep.csv")
    except InputError as exc:
        return exc
    raise AssertionError("accepted")


def test_a_deployment_time_needs_a_time_of_day():
    # A record cut inside its time reads as a year and month (2025-04, the 1st at
    # midnight to a lenient parser); a bare date is midnight too: a node is laid out at a
    # moment, not on a day (ISO 8601 date-time: YYYY-MM-DDThh:mm[:ss][Z]).
    for value in ("2025-04", "2025-04-07", "2025", "2025-04-07T14"):
        exc = _refusal((DEP_OK + f"N102,1001,5002,{value},2025-04-07T23:05:07Z\n").encode())
        assert exc.line == 3 and value in str(exc) and "time of day" in str(exc)
    t = read_deployments((DEP_OK + "N102,1001,5002,2025-04-07 14:07+01:00,\n").encode(),
                         "dep.csv").table
    assert t["deployed"].to_pylist()[1].isoformat() == "2025-04-07T13:07:00+00:00"
    assert t["retrieved"].to_pylist()[1] is None  # still in the ground
    # the basic format (ISO 8601 section 4.3.2) is a date and time too; its bare date is not
    t = read_deployments((DEP_OK + "N102,1001,5002,20250407T140744Z,\n").encode(),
                         "dep.csv").table
    assert t["deployed"].to_pylist()[1].isoformat() == "2025-04-07T14:07:44+00:00"
    assert "20250407" in str(_refusal((DEP_OK + "N102,1001,5002,20250407,\n").encode()))


def test_a_file_cut_inside_its_last_record_is_refused():
    cut = (DEP_OK + "N102,1001,5002,2025-04-07T14:07:44Z").encode()  # retrieval lost
    for ends in (b"\n", b"\r\n", b"\r"):  # LF, CRLF and CR line ends
        exc = _refusal(cut.replace(b"\n", ends))
        assert exc.line == 3 and "cut short: 4 of the header's 5 fields" in str(exc)
        # the same record whole, or ending without a line break but with every field, loads
        for data in (cut + b",\n", cut + b",2025-04-07T23:05:07Z"):
            assert read_deployments(data.replace(b"\n", ends), "dep.csv").table.num_rows == 2
    # a quoted field holding a line break in a whole last record is not a cut
    quoted = (DEP_OK.replace("retrieved_utc", "retrieved_utc,note")
              .replace("23:02:30Z", '23:02:30Z,"ok"')
              + 'N102,1001,5002,2025-04-07T14:07:44Z,,"found on its side\nset upright"')
    t = read_deployments(quoted.encode(), "dep.csv").table
    assert t.num_rows == 2 and t["src_line"].to_pylist() == [2, 3]


def test_a_control_file_may_end_without_its_optional_fields():
    data = (HEADERS["control"] + "1001,5001,583204.1,4062396.9,407.9").encode()
    assert read_control(data, "ctl.csv", "csv").table.num_rows == 1


def test_a_control_point_may_carry_a_survey_date_alone():
    data = (HEADERS["control"] + "1001,5001,583204.1,4062396.9,407.9,2025-04-02\n").encode()
    t = read_control(data, "ctl.csv", "csv").table
    assert t["surveyed"].to_pylist()[0].isoformat() == "2025-04-02T00:00:00+00:00"


def test_whole_files_are_not_taken_for_cut_ones():
    head = "node,line,point,deployed_utc,retrieved_utc,note\n"
    rec = "N101,1001,5001,2025-04-07T14:03:33Z,2025-04-07T23:02:30Z,"
    last = "N102,1001,5002,2025-04-07T14:07:44Z,2025-04-07T23:05:07Z,ok"
    for note in ('"a\u2028b"', '"a\x0cb"', '"a\x85b"', '"a\x1eb"', '"a\rb"', '"a\nb"'):
        data = (head + rec + note + "\n" + last).encode()
        assert read_deployments(data, "dep.csv").table.num_rows == 2, repr(note)
    # CR line ends with a quoted CR; trailing blanks after the last line end
    cr = (head + rec + '"a\rb"\n' + last).replace("\n", "\r").encode()
    assert read_deployments(cr, "dep.csv").table.num_rows == 2
    assert read_deployments((head + rec + "x\n" + last + "\n   ").encode(),
                            "dep.csv").table.num_rows == 2
    # ... and a cut one still is, whatever the line ends
    cut = (head + rec + '"a\rb"\n' + "N102,1001,5002,2025-04-07T14:07:44Z")
    for text in (cut, cut.replace("\n", "\r")):
        assert "cut short" in str(_refusal(text.encode()))


def test_a_preplot_cut_inside_a_number_is_refused():
    data = (b"line,point,index,easting,northing,elevation\n"
            b"1001,5001,1,583204.1,4062396.9,407.9\n1001,5002,1,583229.1,40623")
    try:
        read_stations(data, "pre.csv", "csv")
    except InputError as exc:
        assert "cut short: 5 of the header's 6 fields" in str(exc) and exc.line == 3
    else:
        raise AssertionError("accepted")
