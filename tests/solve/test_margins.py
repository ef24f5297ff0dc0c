"""A node that died just after lay-out: solved from the settle-margin fixes, honestly wide."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest
from archive.seeds.simulate import SimConfig, simulate

from archive.solve.engine import solve_fixes
from archive.solve.params import resolve_params
from tests.support.cli import invoke


@pytest.fixture(scope="module")
def died_early():
    sim = simulate(SimConfig(n_lines=2, n_points=5, days=1.5, n_moves=0, n_swaps=0,
                             n_unlogged=0, seed=23))
    dep = sim.deployments.to_pylist()[3]
    node, laid = dep["node"], dep["deployed"]
    # the node logged for 25 minutes after it was laid out, inside the 30-minute settle margin
    f = sim.fixes
    keep = pc.or_(pc.not_equal(f["node"], node),
                  pc.less(f["time"], pa.scalar(laid + timedelta(minutes=25),
                                               f.schema.field("time").type)))
    return sim, sim.fixes.filter(keep), dep


def _row(out, node):
    pos = out.positions
    return pos.filter(pc.equal(pos["node"], node)).to_pylist()[0]


def test_margin_fixes_position_a_node_that_died_inside_the_settle_margin(died_early):
    sim, fixes, dep = died_early
    params = resolve_params({})
    out = solve_fixes(fixes, sim.deployments, sim.stations, params, sim.meta["epsg"])
    r = _row(out, dep["node"])
    assert r["from_margins"] is True and r["n_used"] > 0
    flags = r["flags"].split(";")
    assert "few-fixes" in flags and "short-span" in flags and "unoccupied" not in flags
    assert r["t_start"] == dep["deployed"]  # the whole logged window, margins included
    # one fix's error (sigma0 * HDOP per axis, the weight model) at least: the minutes of
    # fixes sit inside one error correlation time and average nothing out
    assert r["sigma_e"] >= params["estimate"]["sigma0"] * 0.5
    truth = sim.truth
    i = list(truth["node"]).index(dep["node"])
    d = np.hypot(r["easting"] - truth["e"][i], r["northing"] - truth["n"][i])
    assert d <= r["r95"]  # honest: the true spot is inside the stated 95 % radius
    others = out.positions.filter(pc.not_equal(out.positions["node"], dep["node"]))
    assert not any(others["from_margins"].to_pylist())


def test_without_the_fallback_it_stays_unoccupied(died_early):
    sim, fixes, dep = died_early
    params = resolve_params({"window": {"margin_fallback": False}})
    r = _row(solve_fixes(fixes, sim.deployments, sim.stations, params, sim.meta["epsg"]),
             dep["node"])
    assert r["from_margins"] is False and r["n_used"] == 0 and "unoccupied" in r["flags"]
    # a run made before the parameter existed (its manifest lacks it) never used margins
    old = resolve_params({})
    del old["window"]["margin_fallback"]
    r = _row(solve_fixes(fixes, sim.deployments, sim.stations, old, sim.meta["epsg"]),
             dep["node"])
    assert r["from_margins"] is False and "unoccupied" in r["flags"]


def test_show_says_margin_fixes_were_used(died_early, survey_arc, tmp_path, runner):
    from tests.support.simulation import store_simulation

    sim, fixes, dep = died_early
    sim.fixes = fixes
    store_simulation(survey_arc, sim, tmp_path, dem=False)
    from archive.solve.run import solve_survey
    from tests.support.builders import survey_id

    solve_survey(survey_arc, survey_id(survey_arc))
    r = invoke(runner, survey_arc.root, "show", f"{dep['line']:g}", f"{dep['point']:g}")
    assert r.exit_code == 0, r.stderr
    assert "solved from the settle-margin fixes, uncertainty widened" in r.output
