"""The solve commands through click's CliRunner: exit codes and messages."""

from __future__ import annotations

import json
import tomllib

from tests.support.cli import invoke


def test_params_prints_commented_toml(runner, survey_arc) -> None:
    res = invoke(runner, survey_arc.root, "params")
    assert res.exit_code == 0
    assert "# " in res.output and tomllib.loads(res.output)["estimate"]["huber_k"] == 1.345
    res = invoke(runner, survey_arc.root, "params", "--json")
    assert json.loads(res.output)["uncertainty"]["method"] == "pooled"


def test_solve_runs_show(runner, sim_arc, tmp_path) -> None:
    arc, _ = sim_arc
    res = invoke(runner, arc.root, "solve", "--label", "field check", "--quiet")
    assert res.exit_code == 0, res.output
    assert res.output.startswith("solved run ")
    run_id = res.output.split()[2]
    assert "moved" in res.output and "unlogged" in res.output
    res = invoke(runner, arc.root, "solve", "--json")
    data = json.loads(res.output)
    assert data["run_id"] == run_id and data["created"] is False
    res = invoke(runner, arc.root, "runs")
    assert res.exit_code == 0 and run_id[:12] in res.output and "field check" in res.output
    res = invoke(runner, arc.root, "show", "1001", "2001", "--run", run_id[:8])
    assert res.exit_code == 0 and "station 1001/2001" in res.output and "r95" in res.output
    res = invoke(runner, arc.root, "show", "1001", "2001", "--json")
    rows = json.loads(res.output)["rows"]
    assert rows[0]["node"] == "KF05000" and rows[0]["delivered"] is True
    (tmp_path / "p.toml").write_text("[estimate]\nhuber = 2\n")
    res = invoke(runner, arc.root, "solve", "--params", str(tmp_path / "p.toml"))
    assert res.exit_code == 2 and "unknown parameter estimate.huber" in res.stderr
    res = invoke(runner, arc.root, "solve", "--stations", "1001/2001")
    assert res.exit_code == 2 and "is not LINE:POINT" in res.stderr
    res = invoke(runner, arc.root, "show", "999", "1")
    assert res.exit_code == 2 and "is not in run" in res.stderr


def test_unknown_selection_is_refused_and_records_nothing(runner, sim_arc) -> None:
    """A serial or station the deployment log does not have is a typo, not an empty run."""
    arc, _ = sim_arc
    res = invoke(runner, arc.root, "solve", "--nodes", "KF05000,KF0NOPE,KF0GONE")
    assert res.exit_code == 2
    assert "2 of 3 serial(s) are not in the deployment log: KF0GONE, KF0NOPE" in res.stderr
    res = invoke(runner, arc.root, "solve", "--stations", "1001:2001,999:1")
    assert res.exit_code == 2
    assert "1 of 2 station(s)" in res.stderr and "not in the preplot: 999/1" in res.stderr
    res = invoke(runner, arc.root, "solve", "--stations", "1001:2001", "--nodes", "KF05001")
    assert res.exit_code == 2 and "select nothing together" in res.stderr
    res = invoke(runner, arc.root, "runs", "--json")
    assert res.exit_code == 0 and json.loads(res.output) == []
    res = invoke(runner, arc.root, "history", "--json")
    assert "solve.run" not in res.output
