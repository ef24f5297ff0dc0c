"""Archives holding a run and survey inputs, stored the way the solver and loaders store them
(objects first, then one ledgered transaction), so qc reads them through the public readers."""

from __future__ import annotations

import pytest

from archive.store.archive import Archive
from tests.support.qc_archive import store_input, store_run, survey_id
from tests.support.qc_tables import small_fixture


@pytest.fixture
def qc_arc(survey_arc: Archive) -> Archive:
    """A survey with the small fixture: one run, check points and preplot stations."""
    positions, control, stations = small_fixture()
    sid = survey_id(survey_arc)
    store_input(survey_arc, sid, "stations", stations)
    store_input(survey_arc, sid, "control", control)
    store_run(survey_arc, sid, positions, label="first pass")
    return survey_arc
