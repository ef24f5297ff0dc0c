"""Screening single fixes by what the receiver reported, and by exclusion edits.

A fix is kept when its GGA quality is at least ``min_quality`` and it is valid (quality > 0
and RMC status not V), it is a 3-D fix when the log says (GSA fix type; a log without GSA
says nothing and is not held against the fix), enough satellites are in use, and PDOP and
HDOP are within their maxima (a value the log does not carry is not held against the fix).
Fixes of a node inside an ``exclude-span`` edit (:mod:`archive.edits.spans`) are screened
too. Each screened fix keeps
the first reason that applies, in the order of :data:`SCREEN_REASONS`.

Fixes without quality information (``no_quality``: an epoch of RMC or GLL sentences only,
no fix quality, satellites or HDOP) are kept or screened by ``screen.no_quality``; kept
ones get the weight of a typical fix of their own cloud (:func:`cloud_hdop`). Runs whose
manifest predates the parameter read ``accept``: their fix tables hold no such fix, so the
result is the one they had.
"""

from __future__ import annotations

from typing import Any

import numpy as np

# Reason codes: index into this tuple (0 = kept).
SCREEN_REASONS = ("", "invalid", "not-3d", "few-satellites", "pdop", "hdop", "excluded",
                  "no-quality")
REASON_TEXT = {
    "invalid": "no fix, fix quality below the minimum, or RMC status void",
    "not-3d": "not a 3-D fix",
    "few-satellites": "fewer satellites than the minimum",
    "pdop": "PDOP above the maximum",
    "hdop": "HDOP above the maximum",
    "excluded": "inside an excluded time span (edit)",
    "outlier": "beyond the chi-square rejection limit of its cloud",
    "no-quality": "no quality information (RMC/GLL only) and screen.no_quality = reject",
}


def screen_codes(cols: dict[str, np.ndarray], screen: dict[str, Any]) -> np.ndarray:
    """Reason code per fix (int8, 0 = kept) from the fix columns and the [screen] params.

    ``cols`` holds numpy arrays ``quality, valid, fix_type, n_sats, pdop, hdop`` with NaN
    (float) for nulls of the nullable columns, ``lat, lon`` and optionally ``no_quality``.
    A fix without a finite position is invalid whatever its quality says. Quality -1 means the log does not say
    (a delimited log without a quality column): like a missing DOP or satellite count, it
    is not held against the fix.
    """
    n = len(cols["quality"])
    code = np.zeros(n, dtype=np.int8)
    quality = cols["quality"]
    no_position = ~(np.isfinite(cols["lat"]) & np.isfinite(cols["lon"]))
    low_quality = (quality >= 0) & (quality < max(screen["min_quality"], 1))
    no_quality = cols.get("no_quality")
    reject_unrated = screen.get("no_quality", "accept") == "reject" and no_quality is not None
    tests = [
        (1, ~cols["valid"] | no_position | low_quality),
        (2, (cols["fix_type"] != 3) & np.isfinite(cols["fix_type"])
         if screen["require_3d"] else np.zeros(n, dtype=bool)),
        (3, cols["n_sats"] < screen["min_sats"]),
        (4, cols["pdop"] > screen["max_pdop"]),
        (5, cols["hdop"] > screen["max_hdop"]),
        (7, no_quality if reject_unrated else np.zeros(n, dtype=bool)),
    ]
    for value, bad in reversed(tests):  # the first reason in order wins
        code[bad] = value
    return code


def mark_excluded(code: np.ndarray, excluded: np.ndarray) -> None:
    """Screen (in place) the kept fixes inside an exclude span (see :mod:`archive.edits.spans`)."""
    code[excluded & (code == 0)] = SCREEN_REASONS.index("excluded")


def cloud_hdop(hdop: np.ndarray, no_quality: np.ndarray | None, seg: np.ndarray, n_seg: int,
               cap: int | None = None) -> np.ndarray:
    """The HDOP the estimator weighs each kept fix by (σᵢ = σ₀·HDOPᵢ): a fix without
    quality information has none, so it takes the median HDOP of the fixes with quality
    information of its own cloud (segment ``seg``), 1 when the cloud has none. Its weight
    then comes from the cloud's own spread: the estimator's robust scale of the cloud
    times that HDOP is the spread of a typical fix of the cloud."""
    from archive.solve.segments import seg_median

    if no_quality is None or not no_quality.any():
        return hdop
    rated = ~no_quality & np.isfinite(hdop)
    typical = seg_median(hdop[rated], seg[rated], n_seg, cap)
    typical = np.where(np.isfinite(typical), typical, 1.0)
    return np.where(no_quality, typical[seg], hdop)
