"""Same-day deployments (6-12 h) and 1 s logging: the stated r95 holds, moves are found in
hours and split at the fix, each part is delivered for its own place, and short-span means
something. One representative case each; the multi-seed calibration is ``bench/calibration``
(its figures are in docs/solving.md).

Errors come from the solver tests' receiver model (``SOLVER_TEST_MODEL``: a 2 m, 30 min
Gauss–Markov part, cited in archive.seeds.simulate); the targets (93-97 % coverage, moves
found in at least 5 of 6 short deployments, at most 2 % false moves) are the project's goals,
common practice, no source.
"""

from __future__ import annotations

import numpy as np
import pytest
from archive.seeds.gnss_errors import ErrorModel
from archive.seeds.simulate import SimConfig, Simulation, simulate

from archive.solve.engine import solve_fixes
from archive.solve.params import default_params


def _solve(cfg: SimConfig) -> tuple[Simulation, dict]:
    sim = simulate(cfg)
    pos = solve_fixes(sim.fixes, sim.deployments, sim.stations, default_params(),
                      sim.meta["epsg"]).positions
    return sim, pos.filter(pos["delivered"]).to_pydict()


def _against_truth(sim: Simulation, pos: dict) -> list[dict]:
    """Each delivered record with its error to where its node stood (its own part)."""
    t = sim.truth
    at = {n: i for i, n in enumerate(t["node"])}
    out = []
    for k in range(len(pos["node"])):
        i = at[pos["node"][k]]
        first = pos["part"][k] == 1
        te, tn = (t["e_first"][i], t["n_first"][i]) if first else (t["e"][i], t["n"][i])
        out.append({"node": pos["node"][k], "moved": bool(t["moved"][i]),
                    "part": pos["part"][k], "flags": pos["flags"][k].split(";"),
                    "err": float(np.hypot(pos["easting"][k] - te, pos["northing"][k] - tn)),
                    "r95": pos["r95"][k], "held_from": pos["held_from"][k],
                    "move_t": t["move_t"][i]})
    return out


@pytest.fixture(scope="module")
def same_day() -> list[dict]:
    rows = []
    for seed in (71, 72, 73):  # three surveys of 36 stations, two nodes moved in each
        sim, pos = _solve(SimConfig(n_lines=3, n_points=12, hours=(6.0, 12.0), n_moves=2,
                                    n_swaps=0, n_unlogged=0, camp_hours=1.0, seed=seed))
        rows += _against_truth(sim, pos)
    return rows


def test_the_stated_r95_holds_on_same_day_deployments(same_day: list[dict]) -> None:
    clean = [r for r in same_day if not r["moved"] or r["part"]]
    inside = np.mean([r["err"] <= r["r95"] for r in clean])
    assert len(clean) >= 108
    assert 0.90 <= inside <= 0.99, inside  # the target 93-97 % over many seeds


def test_moves_are_found_in_hours_with_few_false_alarms(same_day: list[dict]) -> None:
    moved_nodes = {r["node"] for r in same_day if r["moved"]}
    found = {r["node"] for r in same_day if r["moved"] and "moved" in r["flags"]}
    assert len(moved_nodes) == 6 and len(found) >= 5
    normal = [r for r in same_day if not r["moved"]]
    assert np.mean(["moved" in r["flags"] for r in normal]) <= 0.02
    # short-span means something again: no normal station of a same-day deployment has it
    assert not any("short-span" in r["flags"] for r in normal)


def test_each_part_is_delivered_for_its_own_place_and_time(same_day: list[dict]) -> None:
    parts = [r for r in same_day if r["moved"] and r["part"]]
    assert sorted(r["part"] for r in parts) == sorted([1, 2] * (len(parts) // 2))
    # near where the node stood, or at worst inside its own stated radius
    assert all(r["err"] <= max(1.5, r["r95"]) for r in parts)
    assert np.median([r["err"] for r in parts]) <= 1.5
    later = [r for r in parts if r["part"] == 2]
    assert all(abs(r["held_from"].timestamp() - r["move_t"]) <= 60.0 for r in later)


def test_one_second_logging_splits_at_the_fix() -> None:
    sim, pos = _solve(SimConfig(n_lines=1, n_points=10, hours=(6.0, 8.0), interval=1.0,
                                model=ErrorModel(), n_moves=2, n_swaps=0, n_unlogged=0,
                                camp_hours=0.5, seed=74))
    rows = _against_truth(sim, pos)
    later = [r for r in rows if r["moved"] and r["part"] == 2]
    assert len(later) == 2
    assert all(abs(r["held_from"].timestamp() - r["move_t"]) <= 2.0 for r in later)
    assert all(r["err"] <= max(1.5, r["r95"]) for r in rows if r["moved"])
    assert not any("moved" in r["flags"] for r in rows if not r["moved"])
