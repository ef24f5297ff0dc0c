"""Fixtures of the lineage tests."""

from __future__ import annotations

import pytest

from tests.support.delivered import Delivered, delivered_survey


@pytest.fixture(scope="module")
def delivered_survey_archive(tmp_path_factory: pytest.TempPathFactory) -> Delivered:
    """A solved, edited and delivered invented survey (tests/support/delivered.py); tests
    that change it work on a copy."""
    return delivered_survey(tmp_path_factory.mktemp("delivered"))
