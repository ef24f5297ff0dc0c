"""Fault injection harness: kill a writing command at chosen moments, then check the archive.

A *campaign* runs one command (``python -m archive ...`` or any module) once without
interruption to measure how long it takes and what it produces, then runs it again in
fresh copies of the same starting archive and sends SIGKILL after a delay drawn from that
measured duration (stratified: one delay in each of ``n`` equal slices of the run, so the
kills spread over start-up, object writing and committing, seeded for reproducibility).
After each kill it checks that ``verify`` passes (unreferenced objects are allowed and
counted as dangling), that the ledger chain is whole, then re-runs the command to the end
and compares its result with the uninterrupted run.

Used by ``tests/reliability`` (a short campaign in CI) and ``bench/soak.py`` (long ones).
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from sqlalchemy import func, select

from archive.store.archive import CONFIG_NAME, Archive
from archive.store.models import LedgerEvent
from archive.store.verify import verify_archive

REPO = Path(__file__).resolve().parents[2]


def child_env(extra: dict[str, str] | None = None) -> dict[str, str]:
    """Environment of a child process: this interpreter's, the repository importable."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    env.pop("NODEKEEP_DEBUG", None)
    env.setdefault("NODEKEEP_ACTOR", "reliability")
    if extra:
        env.update(extra)
    return env


def cli_argv(root: Path, *args: str) -> list[str]:
    """Command line of ``nodekeep -A root ARGS`` through this interpreter."""
    return [sys.executable, "-m", "archive", "-A", str(root), *args]


def run(argv: list[str], *, timeout: float = 300, env: dict[str, str] | None = None
        ) -> subprocess.CompletedProcess[str]:
    """Run a command to the end and capture its output."""
    return subprocess.run(argv, capture_output=True, text=True, timeout=timeout,
                          env=env or child_env(), cwd=REPO, check=False)


def run_killed(argv: list[str], delay: float, *, env: dict[str, str] | None = None,
               after_write: Path | None = None) -> tuple[bool, int | None]:
    """Start a command and SIGKILL it after ``delay`` seconds: counted from its start, or,
    with ``after_write`` (an object folder), from its first write into that object store
    (the first temporary file made in its ``tmp`` folder, or that folder made: either
    changes a folder's modification time, watched every millisecond).

    Returns (killed, returncode): ``killed`` is False when it had already finished.
    """
    watched = (after_write, after_write / "tmp") if after_write is not None else ()
    start = [_stamp(f) for f in watched]
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            env=env or child_env(), cwd=REPO)
    while watched and [_stamp(f) for f in watched] == start:
        if proc.poll() is not None:
            return False, proc.returncode
        time.sleep(0.001)
    try:
        proc.wait(timeout=delay)
        return False, proc.returncode
    except subprocess.TimeoutExpired:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        return True, proc.returncode


def objects_of(root: Path) -> Path:
    """The object folder of the archive at ``root`` (its configuration's ``objects``)."""
    import tomllib

    with open(root / CONFIG_NAME, "rb") as fh:
        where = tomllib.load(fh)["archive"].get("objects", "objects")
    return root / where


def _stamp(folder: Path) -> int | None:
    """The modification time of a folder (ns), None when it does not exist."""
    try:
        return os.stat(folder).st_mtime_ns
    except FileNotFoundError:
        return None


def kill_delays(duration: float, n: int, seed: int, *, start: float = 0.0) -> list[float]:
    """``n`` kill delays, one drawn uniformly in each of ``n`` equal slices of
    ``[start, duration]`` (stratified sampling), shuffled by the seeded generator."""
    rng = np.random.default_rng(seed)
    edges = np.linspace(start, duration, n + 1)
    delays = edges[:-1] + rng.random(n) * np.diff(edges)
    rng.shuffle(delays)
    return [float(d) for d in delays]


# -- starting archives -----------------------------------------------------------------


def create_database(base_url: str) -> tuple[str, str]:
    """A new empty PostgreSQL database beside ``base_url``'s: (name, URL)."""
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    base = make_url(base_url)
    name = f"nk_{uuid.uuid4().hex[:12]}"
    admin = create_engine(base.set(database="postgres"), isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as c:
            c.execute(text(f'CREATE DATABASE "{name}"'))
    finally:
        admin.dispose()
    return name, base.set(database=name).render_as_string(hide_password=False)


def drop_database(base_url: str, name: str) -> None:
    """Drop a database made by :func:`create_database` (its sessions ended first)."""
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    admin = create_engine(make_url(base_url).set(database="postgres"),
                          isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as c:
            c.execute(text("SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
                           "WHERE datname = :n"), {"n": name})
            c.execute(text(f'DROP DATABASE IF EXISTS "{name}"'))
    finally:
        admin.dispose()


class ArchiveTemplate:
    """A prepared archive copied afresh for every trial (SQLite folder copy, or PostgreSQL
    ``CREATE DATABASE ... TEMPLATE`` plus a copy of the object folder)."""

    def __init__(self, root: Path, pg_url: str | None = None) -> None:
        self.root = Path(root)
        self.pg_url = pg_url
        self._databases: list[str] = []

    def clone(self, dest: Path) -> Path:
        """A copy of the template archive at ``dest`` (its own catalog and objects)."""
        shutil.copytree(self.root, dest, symlinks=True)
        if self.pg_url is None:
            return dest
        from sqlalchemy import create_engine, text
        from sqlalchemy.engine import make_url

        base = make_url(self.pg_url)
        name = f"nk_{uuid.uuid4().hex[:12]}"
        admin = create_engine(base.set(database="postgres"), isolation_level="AUTOCOMMIT")
        try:
            with admin.connect() as c:
                c.execute(text(f'CREATE DATABASE "{name}" TEMPLATE "{base.database}"'))
        finally:
            admin.dispose()
        self._databases.append(name)
        url = base.set(database=name).render_as_string(hide_password=False)
        cfg = (dest / CONFIG_NAME).read_text(encoding="utf-8").splitlines()
        cfg = [f'db = "{url}"' if line.startswith("db = ") else line for line in cfg]
        (dest / CONFIG_NAME).write_text("\n".join(cfg) + "\n", encoding="utf-8")
        return dest

    def cleanup(self) -> None:
        """Drop the databases made by :meth:`clone`."""
        if self.pg_url is not None:
            for name in self._databases:
                drop_database(self.pg_url, name)
        self._databases.clear()


# -- one trial -------------------------------------------------------------------------


@dataclass
class Snapshot:
    """What an archive holds, enough to tell how far a killed command got."""

    events: int
    stored: frozenset[str]


def snapshot(root: Path) -> Snapshot:
    """Count ledger events and list stored objects."""
    with Archive.open(root) as arc, arc.session() as s:
        n = s.scalar(select(func.count()).select_from(LedgerEvent)) or 0
        return Snapshot(int(n), frozenset(arc.objects.iter_hashes()))


def phase_of(before: Snapshot, after: Snapshot, finished: Snapshot, killed: bool) -> str:
    """Where a kill landed, judged from what it left behind."""
    if not killed:
        return "after the end"
    if after.events > before.events:
        return "during commits" if after.events < finished.events else "after the last commit"
    if after.stored - before.stored:
        return "objects written, not committed"
    return "before any write"


@dataclass
class Trial:
    """The outcome of one killed run and its re-run."""

    index: int
    delay: float
    killed: bool
    phase: str
    verify_ok: bool
    problems: list[str]
    dangling: int
    rerun_exit: int
    same_result: bool
    seconds: float

    @property
    def ok(self) -> bool:
        return self.verify_ok and self.rerun_exit == 0 and self.same_result


@dataclass
class Campaign:
    """Every trial of one command on one backend."""

    name: str
    backend: str
    baseline_seconds: float
    startup_seconds: float
    trials: list[Trial] = field(default_factory=list)

    @property
    def problems(self) -> int:
        return sum(not t.ok for t in self.trials)

    def phases(self) -> dict[str, int]:
        out: dict[str, int] = {}
        for t in self.trials:
            out[t.phase] = out.get(t.phase, 0) + 1
        return out

    def summary(self) -> dict[str, Any]:
        return {
            "name": self.name, "backend": self.backend, "trials": len(self.trials),
            "killed": sum(t.killed for t in self.trials),
            "baseline_seconds": round(self.baseline_seconds, 2),
            "startup_seconds": round(self.startup_seconds, 2),
            "phases": self.phases(), "problems": self.problems,
            "dangling_objects": sum(t.dangling for t in self.trials),
            "lost": sum(not t.same_result for t in self.trials),
        }


def check_archive(root: Path) -> tuple[bool, list[str], int]:
    """verify (with re-hash): (ok, problems as text, dangling count)."""
    with Archive.open(root) as arc:
        report = verify_archive(arc)
    return (report.ok, [f"{p.kind}: {p.subject}: {p.detail}" for p in report.problems],
            len(report.dangling))


def campaign(
    name: str,
    template: ArchiveTemplate,
    workdir: Path,
    argv_for: Callable[[Path], list[str]],
    result_of: Callable[[Path], Any],
    *,
    n: int,
    seed: int,
    backend: str = "sqlite",
    rerun: Callable[[Path], tuple[int, str]] | None = None,
    window: tuple[float, float] | None = None,
    after_write: bool = False,
) -> Campaign:
    """Measure one uninterrupted run, then ``n`` killed runs each followed by a re-run.

    ``argv_for(root)`` is the command for an archive at ``root``; ``result_of(root)`` reads
    what the command produced (compared between the uninterrupted run and each re-run).
    ``rerun(root) -> (exit code, message)`` re-runs the command to the end (default: the
    same command line in a new process; an in-process call saves the interpreter start-up).

    Kill moments: the uninterrupted run gives the whole duration; a second run on its
    finished archive (nothing left to do) gives the start-up cost. Delays are stratified
    over [0.6 x start-up, 1.05 x whole duration] so most kills land while the command works;
    ``window`` (fractions of the whole duration) moves them, e.g. to the end of a command
    that writes only there. ``after_write`` counts the delays from the command's first
    write into the object store instead of from its start (:func:`run_killed`),
    stratified over the first 0.1 s plus a fiftieth of the duration: a command whose writes
    take its last few hundredths of a second is killed among them, however long the
    moments before them take on a busy machine.
    """
    env = child_env()

    def default_rerun(root: Path) -> tuple[int, str]:
        done = run(argv_for(root), env=env)
        return done.returncode, done.stderr[-1000:]

    rerun = rerun or default_rerun
    base_root = template.clone(workdir / "baseline")
    before = snapshot(base_root)
    t0 = time.monotonic()
    done = run(argv_for(base_root), env=env)
    duration = time.monotonic() - t0
    if done.returncode != 0:
        raise RuntimeError(f"uninterrupted run of {name} failed ({done.returncode}): "
                           f"{done.stderr[-2000:]}")
    expected = result_of(base_root)
    finished = snapshot(base_root)
    t0 = time.monotonic()
    idle = run(argv_for(base_root), env=env)
    startup = time.monotonic() - t0
    if idle.returncode != 0 or result_of(base_root) != expected:
        raise RuntimeError(f"a second run of {name} on a finished archive changed it or failed: "
                           f"{idle.stderr[-2000:]}")
    result = Campaign(name, backend, duration, startup)
    # start-up varies with the machine's load: begin the window well before it ends
    if after_write:
        lo, hi = 0.0, 0.1 + 0.02 * duration
    elif window is None:
        lo, hi = 0.6 * min(startup, duration), 1.05 * duration
    else:
        lo, hi = window[0] * duration, window[1] * duration
    delays = kill_delays(hi, n, seed, start=lo)
    for i, delay in enumerate(delays):
        t1 = time.monotonic()
        # The machine's load changes how long the command takes: when it finished before
        # the kill, start again from a fresh copy with an earlier kill (up to 3 tries).
        for _attempt in range(4):
            root = template.clone(workdir / f"trial-{i:03d}")
            killed, _ = run_killed(argv_for(root), delay, env=env,
                                   after_write=objects_of(root) if after_write else None)
            if killed or _attempt == 3:
                break
            shutil.rmtree(root, ignore_errors=True)
            delay = lo + (delay - lo) * 0.6  # earlier, inside the window
        after = snapshot(root)
        ok, problems, dangling = check_archive(root)
        code, message = rerun(root)
        ok2, problems2, _ = check_archive(root)
        same = code == 0 and result_of(root) == expected
        result.trials.append(Trial(
            index=i, delay=delay, killed=killed,
            phase=phase_of(before, after, finished, killed), verify_ok=ok and ok2,
            problems=problems + problems2 + ([message] if code else []),
            dangling=dangling, rerun_exit=code, same_result=same,
            seconds=time.monotonic() - t1,
        ))
        shutil.rmtree(root, ignore_errors=True)
    return result


def spread_campaign(name: str, template: ArchiveTemplate, workdir: Path,
                    argv_for: Callable[[Path], list[str]], result_of: Callable[[Path], Any],
                    *, n: int, seed: int, backend: str = "sqlite",
                    rerun: Callable[[Path], tuple[int, str]] | None = None,
                    tries: int = 3) -> Campaign:
    """:func:`campaign`, drawn again with the next seed (up to ``tries`` campaigns, every
    trial kept) while its kills all landed in one phase: on a busy machine the measured
    durations can put every stratified kill in one phase, which tests less than it should
    but is no fault of the command. A command that writes only in its last moments (a load
    records its files in one batch at the end) leaves every kill "before any write": the
    next campaigns then kill in the last tenth of the run, a little later each time (a
    kill after the end is drawn again earlier, see :func:`campaign`); one whose kills all
    came too late kills earlier."""
    result = campaign(name, template, workdir / "0", argv_for, result_of, n=n, seed=seed,
                      backend=backend, rerun=rerun)
    for k in range(1, tries):
        seen = result.phases()
        if len(seen) >= 2:
            break
        window, after_write = None, False
        if set(seen) == {"before any write"}:
            # from the first write; then the last tenth of the run, timed from the start
            after_write, window = k == 1, (None if k == 1 else (0.88, 0.99))
        elif set(seen) <= {"after the end", "after the last commit"}:
            window = (0.2, 0.8)
        more = campaign(name, template, workdir / str(k), argv_for, result_of, n=n,
                        seed=seed + k, backend=backend, rerun=rerun, window=window,
                        after_write=after_write)
        result.trials += more.trials
    return result
