"""Shared fixtures: archives on SQLite and PostgreSQL, a survey, the CLI runner.

PostgreSQL tests use ``NODEKEEP_TEST_PG_URL`` (``.ci/run`` exports it). Outside CI they are
skipped when it is unset; in CI (``CI=true``) a missing server is a failure, never a skip.
Each PostgreSQL test gets a database of its own, dropped afterwards.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from click.testing import CliRunner

from archive.store.archive import Archive
from tests.support.cli import SURVEY_EPSG, SURVEY_NAME, pg_base_url


@pytest.fixture
def pg_url() -> Iterator[str]:
    """URL of a fresh, empty PostgreSQL database (dropped after the test)."""
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    base = make_url(pg_base_url())
    name = f"nk_{uuid.uuid4().hex[:12]}"
    admin = create_engine(base.set(database="postgres"), isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as c:
            c.execute(text(f'CREATE DATABASE "{name}"'))
    except Exception as exc:
        if os.environ.get("CI"):
            raise
        pytest.skip(f"PostgreSQL not reachable: {exc}")
    try:
        yield base.set(database=name).render_as_string(hide_password=False)
    finally:
        with admin.connect() as c:
            c.execute(text(
                "SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = :n"
            ), {"n": name})
            c.execute(text(f'DROP DATABASE IF EXISTS "{name}"'))
        admin.dispose()


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def backend(request: pytest.FixtureRequest) -> str:
    """Parametrise a test over both catalog backends."""
    return request.param


@pytest.fixture
def db_url(backend: str, request: pytest.FixtureRequest) -> str | None:
    """Catalog URL for the current backend (None = SQLite default inside the archive)."""
    if backend == "sqlite":
        return None
    return request.getfixturevalue("pg_url")


@pytest.fixture
def any_arc(tmp_path: Path, db_url: str | None) -> Iterator[Archive]:
    """A new archive on each backend, without a survey."""
    arc = Archive.init(tmp_path / "archive", db_url=db_url, actor="tester")
    yield arc
    arc.close()


@pytest.fixture
def arc(tmp_path: Path) -> Iterator[Archive]:
    """A new SQLite archive without a survey."""
    a = Archive.init(tmp_path / "archive", actor="tester")
    yield a
    a.close()


@pytest.fixture
def survey_arc(arc: Archive) -> Archive:
    """A SQLite archive holding one survey in UTM zone 14N."""
    from archive.survey.surveys import create_survey

    create_survey(arc, SURVEY_NAME, f"EPSG:{SURVEY_EPSG}", vertical_datum="NAVD88 (model)",
                  client="Harrow Basin Energy", contractor="Bluestem Geophysical Crew 7")
    return arc


@pytest.fixture
def any_survey_arc(any_arc: Archive) -> Archive:
    """An archive with one survey, on each backend."""
    from archive.survey.surveys import create_survey

    create_survey(any_arc, SURVEY_NAME, f"EPSG:{SURVEY_EPSG}")
    return any_arc


@pytest.fixture
def runner() -> CliRunner:
    """A click CliRunner (stderr kept apart from stdout)."""
    return CliRunner()


