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
