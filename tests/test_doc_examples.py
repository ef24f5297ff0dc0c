"""Every ``nodekeep ...`` example of README.md and docs/*.md runs, against a built demo survey.

The demo is ``nodekeep demo DIR --size same-day`` with its default seed (7), built once for
the module (a few seconds): the pages' station, run and delivery ids are that survey's. Each
page runs in a copy of the demo folder, its examples in order, the way the README says to
follow them: in the folder the demo wrote, with ``NODEKEEP_ARCHIVE`` naming its archive
until an example changes folder (``cd``), after which the archive is found by walking up.
A failure names the page and line of each command that did not run, with its exit code and
message. A block that cannot run here (a server, a network) carries the marker
``<!-- docs-test: skip REASON -->`` (tests/support/doc_examples.py); the list stays short.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner

from archive.cli.main import cli
from tests.support.doc_examples import page_blocks, pages, shell_words

ROOT = Path(__file__).resolve().parents[1]
DEMO_ARGS = ["--size", "same-day"]  # the survey the pages' ids come from (seed 7)
MAX_SKIPPED = 4  # blocks left out on purpose, over all pages


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("docs") / "demo-out"
    res = CliRunner().invoke(cli, ["demo", str(out), *DEMO_ARGS, "--quiet"])
    assert res.exit_code == 0, res.output + (res.stderr or "")
    return out


def _workspace(demo: Path, tmp: Path) -> Path:
    """A copy of the demo folder a page's examples may change (inputs shared read-only)."""
    work = tmp / "demo-out"
    work.mkdir()
    shutil.copytree(demo / "archive", work / "archive")
    shutil.copytree(demo / "delivery", work / "delivery")
    (work / "scenario").symlink_to(demo / "scenario", target_is_directory=True)
    return work


@pytest.mark.parametrize("page", [p for p in pages(ROOT) if page_blocks(p)],
                         ids=lambda p: p.name)
def test_page_examples_run(page: Path, demo: Path, tmp_path: Path, monkeypatch) -> None:
    blocks = [b for b in page_blocks(page) if b.skip is None]
    work = _workspace(demo, tmp_path)
    cwd = work
    env: dict[str, str | None] = {"NODEKEEP_ARCHIVE": str(work / "archive"),
                                  "NODEKEEP_ACTOR": "docs-test"}
    runner = CliRunner()
    failures = []
    for block in blocks:
        for step in block.steps:
            if step.cd is not None:
                cwd = (cwd / step.cd).resolve()
                env["NODEKEEP_ARCHIVE"] = None  # from here the archive is found walking up
                continue
            monkeypatch.chdir(cwd)
            res = runner.invoke(cli, [*step.argv, "--quiet"] if _takes_quiet(step.argv)
                                else step.argv, env=env)
            if res.exit_code != 0:
                why = (res.stderr or res.output or "").strip().splitlines()
                if res.exception is not None and not isinstance(res.exception, SystemExit):
                    why = [f"{type(res.exception).__name__}: {res.exception}"]
                failures.append(f"{step.where}: `{shell_words(step)}` exited {res.exit_code}: "
                                + (why[-1] if why else "no message"))
            elif step.stdout_to:
                (cwd / step.stdout_to).write_text(res.stdout, encoding="utf-8")
    assert not failures, (
        "docs examples that do not run against the demo survey (nodekeep demo DIR "
        + " ".join(DEMO_ARGS) + "); fix the page (ids of that survey), or mark a block that "
        "cannot run in a test with '<!-- docs-test: skip REASON -->':\n  "
        + "\n  ".join(failures))


def _takes_quiet(argv: list[str]) -> bool:
    """Whether ``--quiet`` may be appended (not after ``--``, not to a bare group name)."""
    return bool(argv) and "--" not in argv and argv[0] not in ("--help", "--version")


def test_skipped_blocks_are_few_and_say_why() -> None:
    skipped = [(b.path.name, b.line, b.skip) for p in pages(ROOT) for b in page_blocks(p)
               if b.skip is not None]
    assert len(skipped) <= MAX_SKIPPED, f"too many docs blocks left out of the test: {skipped}"
    assert all(reason for _, _, reason in skipped)


def test_extraction_of_a_page(tmp_path: Path) -> None:
    """Indented and fenced shell blocks, continuations, '&&', comments, redirection, the skip
    marker; other fenced languages and prose are not commands (CommonMark code blocks)."""
    page = tmp_path / "docs" / "page.md"
    page.parent.mkdir()
    page.write_text("\n".join([
        "Prose that names nodekeep qc inline.",  # 1
        "",
        "    nodekeep init kestrel && cd kestrel   # two steps",  # 3
        "    nodekeep deliver --format sps \\",  # 4
        "        --to \"r 1.sps\" --recipient x",
        "",
        "```toml",  # 7
        "nodekeep = 'not a command'",
        "```",
        "<!-- docs-test: skip needs a PostgreSQL server -->",  # 10
        "",
        "```sh",  # 12
        "$ nodekeep init k --db postgresql+psycopg://h/db",
        "```",
        "```console",  # 15
        "nodekeep qc --json > qc.json",
        "```",
    ]) + "\n", encoding="utf-8")
    blocks = page_blocks(page)
    assert [b.line for b in blocks] == [3, 12, 15]  # an indented block, two fences
    first = blocks[0].steps
    assert [(s.line, s.argv, s.cd) for s in first] == [
        (3, ["init", "kestrel"], None), (3, [], "kestrel"),
        (4, ["deliver", "--format", "sps", "--to", "r 1.sps", "--recipient", "x"], None)]
    assert first[0].where == "docs/page.md:3"
    assert blocks[1].skip == "needs a PostgreSQL server" and blocks[2].skip is None
    assert blocks[2].steps[0].argv == ["qc", "--json"]
    assert blocks[2].steps[0].stdout_to == "qc.json"
