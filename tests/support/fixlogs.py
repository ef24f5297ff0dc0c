"""Small NMEA fix logs written in memory for the ingest and solver tests, and the test
survey's id."""

from __future__ import annotations

import numpy as np
from archive.seeds.nmea_write import write_nmea

from tests.support.cli import SURVEY_NAME


def log_bytes(n: int = 600, start: str = "2024-03-01T23:55:00", seed: int = 3) -> bytes:
    rng = np.random.default_rng(seed)
    t = np.datetime64(start, "us") + np.arange(n) * np.timedelta64(1, "s")
    return write_nmea(t, 35.2 + rng.normal(0, 2e-5, n), -101.7 + rng.normal(0, 2e-5, n),
                      rng.normal(910, 3, n), np.full(n, -24.1), np.where(np.arange(n) % 10, 1, 0),
                      rng.integers(5, 14, n), rng.uniform(0.6, 2.5, n), rng.uniform(1, 4, n),
                      rng.uniform(1, 3, n))


def survey_id(arc) -> int:
    with arc.session() as s:
        return arc.survey(s, SURVEY_NAME).id
