"""What most tests share: the invented survey's name and CRS, the PostgreSQL test URL, running the
command in-process."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from click.testing import CliRunner

PG_ENV = "NODEKEEP_TEST_PG_URL"
SURVEY_NAME = "Kestrel Flats 3D"  # invented prospect


SURVEY_EPSG = 32614  # WGS 84 / UTM zone 14N


def pg_base_url() -> str:
    url = os.environ.get(PG_ENV)
    if not url:
        if os.environ.get("CI"):
            pytest.fail(f"{PG_ENV} is not set in CI: PostgreSQL tests must run there")
        pytest.skip(f"{PG_ENV} not set")
    return url


def invoke(runner: CliRunner, arc_dir: Path | str, *args: str):
    """Run ``nodekeep -A arc_dir ARGS`` in-process and return the click Result."""
    from archive.cli.main import cli

    return runner.invoke(cli, ["-A", str(arc_dir), *args], catch_exceptions=False)
