"""qc layer: statistics against RTK check points and the preplot, and the HTML report.

``qc_run`` compares a run's delivered positions with the check points (and the preplot
with the same check points, side by side); ``archive.qc.report.write_report`` writes the
self-contained HTML report.
"""

from archive.qc.check import QcResult, qc_of, qc_run

__all__ = ["QcResult", "qc_of", "qc_run"]
