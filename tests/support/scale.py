"""Helpers of the scale tests: a free local port, object keys in an S3 store, an archive populated
with the small scenario."""

from __future__ import annotations

import socket


def free_port() -> int:
    """A TCP port nobody listens on right now (loopback)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def s3_key(url: str, h: str) -> tuple[str, str]:
    """(bucket, key) of object ``h`` in the store at ``url`` (the layout written in docs)."""
    rest = url.removeprefix("s3://")
    bucket, _, prefix = rest.partition("/")
    key = f"{prefix.rstrip('/')}/{h[:2]}/{h[2:4]}/{h}".lstrip("/")
    return bucket, key


def populate(arc, scenario, n_logs: int | None = 4) -> int:
    """Load the scenario's inputs and ``n_logs`` node logs with the real loaders; survey id."""
    from archive.ingest.load import load_fix_files
    from archive.survey.inputs import load_input
    from archive.survey.surveys import create_survey

    survey = create_survey(arc, scenario.survey_name, f"EPSG:{scenario.epsg}",
                           vertical_datum=scenario.vertical_datum, client=scenario.client,
                           contractor=scenario.contractor)
    load_input(arc, survey.id, "stations", scenario.preplot)
    load_input(arc, survey.id, "deployments", scenario.deployments)
    load_input(arc, survey.id, "control", scenario.control)
    load_input(arc, survey.id, "dem", scenario.dem, vertical_datum=scenario.vertical_datum)
    logs = scenario.logs if n_logs is None else scenario.logs[:n_logs]
    if logs:
        report = load_fix_files(arc, survey.id, logs, workers=1)
        assert report.ok, [f.error for f in report.failed]
    return survey.id
