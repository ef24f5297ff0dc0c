"""The edit, edits, deliver, trace, diff and where commands through CliRunner."""

from __future__ import annotations

import json

import pytest

from tests.support.builders import delivery_archive
from tests.support.cli import invoke
from tests.support.delivery_tables import read_segp1

FLAGS = ["", "far-from-plan", "", "", "", "", "", ""]


@pytest.fixture
def arc_dir(survey_arc, tmp_path):
    delivery_archive(survey_arc, tmp_path, flags=FLAGS)
    return survey_arc.root


def test_edit_commands_and_listing(runner, arc_dir):
    r = invoke(runner, arc_dir, "edit", "set-position", "1001", "2001", "--from", "given",
               "--easting", "612345.5", "--northing", "3512345.5", "--reason", "crew stake")
    assert r.exit_code == 0, r.output
    assert r.output.startswith("edit 1 (set-position) on 1001/2001")
    r = invoke(runner, arc_dir, "edit", "set-position", "1001", "2001", "--from", "preplot",
               "--reason", "stake was wrong", "--json")
    d = json.loads(r.output)
    assert (d["id"], d["supersedes"], d["payload"]["source"]) == (2, 1, "preplot")
    r = invoke(runner, arc_dir, "edit", "reject", "1001", "2001")
    assert r.exit_code == 2 and "error: an edit needs a reason" in r.stderr
    r = invoke(runner, arc_dir, "edit", "reject", "1099", "2001", "--reason", "x")
    assert r.exit_code == 2 and "unknown station 1099/2001" in r.stderr
    r = invoke(runner, arc_dir, "edit", "undo", "77", "--reason", "x")
    assert r.exit_code == 2 and "no edit 77" in r.stderr
    r = invoke(runner, arc_dir, "edit", "undo", "2", "--reason", "solver was right")
    assert r.exit_code == 0 and "supersedes edit 2" in r.output
    r = invoke(runner, arc_dir, "edits")
    assert r.exit_code == 0 and r.output.strip() == "no edits in force"
    r = invoke(runner, arc_dir, "edits", "--all", "--json")
    assert [e["in_force"] for e in json.loads(r.output)] == [False, False, False]


def test_deliver_command_refusals_then_success(runner, arc_dir, tmp_path):
    out = tmp_path / "kestrel.p1"
    r = invoke(runner, arc_dir, "deliver", "--format", "segp1", "--to", str(out),
               "--recipient", "Harrow Basin Energy")
    assert r.exit_code == 4
    assert "unacknowledged review flags: far-from-plan (1)" in r.stderr
    assert "nodekeep edit ack" in r.stderr
    r = invoke(runner, arc_dir, "edit", "ack", "1001", "2002", "--flag", "far-from-plan",
               "--reason", "preplot stake was off, checked on site")
    assert r.exit_code == 0
    r = invoke(runner, arc_dir, "deliver", "--format", "segp1", "--to", str(out))
    assert r.exit_code == 2 and "needs a recipient" in r.stderr
    r = invoke(runner, arc_dir, "deliver", "--format", "segp1", "--to", str(out),
               "--recipient", "Harrow Basin Energy", "--note", "receivers, swath 1")
    assert r.exit_code == 0, r.stderr
    assert r.output.startswith("delivery 1: 8 stations of run")
    headers, rows = read_segp1(out.read_text())
    assert len(headers) == 20 and len(rows) == 8
    r = invoke(runner, arc_dir, "deliver", "--format", "segp1", "--to", str(out),
               "--recipient", "Harrow Basin Energy")
    assert r.exit_code == 4 and "already exists" in r.stderr and "--force" in r.stderr

    r = invoke(runner, arc_dir, "trace", "--file", str(out), "--json")
    t = json.loads(r.output)
    assert t["delivery"]["id"] == 1 and len(t["raw_files"]) == 2
    r = invoke(runner, arc_dir, "trace", "--file", str(out))
    assert "N5000_harvest1.nmea" in r.output and "N5001_harvest1.nmea" in r.output
    r = invoke(runner, arc_dir, "trace")
    assert r.exit_code == 2 and "LINE POINT or --file" in r.stderr
    r = invoke(runner, arc_dir, "where", "1001", "2002")
    assert r.exit_code == 0 and "in delivery 1 (segp1, kestrel.p1" in r.output
    r = invoke(runner, arc_dir, "where", "1001", "2002", "--as-of", "2001-01-01", "--json")
    assert json.loads(r.output)["delivered"] is None
    r = invoke(runner, arc_dir, "deliver", "--format", "csv", "--to", str(out) + ".csv",
               "--recipient", "Harrow Basin Energy")
    r = invoke(runner, arc_dir, "where", "1001", "2002")
    assert "in delivery 2 (csv" in r.output
    assert "earlier (index 1): delivery 1 (segp1" in r.output
    r = invoke(runner, arc_dir, "where", "1009", "2002")
    assert r.exit_code != 0 and "unknown station 1009/2002" in r.stderr


def test_diff_command(runner, arc_dir):
    from archive.store.archive import Archive
    from archive.store.models import Run

    with Archive.open(arc_dir) as a, a.session() as s:
        run_id = s.query(Run.id).scalar()
    r = invoke(runner, arc_dir, "diff", run_id[:8], run_id[:8], "--threshold", "0.5")
    assert r.exit_code == 0, r.stderr
    assert "8 occupations in both runs" in r.output
    assert "0 occupation(s) moved more than 0.5 m" in r.output
    r = invoke(runner, arc_dir, "diff", "zzzz", run_id[:8])
    assert r.exit_code == 2 and "no run 'zzzz'" in r.stderr
