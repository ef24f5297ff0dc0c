"""qc layer: statistics against RTK check points and the preplot, and the HTML report.

``qc_run`` compares a run's delivered positions with the check points (and the preplot
with the same check points, side by side); ``archive.qc.report.write_report`` writes the
self-contained HTML report. The names below are imported on first use, so that importing
a light module of this package (``archive.qc.notes``) stays cheap.
"""

from __future__ import annotations

from typing import Any

__all__ = ["QcResult", "qc_of", "qc_run"]


def __getattr__(name: str) -> Any:
    if name in __all__:
        from archive.qc import check

        return getattr(check, name)
    raise AttributeError(f"module 'archive.qc' has no attribute {name!r}")
