"""Fixtures of the reliability tests: starting archives on each backend, copied per test.

``template`` is an archive holding the invented survey only (function scope, on the
``backend`` of tests/conftest.py). ``scenario`` is the small demo scenario generated once per
session; ``full_template`` an archive (one per module and backend) with the scenario's
survey, inputs and a few logs loaded, and, where the solver and delivery exist, a run, an
edit and a delivery, so every ledgered table has rows.
"""

from __future__ import annotations

import subprocess
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from tests.reliability.harness import ArchiveTemplate, create_database, drop_database
from tests.support.cli import pg_base_url
from tests.support.reliability import fill_archive, make_survey_archive


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


@pytest.fixture(scope="module", params=["sqlite", pytest.param("postgres",
                                                                marks=pytest.mark.postgres)])
def module_db(request: pytest.FixtureRequest) -> Iterator[str | None]:
    """A catalog URL for a whole module: None (SQLite) or a PostgreSQL database of its own."""
    if request.param == "sqlite":
        yield None
        return
    base = pg_base_url()
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


@pytest.fixture
def tmpfs(tmp_path: Path) -> Iterator[Callable[[str, str], Path]]:
    """Mount small tmpfs file systems (skips where mounting is not allowed)."""
    mounted: list[Path] = []

    def mount(name: str, size: str) -> Path:
        where = tmp_path / name
        where.mkdir()
        done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs",
                               str(where)], capture_output=True, check=False)
        if done.returncode != 0:
            pytest.skip(f"cannot mount a tmpfs here: {done.stderr.decode().strip()}")
        mounted.append(where)
        return where

    yield mount
    for where in reversed(mounted):
        subprocess.run(["umount", "-l", str(where)], check=False)
