"""Fixtures of the reliability tests: starting archives on each backend, copied per test.

``template`` is an archive holding the invented survey only (function scope, on the
``backend`` of tests/conftest.py). ``scenario`` is the small demo scenario generated once per
session; ``full_template`` an archive (one per module and backend) with the scenario's
survey, inputs and a few logs loaded, and, where the solver and delivery exist, a run, an
edit and a delivery, so every ledgered table has rows.
"""

from __future__ import annotations

import importlib.util
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import select

from archive.store.archive import Archive
from archive.survey.surveys import create_survey
from tests.conftest import SURVEY_EPSG, SURVEY_NAME, _pg_base_url
from tests.reliability.harness import ArchiveTemplate, create_database, drop_database


def make_survey_archive(root: Path, db_url: str | None) -> Path:
    """A new archive holding the invented survey; closed, ready to be copied."""
    with Archive.init(root, db_url=db_url, actor="reliability") as arc:
        create_survey(arc, SURVEY_NAME, f"EPSG:{SURVEY_EPSG}", client="Harrow Basin Energy",
                      contractor="Bluestem Geophysical crew 7")
    return root


@pytest.fixture
def template(tmp_path: Path, db_url: str | None) -> Iterator[ArchiveTemplate]:
    """A survey archive on the current backend, cloned afresh for every trial."""
    root = make_survey_archive(tmp_path / "template", db_url)
    tpl = ArchiveTemplate(root, db_url)
    yield tpl
    tpl.cleanup()


@pytest.fixture(scope="session")
def scenario(tmp_path_factory: pytest.TempPathFactory):
    """The small invented demo scenario (Kestrel Flats 3D), generated once."""
    from archive.seeds.scenario import generate

    return generate(tmp_path_factory.mktemp("scenario"), seed=7, size="small")


def has(module: str) -> bool:
    """True when a module of the project exists (parts land at different times)."""
    return importlib.util.find_spec(module) is not None


def fill_archive(root: Path, db_url: str | None, sc, *, n_logs: int = 3,
                 deliver_to: Path | None = None) -> Path:
    """An archive with the scenario's survey, inputs and ``n_logs`` logs (all when 0); with
    ``deliver_to`` (a folder) also a run, an edit and a CSV delivery written there."""
    from archive.ingest.load import load_fix_files
    from archive.survey.inputs import load_input

    with Archive.init(root, db_url=db_url, actor="reliability") as arc:
        survey = create_survey(arc, sc.survey_name, f"EPSG:{sc.epsg}", client=sc.client,
                               contractor=sc.contractor, vertical_datum=sc.vertical_datum)
        load_input(arc, survey.id, "stations", sc.preplot)
        load_input(arc, survey.id, "deployments", sc.deployments)
        load_input(arc, survey.id, "control", sc.control)
        logs = sc.logs if not n_logs else sorted(sc.logs)[:n_logs]
        load_fix_files(arc, survey.id, logs, workers=1)
        if deliver_to is not None:
            make_delivery(arc, survey.id, deliver_to / "kestrel-positions.csv")
    return root


def make_delivery(arc: Archive, survey_id: int, to: Path):
    """Solve (a look-up when already solved), reject one station with a reason, deliver CSV."""
    from archive.deliver.deliveries import deliver
    from archive.edits.decisions import reject_station
    from archive.solve.run import solve_survey
    from archive.store.models import RawFile

    with arc.session() as s:
        nodes = sorted(set(s.scalars(select(RawFile.node).where(RawFile.survey_id == survey_id))))
    solve_survey(arc, survey_id, nodes=nodes)
    reject_station(arc, survey_id, 1001, 5014, reason="node battery died on the first day")
    to.parent.mkdir(parents=True, exist_ok=True)
    return deliver(arc, survey_id, None, "csv", to, "Harrow Basin Energy processing",
                   allow_flags=True, force=True)


@pytest.fixture(scope="module", params=["sqlite", pytest.param("postgres",
                                                                marks=pytest.mark.postgres)])
def module_db(request: pytest.FixtureRequest) -> Iterator[str | None]:
    """A catalog URL for a whole module: None (SQLite) or a PostgreSQL database of its own."""
    if request.param == "sqlite":
        yield None
        return
    base = _pg_base_url()
    name, url = create_database(base)
    yield url
    drop_database(base, name)


@pytest.fixture(scope="module")
def full_template(tmp_path_factory: pytest.TempPathFactory, module_db: str | None, scenario
                  ) -> Iterator[ArchiveTemplate]:
    """An archive with rows in the ledgered tables, copied afresh by each test."""
    folder = tmp_path_factory.mktemp("full")
    root = fill_archive(folder / "archive", module_db, scenario, deliver_to=folder / "out")
    tpl = ArchiveTemplate(root, module_db)
    yield tpl
    tpl.cleanup()
