"""qc_run on an archive and the ``nodekeep qc`` command."""

from __future__ import annotations

import json

import pytest

from archive.errors import UsageError
from archive.qc import qc_run
from tests.support.cli import invoke
from tests.support.qc_archive import store_run, survey_id
from tests.support.qc_tables import positions_table, small_fixture


def test_qc_run_reads_the_newest_run_and_current_check_points(qc_arc):
    result = qc_run(qc_arc, survey_id(qc_arc), tolerance=1.5)
    # the figures themselves are checked by hand in test_stats.py; here: the same numbers
    # arrive through the archive (positions and control read back from stored objects)
    assert result.n_checked == 5
    assert result.comparison.solved.horizontal.mean == pytest.approx(1.96, abs=1e-6)
    assert result.comparison.preplot.horizontal.mean == pytest.approx(1.56, abs=1e-6)
    assert result.n_delivered == 6  # five checked stations and 2006 without a check point
    assert result.n_check_points == 6
    assert result.n_flagged == 1
    assert result.control.version == 1
    d = result.as_dict()
    assert [r["point"] for r in d["beyond_tolerance"]] == [2005.0, 2004.0]
    assert any("sensor" in n and "metre" in n for n in d["notes"])
    json.dumps(d, allow_nan=False)  # the --json output is strict JSON


def test_qc_run_by_prefix_and_unknown_run(qc_arc):
    sid = survey_id(qc_arc)
    # a second, newer run where every position sits on its check point + (0.1, 0)
    _, control, _ = small_fixture()
    rows = [{"line": r["line"], "point": r["point"], "easting": r["easting"] + 0.1,
             "northing": r["northing"], "preplot_e": r["easting"], "preplot_n": r["northing"]}
            for r in control.to_pylist()]
    newer = store_run(qc_arc, sid, positions_table(rows), label="second", offset_days=8)
    assert qc_run(qc_arc, sid).run["id"] == newer.id
    assert qc_run(qc_arc, sid).comparison.solved.horizontal.max == pytest.approx(0.1, abs=1e-6)
    first = qc_run(qc_arc, sid, run_ref=qc_run(qc_arc, sid).run["id"][:10])
    assert first.run["id"] == newer.id
    with pytest.raises(UsageError, match="no run"):
        qc_run(qc_arc, sid, run_ref="ffffffffff")


def test_qc_run_without_check_points_says_what_to_do(survey_arc):
    positions, _, _ = small_fixture()
    sid = survey_id(survey_arc)
    store_run(survey_arc, sid, positions)
    result = qc_run(survey_arc, sid)
    assert result.n_checked == 0
    assert result.comparison.solved.horizontal.mean is None
    assert "nodekeep load control" in result.notes[0]


def test_cli_qc_text(qc_arc, runner):
    res = invoke(runner, qc_arc.root, "qc", "--tolerance", "1.5")
    assert res.exit_code == 0, res.output
    out = res.output
    assert "5 matched" in out
    assert "horizontal distance, mean" in out and "1.960" in out and "1.560" in out
    assert "2 station(s) beyond 1.5 m" in out
    assert "sensor" in out and "not a certified or legal survey" in out


def test_cli_qc_json(qc_arc, runner):
    res = invoke(runner, qc_arc.root, "qc", "--json")
    assert res.exit_code == 0
    d = json.loads(res.output)
    assert d["tolerance_m"] == 2.0
    assert d["solved"]["horizontal"]["p95"] == pytest.approx(4.4, abs=1e-6)
    assert [r["point"] for r in d["beyond_tolerance"]] == [2005.0]


def test_cli_qc_refuses_a_bad_tolerance(qc_arc, runner):
    res = invoke(runner, qc_arc.root, "qc", "--tolerance", "-1")
    assert res.exit_code == 2
    assert "tolerance must be a positive number of metres" in res.stderr


def test_cli_qc_without_a_run(survey_arc, runner):
    res = invoke(runner, survey_arc.root, "qc")
    assert res.exit_code == 2
    assert "no solution run" in res.stderr and "nodekeep solve" in res.stderr
