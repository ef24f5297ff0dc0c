"""The commands put under fault injection, and how to read what each one produced.

Shared by the tests of ``tests/reliability`` and the longer soaks of ``bench/soak.py``.
"""

from __future__ import annotations

import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from click.testing import CliRunner
from sqlalchemy import select

from archive.store.archive import Archive
from archive.store.history import ledger_events
from archive.store.models import RawFile
from tests.reliability.core_writer import ACTION
from tests.reliability.harness import cli_argv


@dataclass
class Scenario:
    """A command to kill: its command line for an archive, an in-process re-run (or None for
    a new process) and a reader of its result."""

    name: str
    argv_for: Callable[[Path], list[str]]
    result_of: Callable[[Path], Any]
    rerun: Callable[[Path], tuple[int, str]] | None = None


def in_process(args: list[str]) -> Callable[[Path], tuple[int, str]]:
    """Re-run ``nodekeep ARGS`` in this process (saves the interpreter start-up)."""
    from archive.cli.main import cli

    def rerun(root: Path) -> tuple[int, str]:
        r = CliRunner().invoke(cli, ["-A", str(root), *args])
        return r.exit_code, (r.stderr if r.exit_code else "") + repr(r.exception or "")
    return rerun


def core_result(root: Path) -> tuple:
    """Objects and rows the core writer committed; each object ledgered once."""
    with Archive.open(root) as arc:
        events = [e["payload"]["object"] for e in ledger_events(arc, action=ACTION)]
        with arc.session() as s:
            rows = sorted(s.scalars(select(RawFile.object_hash)))
    assert len(events) == len(set(events)), "an object was ledgered twice"
    return tuple(sorted(events)), tuple(rows)


def raw_rows(root: Path) -> tuple:
    """What a load produced: one tuple per raw-file row (times of receipt left out); each
    raw file ledgered exactly once."""
    with Archive.open(root) as arc:
        with arc.session() as s:
            rows = s.scalars(select(RawFile)).all()
        events = ledger_events(arc, action="load.fixes")
    got = tuple(sorted(
        (r.object_hash, r.original_name, r.node, r.format, r.size, r.n_lines, r.n_accepted,
         r.n_rejected, r.n_ignored, r.n_fixes, r.n_valid, str(r.t_first), str(r.t_last),
         r.fixes_hash, r.rejects_hash, r.details) for r in rows))
    if sorted(e["payload"]["raw"] for e in events) != sorted(r[0] for r in got):
        raise AssertionError("a raw file was ledgered twice or not at all")
    return got


def core_writer(count: int = 40, size: int = 200_000) -> Scenario:
    """The archive core alone: objects and ledgered rows in a loop."""
    return Scenario(
        "core writer",
        lambda root: [sys.executable, "-m", "tests.reliability.core_writer", str(root),
                      str(count), str(size)],
        core_result)


def load_fixes(logs: Path) -> Scenario:
    """``nodekeep load fixes`` of every log in ``logs`` (one parsing process)."""
    args = ["load", "fixes", "--workers", "1", str(logs)]
    return Scenario("load fixes", lambda root: cli_argv(root, *args), raw_rows,
                    in_process(args))


def run_rows(root: Path) -> tuple:
    """What a solve produced: (run id, manifest, positions, digest, count) per run; each run
    ledgered exactly once."""
    from archive.store.models import Run

    with Archive.open(root) as arc:
        with arc.session() as s:
            runs = s.scalars(select(Run)).all()
        events = ledger_events(arc, action="solve.run")
    got = tuple(sorted((r.id, r.manifest_hash, r.positions_hash, r.positions_digest,
                        r.n_positions, r.n_flagged) for r in runs))
    if sorted(e["payload"]["run"] for e in events) != [r[0] for r in got]:
        raise AssertionError("a run was ledgered twice or not at all")
    return got


def solve() -> Scenario:
    """``nodekeep solve`` of every deployment of the survey."""
    return Scenario("solve", lambda root: cli_argv(root, "solve"), run_rows, in_process(["solve"]))


def solve_setup(work: Path, db_url: str | None, *, seed: int = 7) -> tuple[Scenario, Any]:
    """The small demo scenario loaded into a template archive, and the solve scenario."""
    from archive.seeds.scenario import generate

    from tests.reliability.harness import ArchiveTemplate
    from tests.support.reliability import fill_archive

    sc = generate(work / "scenario", seed=seed, size="small")
    root = fill_archive(work / "template", db_url, sc, n_logs=0)
    return solve(), ArchiveTemplate(root, db_url)
