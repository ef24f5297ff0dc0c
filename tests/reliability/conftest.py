"""Fixtures of the reliability tests: a starting archive (with one survey) on each backend."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from archive.store.archive import Archive
from archive.survey.surveys import create_survey
from tests.conftest import SURVEY_EPSG, SURVEY_NAME
from tests.reliability.harness import ArchiveTemplate


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
