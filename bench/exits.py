"""Clean exits under load: finished commands run many times side by side, abnormal ends counted.

    python -m bench.exits [--runs 120] [--loops 6] [--command solve] [--command status]
                          [--backend sqlite|postgres] [--seed 7]

A command that has done its work can still fail as the process ends, when a native thread
(Arrow's, say) is still letting go of something as the interpreter exits: the process then
aborts with "terminate called without an active exception" (killed by SIGABRT: exit 134
in a shell, -6 as reported here) after printing its result. It is rare and needs a busy machine, so it is measured here, not in a unit test: the
small demo scenario is loaded into an archive and solved once; then each ``--command`` (an
idle re-run: nothing left to do) is run once on its own (it must succeed), then ``--runs``
times in fresh processes, ``--loops`` at a time, and every run that does not end with exit 0
within ``--timeout`` seconds is counted, with the last line it wrote to stderr. PostgreSQL needs ``NODEKEEP_TEST_PG_URL`` (a server where databases may be
created). Exit 1 when any run ended abnormally.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from collections import Counter
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

DEFAULT_COMMANDS = ("solve", "status")
HUNG = -1000  # the exit code reported for a run stopped after the timeout


def _argv(root: Path, command: str) -> list[str]:
    return [sys.executable, "-m", "archive", "-A", str(root), *command.split()]


def _one(root: Path, command: str, env: dict[str, str], timeout: float) -> tuple[int, str]:
    """One run of ``command``: its exit code (:data:`HUNG` after ``timeout`` seconds) and the
    last line it wrote to stderr."""
    try:
        done = subprocess.run(_argv(root, command), capture_output=True, text=True, env=env,
                              cwd=tempfile.gettempdir(), timeout=timeout)
    except subprocess.TimeoutExpired:
        return HUNG, f"still running after {timeout:g} s"
    tail = done.stderr.strip().splitlines()[-1:] or [""]
    return done.returncode, tail[0][:160]


def _runs(root: Path, command: str, runs: int, loops: int, env: dict[str, str],
          timeout: float) -> tuple[int, Counter, float]:
    """Run ``command`` ``runs`` times, ``loops`` at once: (abnormal ends, their last stderr
    lines with exit codes, seconds)."""
    t0 = time.monotonic()
    with ThreadPoolExecutor(max_workers=loops) as pool:
        got = list(pool.map(lambda _: _one(root, command, env, timeout), range(runs)))
    bad = Counter(f"exit {rc}: {tail}" for rc, tail in got if rc != 0)
    return sum(bad.values()), bad, time.monotonic() - t0


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench.exits", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--runs", type=int, default=120, help="runs of each command (default 120)")
    p.add_argument("--loops", type=int, default=6, help="runs at once (default 6)")
    p.add_argument("--command", action="append",
                   help=f"nodekeep arguments to run (default: {', '.join(DEFAULT_COMMANDS)})")
    p.add_argument("--backend", choices=("sqlite", "postgres"), default="sqlite")
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--timeout", type=float, default=300.0,
                   help="seconds after which a run counts as hung (default 300)")
    args = p.parse_args(argv)
    if args.runs < 1 or args.loops < 1:
        p.error("--runs and --loops must be at least 1")

    from tests.reliability.harness import child_env, create_database, drop_database
    from tests.reliability.scenarios import solve_setup

    pg_base = os.environ.get("NODEKEEP_TEST_PG_URL") if args.backend == "postgres" else None
    if args.backend == "postgres" and not pg_base:
        raise SystemExit("NODEKEEP_TEST_PG_URL is not set: cannot run on PostgreSQL")
    dbname, url = create_database(pg_base) if pg_base else (None, None)
    env = child_env()
    failed = 0
    try:
        with tempfile.TemporaryDirectory(prefix="nodekeep-exits-") as tmp:
            _, tpl = solve_setup(Path(tmp), url, seed=args.seed)
            root = tpl.root
            first = subprocess.run(_argv(root, "solve --quiet"), capture_output=True,
                                   text=True, env=env)
            if first.returncode != 0:
                raise SystemExit(f"the first solve failed: {first.stderr[-2000:]}")
            print(f"machine: {os.cpu_count()} CPUs, load average "
                  f"{' '.join(f'{x:.2f}' for x in os.getloadavg())}; {args.backend} catalog")
            for command in args.command or DEFAULT_COMMANDS:
                rc, tail = _one(root, command, env, args.timeout)
                if rc != 0:
                    raise SystemExit(f"nodekeep {command} failed on its own (exit {rc}): {tail}")
                bad, kinds, took = _runs(root, command, args.runs, args.loops, env,
                                         args.timeout)
                failed += bad
                print(f"  nodekeep {command:<12} {args.runs} runs, {args.loops} at once: "
                      f"{bad} ended abnormally ({took:.0f} s)", flush=True)
                for what, n in kinds.most_common():
                    print(f"    {n:>3} x {what}")
    finally:
        if dbname:
            drop_database(pg_base, dbname)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    sys.exit(main())
