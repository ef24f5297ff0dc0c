"""Long fault-injection soaks: many SIGKILLed runs of the writing commands on both backends.

    python -m bench.soak                         # the default campaign (both backends)
    python -m bench.soak --trials 40 --only load --backend sqlite
    python -m bench.soak --json > soak.json

Each campaign measures an uninterrupted run, then kills the command at stratified moments
(seeded) in fresh copies of the same archive, checks ``verify`` and the ledger chain after
each kill, re-runs the command to the end and compares the result with the uninterrupted
run (see ``tests/reliability/harness.py``). Prints one line per campaign: trials, kills by
phase, problems found and results lost (which must be zero). PostgreSQL campaigns need
``NODEKEEP_TEST_PG_URL`` (a server where databases may be created).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

SCENARIOS = ("core", "load", "solve")


def soak(what: str, backend: str, trials: int, seed: int, work: Path) -> dict:
    """One campaign; returns its summary."""
    from tests.reliability import scenarios
    from tests.reliability.conftest import make_survey_archive
    from tests.reliability.harness import (
        ArchiveTemplate,
        campaign,
        create_database,
        drop_database,
    )
    from tests.reliability.logs import write_logs

    pg_base = os.environ.get("NODEKEEP_TEST_PG_URL") if backend == "postgres" else None
    if backend == "postgres" and not pg_base:
        raise SystemExit("NODEKEEP_TEST_PG_URL is not set: cannot soak on PostgreSQL")
    dbname, url = create_database(pg_base) if pg_base else (None, None)
    try:
        work.mkdir(parents=True)
        if what == "core":
            sc = scenarios.core_writer()
            tpl = ArchiveTemplate(make_survey_archive(work / "template", url), url)
        elif what == "load":
            write_logs(work / "logs", 4, 3000)
            sc = scenarios.load_fixes(work / "logs")
            tpl = ArchiveTemplate(make_survey_archive(work / "template", url), url)
        else:
            sc, tpl = scenarios.solve_setup(work, url)
        t0 = time.monotonic()
        try:
            result = campaign(sc.name, tpl, work / "trials", sc.argv_for, sc.result_of,
                              n=trials, seed=seed, backend=backend, rerun=sc.rerun)
        finally:
            tpl.cleanup()
        summary = result.summary()
        summary["seconds"] = round(time.monotonic() - t0, 1)
        summary["failures"] = [
            {"trial": t.index, "delay": round(t.delay, 3), "phase": t.phase,
             "problems": t.problems, "same_result": t.same_result}
            for t in result.trials if not t.ok]
        return summary
    finally:
        if dbname:
            drop_database(pg_base, dbname)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench.soak", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--trials", type=int, default=30, help="kills per campaign (default 30)")
    p.add_argument("--only", choices=SCENARIOS, action="append",
                   help="scenario(s) to run (default: all)")
    p.add_argument("--backend", choices=("sqlite", "postgres", "both"), default="both")
    p.add_argument("--seed", type=int, default=2024)
    p.add_argument("--json", action="store_true", help="print the summaries as JSON")
    args = p.parse_args(argv)
    backends = ["sqlite", "postgres"] if args.backend == "both" else [args.backend]
    summaries = []
    with tempfile.TemporaryDirectory(prefix="nodekeep-soak-") as tmp:
        for what in args.only or SCENARIOS:
            for backend in backends:
                s = soak(what, backend, args.trials, args.seed, Path(tmp) / f"{what}-{backend}")
                summaries.append(s)
                if not args.json:
                    print(f"{s['name']:<12} {backend:<9} trials {s['trials']:>3}  killed "
                          f"{s['killed']:>3}  problems {s['problems']}  lost {s['lost']}  "
                          f"dangling objects {s['dangling_objects']:>3}  run {s['baseline_seconds']}"
                          f" s (start-up {s['startup_seconds']} s)  {s['seconds']} s in all  "
                          f"phases {s['phases']}", flush=True)
                    for f in s["failures"]:
                        print(f"  FAILED trial {f['trial']} (kill at {f['delay']} s, "
                              f"{f['phase']}): {f['problems']}", flush=True)
    if args.json:
        print(json.dumps(summaries, indent=2))
    return 1 if any(s["problems"] or s["lost"] for s in summaries) else 0


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    sys.exit(main())
