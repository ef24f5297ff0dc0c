"""Fixtures of the review tests: generated same-day surveys with planted problems, and a
synthetic run with hundreds of flagged stations."""

from __future__ import annotations

import pytest

from tests.support.scenarios import scenario_archive


@pytest.fixture(scope="module")
def same_day(tmp_path_factory):
    """A same-day Kestrel Flats survey (seed 23: a moved node, a swapped pair, a node that
    died), solved; read-only use."""
    base = tmp_path_factory.mktemp("review-same-day")
    arc, sid, run_id, sc = scenario_archive(base, seed=23, size="same-day")
    yield arc, sid, run_id, sc, base
    arc.close()


@pytest.fixture
def fresh_same_day(tmp_path):
    """The same kind of survey with another seed, for tests that record decisions."""
    arc, sid, run_id, sc = scenario_archive(tmp_path, seed=31, size="same-day")
    yield arc, sid, run_id, sc, tmp_path
    arc.close()


def _spread(arc, base):
    """A synthetic run of 2,000 stations, every 10th flagged wide-spread (200 stations),
    with its preplot and check points, stored as the solver stores runs."""
    from archive.survey.surveys import create_survey
    from tests.support.qc_archive import store_input, store_run
    from tests.support.qc_tables import synthetic_spread

    positions, control, stations = synthetic_spread(20, 100, flagged_every=10)
    sv = create_survey(arc, "Kestrel Flats 3D", "EPSG:32614", client="Harrow Basin Energy",
                       contractor="Bluestem Geophysical crew 7")
    store_input(arc, sv.id, "stations", stations)
    store_input(arc, sv.id, "control", control)
    store_run(arc, sv.id, positions, label="synthetic")
    return arc, sv.id, positions, base


@pytest.fixture
def many_flags(tmp_path):
    """:func:`_spread` on a SQLite archive."""
    from archive.store.archive import Archive

    arc = Archive.init(tmp_path / "archive", actor="tester")
    yield _spread(arc, tmp_path)
    arc.close()


@pytest.fixture
def many_flags_any(any_arc, tmp_path):
    """:func:`_spread` on each catalog backend."""
    return _spread(any_arc, tmp_path)
