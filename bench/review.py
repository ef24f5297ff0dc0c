"""Time the evening review of 200 flagged stations: one bulk decision against single edits.

    python -m bench.review                  # 2,000 stations, 200 flagged, 20 single edits
    python -m bench.review --singles 5

A synthetic run of ``--lines`` x ``--points`` stations (every 10th flagged ``wide-spread``,
every 30th also ``far-from-plan``) is stored on a fresh SQLite archive with its preplot.
Baseline, measured in the same run: ``--singles`` stations acknowledged one by one with
``nodekeep edit ack`` as a separate process each (what a reviewer paid per flag), and the
same through the library call (``ack_flag``) to show what a process start costs. Then the
remaining flagged stations are accepted with ONE ``nodekeep review decide --flag wide-spread
--accept`` process: its wall time (the goal is under 5 s for 200 flags, process start
included), the edits and ledger events it wrote, and its ratio to the single edits
extrapolated to the same number of flags.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

GOAL_S = 5.0
FLAG = "wide-spread"


def _nodekeep(archive: Path, *args: str) -> float:
    """Wall time of one ``nodekeep`` process (start, import, work, exit)."""
    env = os.environ | {"NODEKEEP_ARCHIVE": str(archive), "NODEKEEP_ACTOR": "bench"}
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-m", "archive", *args, "-q"], check=True, env=env,
                   stdout=subprocess.DEVNULL)
    return time.perf_counter() - t0


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark; prints the figures."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--lines", type=int, default=20)
    ap.add_argument("--points", type=int, default=110)
    ap.add_argument("--singles", type=int, default=10,
                    help="stations acknowledged one by one for the baseline (each way)")
    args = ap.parse_args(argv)

    from sqlalchemy import func, select

    from archive.review.acknowledge import ack_flag
    from archive.review.queue import load_review
    from archive.store.archive import Archive
    from archive.store.models import Edit, LedgerEvent
    from archive.survey.surveys import create_survey
    from tests.support.qc_archive import store_input, store_run
    from tests.support.qc_tables import synthetic_spread

    positions, _control, stations = synthetic_spread(args.lines, args.points, flagged_every=10)
    work = Path(tempfile.mkdtemp(prefix="nk-bench-review-"))
    try:
        root = work / "archive"
        arc = Archive.init(root, actor="bench")
        sv = create_survey(arc, "Kestrel Flats 3D", "EPSG:32614",
                           client="Harrow Basin Energy", contractor="Bluestem Geophysical crew 7")
        store_input(arc, sv.id, "stations", stations)
        store_run(arc, sv.id, positions, label="bench")
        waiting = load_review(arc, sv.id).waiting(FLAG)
        n_flagged = len(waiting)

        cli_singles = [_nodekeep(root, "edit", "ack", f"{s.line:g}", f"{s.point:g}", "--flag",
                                 FLAG, "--reason", "bench: single edit")
                       for s in waiting[:args.singles]]
        lib_singles = []
        for s in waiting[args.singles:2 * args.singles]:
            t0 = time.perf_counter()
            ack_flag(arc, sv.id, s.line, s.point, s.index, flag=FLAG, reason="bench: library")
            lib_singles.append(time.perf_counter() - t0)
        with arc.session() as s:
            events_before = s.scalar(select(func.count()).select_from(LedgerEvent))
            edits_before = s.scalar(select(func.count()).select_from(Edit))
        n_bulk = len(load_review(arc, sv.id).waiting(FLAG))
        bulk = _nodekeep(root, "review", "decide", "--flag", FLAG, "--accept", "--reason",
                         "bench: accepted in bulk")
        with arc.session() as s:
            events = s.scalar(select(func.count()).select_from(LedgerEvent)) - events_before
            edits = s.scalar(select(func.count()).select_from(Edit)) - edits_before
        left = len(load_review(arc, sv.id).waiting(FLAG))
        arc.close()

        per_cli = sum(cli_singles) / len(cli_singles)
        per_lib = sum(lib_singles) / len(lib_singles)
        print(f"{args.lines * args.points:,} stations, {n_flagged} flagged {FLAG}")
        print(f"single edits, one 'nodekeep edit ack' process each: {per_cli:.2f} s per flag "
              f"(mean of {len(cli_singles)}); {n_bulk} flags would take "
              f"{per_cli * n_bulk:.0f} s")
        print(f"single edits through the library (no process start): {per_lib:.3f} s per flag "
              f"(mean of {len(lib_singles)})")
        print(f"bulk: one 'nodekeep review decide' process for {n_bulk} flags: {bulk:.2f} s wall "
              f"({1000 * bulk / n_bulk:.1f} ms per flag), {edits} edits, {events} ledger "
              f"events, {left} left waiting")
        print(f"bulk / single edits for the same flags: {bulk / (per_cli * n_bulk):.3f}; "
              f"{bulk / GOAL_S:.2f} of the {GOAL_S:.0f} s goal")
        ok = bulk <= GOAL_S and edits == n_bulk and events == n_bulk and left == 0
        return 0 if ok else 1
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
