"""The HTML report: sections, figures, lineage, no external resources; the command."""

from __future__ import annotations

import json
import re
from datetime import UTC, datetime

import numpy as np
import pytest

from archive.errors import Refused
from archive.qc import qc_of
from archive.qc.figures import decimate, exaggeration
from archive.qc.report import render_report, write_report
from tests.support.cli import invoke
from tests.support.qc_archive import survey_id
from tests.support.qc_tables import run_data, synthetic_cloud, synthetic_spread

SECTIONS = ["cautions", "lineage", "summary", "figures", "review", "definitions"]


@pytest.fixture(scope="module")
def rendered():
    positions, control, stations = synthetic_spread(4, 30, flagged_every=20, check_every=6)
    data = run_data(positions, control, stations)
    result = qc_of(data, tolerance=2.0)
    calls = []

    def read_cloud(line, point, index):
        calls.append((line, point, index))
        return synthetic_cloud(612_000.0 + 25.0 * (point - 2001), 3_512_000.0 + 200.0 * (line - 1001),
                               n=300, seed=int(point))

    page, counts = render_report(data, result, read_cloud, max_clouds=3,
                                 generated_at=datetime(2024, 3, 12, tzinfo=UTC))
    return page, counts, calls, data, result


def test_every_section_and_figure_is_present(rendered):
    page, counts, calls, _data, _result = rendered
    for sid in SECTIONS:
        assert f'<section id="{sid}"' in page
    figs = re.findall(r'<figure class="figure" data-figure="([a-z]+)"', page)
    assert figs[:3] == ["overview", "vectors", "distributions"]
    assert figs.count("cloud") == 3 == counts["n_clouds"] == len(calls)
    assert counts["n_figures"] == 6
    # every figure is an embedded PNG with a caption
    imgs = re.findall(r'<img src="([^"]{0,40})', page)
    assert len(imgs) == 6 and all(s.startswith("data:image/png;base64,") for s in imgs)
    assert page.count("<figcaption>") == 6


def test_review_list_and_cloud_cap_note(rendered):
    page, counts, _calls, _data, result = rendered
    # synthetic_spread flags every 20th station (index 3, 23, ...) of 120: 6 stations
    assert counts["n_review"] >= 6
    assert f"Stations to review ({counts['n_review']})" in page
    assert "Fix clouds are drawn for the first 3 of" in page
    assert "wide-spread" in page and "far-from-plan" in page


def test_no_external_resources(rendered):
    page = rendered[0]
    assert "http://" not in page and "https://" not in page
    assert "<script" not in page and "<link" not in page and "@import" not in page
    assert re.findall(r'src="(?!data:)', page) == []


def test_lineage_and_cautions(rendered):
    page, _counts, _calls, data, _result = rendered
    assert data.run["id"] in page
    assert "huber_k" in page and "1.345" in page  # parameters
    assert "12" * 32 in page and "56" * 32 in page  # input hashes of the manifest
    assert "9a" * 32 in page  # the control version the report compared with
    assert "code version" in page and "0.1.0" in page
    assert "not a certified or legal survey" in page
    assert "licensed surveyor" in page and "pipelines" in page
    assert "survey the sensor" in page
    assert "generated 2024-03-12 00:00 UTC" in page


def test_summary_table_shows_both_columns(rendered):
    page, _c, _calls, _d, result = rendered
    s, p = result.comparison.solved.horizontal, result.comparison.preplot.horizontal
    assert f"<td class=\"num\">{s.mean:.3f}</td><td class=\"num\">{p.mean:.3f}</td>" in page


def test_decimate_keeps_line_geometry_and_every_kept_station():
    line = np.repeat([1.0, 2.0, 3.0], 100)
    point = np.tile(np.arange(100.0), 3)[::-1].copy()  # order must not matter
    keep = np.zeros(300, dtype=bool)
    keep[[5, 150]] = True
    idx = decimate(line, point, keep, 60)  # k = ceil(300 / 60) = 5
    chosen_points = point[idx]
    assert set(idx) >= {5, 150}
    for ln in (1.0, 2.0, 3.0):
        pts = np.sort(chosen_points[line[idx] == ln])
        assert {0.0, 5.0, 95.0} <= set(pts)  # every 5th point from the first of the line
        assert len(pts) in (20, 21)
    assert len(decimate(line[:50], point[:50], keep[:50], 60)) == 50  # small: all kept


def test_exaggeration_is_round_and_scales_with_the_map():
    assert exaggeration(np.array([0.5, 1.0, 2.0]), 10_000.0) in {100.0, 200.0, 500.0}
    assert exaggeration(np.array([0.5, 1.0, 2.0]), 10.0) == 1.0
    assert exaggeration(np.array([]), 1000.0) == 1.0


def _cloud_near(line, point, index):
    # the small fixture's stations lie at 612000 + 25 (point - 2001), 3512000
    return synthetic_cloud(612_000.0 + 25.0 * (point - 2001), 3_512_000.0, n=200, seed=1)


def test_write_report_and_refuse_overwrite(qc_arc, tmp_path):
    out = tmp_path / "report.html"
    written = write_report(qc_arc, survey_id(qc_arc), None, out, tolerance=1.5,
                           read_cloud=_cloud_near)
    text = out.read_text(encoding="utf-8")
    assert written.size_bytes == len(text.encode("utf-8"))
    assert written.n_review == 3  # 2005 and 2004 beyond 1.5 m, 2003 flagged "moved"
    assert "1001/2005" in text
    assert written.n_clouds == 3 and text.count('data-figure="cloud"') == 3
    assert "200 fixes used" not in text  # every 12th synthetic fix is rejected
    assert "183 fixes used, 17 rejected or screened" in text
    with pytest.raises(Refused, match="already exists"):
        write_report(qc_arc, survey_id(qc_arc), None, out)


@pytest.mark.slow
def test_cli_report(qc_arc, runner, tmp_path, monkeypatch):
    # the hand-made run has no real manifest for the solver to re-solve a cloud from
    monkeypatch.setattr("archive.qc.report.cloud_reader", lambda arc, run_id: _cloud_near)
    out = tmp_path / "r.html"
    res = invoke(runner, qc_arc.root, "report", "--to", str(out))
    assert res.exit_code == 0, res.output
    assert res.output.startswith(f"wrote {out}") and "figures" in res.output
    again = invoke(runner, qc_arc.root, "report", "--to", str(out))
    assert again.exit_code == 4
    assert "already exists" in again.stderr and "--force" in again.stderr
    forced = invoke(runner, qc_arc.root, "report", "--to", str(out), "--force")
    assert forced.exit_code == 0


def test_cli_report_max_clouds(qc_arc, runner, tmp_path, monkeypatch):
    monkeypatch.setattr("archive.qc.report.cloud_reader", lambda arc, run_id: _cloud_near)
    one = tmp_path / "one.html"
    res = invoke(runner, qc_arc.root, "report", "--tolerance", "1.5", "--max-clouds", "1",
                 "--to", str(one), "--json")
    assert res.exit_code == 0, res.output
    d = json.loads(res.stdout)
    assert d["n_review"] == 3 and d["n_clouds"] == 1
    assert one.read_text(encoding="utf-8").count('data-figure="cloud"') == 1
    every = tmp_path / "all.html"
    res = invoke(runner, qc_arc.root, "report", "--tolerance", "1.5", "--max-clouds", "0",
                 "--to", str(every), "--json")
    assert res.exit_code == 0 and json.loads(res.stdout)["n_clouds"] == 3
    bad = invoke(runner, qc_arc.root, "report", "--max-clouds", "-1", "--to", str(every))
    assert bad.exit_code == 2 and "--max-clouds" in bad.output


def test_render_report_max_clouds_zero_draws_all(rendered):
    _page, counts, _calls, data, result = rendered
    _, all_counts = render_report(data, result, lambda *a: None, max_clouds=0)
    assert all_counts["n_clouds"] == counts["n_review"] > 3
