"""Screening of single fixes (methods.md §2): positions without coordinates, unknown
quality, excluded spans to the microsecond."""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np

from archive.edits.spans import parse_spans
from archive.solve.params import default_params
from archive.solve.screen import SCREEN_REASONS, screen_codes


def _cols(**over):
    n = 4
    cols = {"quality": np.array([1, 1, 0, 2], dtype=np.int8), "valid": np.ones(n, bool),
            "fix_type": np.full(n, 3.0), "n_sats": np.full(n, 9.0), "pdop": np.full(n, 1.5),
            "hdop": np.full(n, 0.9), "lat": np.full(n, 36.7), "lon": np.full(n, -98.1)}
    cols.update(over)
    return cols


def test_fix_without_position_is_invalid_whatever_its_quality():
    codes = screen_codes(_cols(lat=np.array([36.7, np.nan, 36.7, 36.7])),
                         default_params()["screen"])
    assert [SCREEN_REASONS[c] for c in codes] == ["", "invalid", "invalid", ""]


def test_unknown_quality_is_not_held_against_a_fix():
    # a delimited log without a quality column stores quality -1 (unknown)
    codes = screen_codes(_cols(quality=np.array([-1, -1, -1, 0], dtype=np.int8)),
                         default_params()["screen"])
    assert [SCREEN_REASONS[c] for c in codes] == ["", "", "", "invalid"]


def test_exclude_span_times_are_exact_microseconds():
    start = datetime(2025, 4, 8, 10, 0, 0, 123457, tzinfo=UTC)
    [(node, s_us, e_us)] = parse_spans([{"node": "374986", "start": start.isoformat(),
                                            "end": "2025-04-08T11:00:00+00:00"}])
    assert node == "374986"
    # 2025-04-08T10:00:00Z is 1744106400 s after the epoch (date arithmetic, computed)
    assert s_us == 1_744_106_400_123_457
    assert e_us == 1_744_110_000_000_000
