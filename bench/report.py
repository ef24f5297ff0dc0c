"""Time the HTML report of a synthetic 20,000-station run (the goal is 30 s or less).

    python -m bench.report                 # 100 lines x 200 points, clouds capped at 40
    python -m bench.report --lines 50 --points 100 --keep report.html

``write_report`` runs end to end on a fresh SQLite archive holding the run, its check
points and preplot: reading the stored tables, the qc figures, every figure and the file.
Each station drawn gets a synthetic cloud of 2,000 fixes (the solver's own cloud reader
re-solves a station from its raw fixes, which this synthetic run does not have), so the
cloud plots are paid for in full. Prints the time and its ratio to the goal.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

GOAL_S = 30.0


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark; prints the figures."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--lines", type=int, default=100)
    ap.add_argument("--points", type=int, default=200)
    ap.add_argument("--keep", type=Path, default=None, help="also copy the report here")
    args = ap.parse_args(argv)

    from archive.qc.report import write_report
    from archive.store.archive import Archive
    from archive.survey.surveys import create_survey
    from tests.qc.conftest import store_input, store_run
    from tests.support.qc_tables import synthetic_cloud, synthetic_spread

    n = args.lines * args.points
    positions, control, stations = synthetic_spread(args.lines, args.points)
    work = Path(tempfile.mkdtemp(prefix="nk-bench-report-"))
    try:
        arc = Archive.init(work / "archive", actor="bench")
        sv = create_survey(arc, "Kestrel Flats 3D", "EPSG:32614",
                           client="Harrow Basin Energy", contractor="Bluestem Geophysical crew 7")
        store_input(arc, sv.id, "stations", stations)
        store_input(arc, sv.id, "control", control)
        store_run(arc, sv.id, positions, label="bench")

        at = positions.select(["line", "point", "easting", "northing"]).to_pandas()
        at = at.set_index(["line", "point"])

        def read_cloud(line: float, point: float, index: int):
            e, nn = at.loc[(line, point)]
            return synthetic_cloud(e + 0.3, nn - 0.2, n=2000, seed=int(point))

        t0 = time.perf_counter()
        written = write_report(arc, sv.id, None, work / "report.html", read_cloud=read_cloud)
        seconds = time.perf_counter() - t0
        arc.close()
        print(f"report of {n:,} stations, {control.num_rows:,} check points, "
              f"{written.n_review:,} to review, {written.n_clouds} clouds of 2,000 fixes: "
              f"{written.size_bytes / 1e6:.1f} MB in {seconds:.1f} s "
              f"({seconds / GOAL_S:.2f} of the {GOAL_S:.0f} s goal)")
        if args.keep:
            shutil.copyfile(written.path, args.keep)
        return 0 if seconds <= GOAL_S else 1
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
