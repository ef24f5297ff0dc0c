"""Simulated surveys for the solver tests, and archives holding them.

The archive fixture loads the preplot, the deployment log and an elevation model through
the survey loaders (CSV and GeoTIFF files, as a crew would) and stores each node's fixes
the way the fix loader stores a parsed raw file: raw bytes, a fixes Parquet object, one
``raw_files`` row and its ledger event.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from archive.seeds.simulate import SimConfig, Simulation, simulate

from archive.solve.engine import solve_fixes
from archive.solve.params import default_params
from archive.store.archive import Archive
from tests.support.simulation import store_simulation

SMALL = SimConfig(n_lines=2, n_points=6, days=3.0, n_moves=1, n_swaps=1, n_unlogged=1, seed=11)


@pytest.fixture(scope="session")
def big_sim() -> Simulation:
    """48 stations, 3.2 days each at 30 s: the accuracy and calibration data set."""
    return simulate(SimConfig(n_lines=6, n_points=8, n_moves=3, n_swaps=2, n_unlogged=1,
                              seed=2024))


@pytest.fixture(scope="session")
def big_solved(big_sim: Simulation):
    """The big simulation solved with the default parameters (no elevation model)."""
    return solve_fixes(big_sim.fixes, big_sim.deployments, big_sim.stations,
                       default_params(), big_sim.meta["epsg"], want_members=True)


@pytest.fixture(scope="module")
def small_sim() -> Simulation:
    """12 stations with one move, one swapped pair and one unlogged deployment."""
    return simulate(SMALL)


@pytest.fixture
def sim_arc(survey_arc: Archive, small_sim: Simulation, tmp_path: Path) -> tuple[Archive, int]:
    """An archive holding the small simulation (preplot, log, model, fixes)."""
    sid = store_simulation(survey_arc, small_sim, tmp_path)
    return survey_arc, sid
