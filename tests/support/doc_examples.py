"""The command examples of the docs: every ``nodekeep ...`` line of a shell block of README.md
and docs/*.md, with its file and line, for tests/test_doc_examples.py.

A shell block is an indented code block (four spaces, CommonMark) or a fenced block whose
info string is empty or ``sh``, ``shell``, ``bash`` or ``console``. A command is a line that
starts with ``nodekeep`` (after an optional ``$ ``), continued over lines ending in ``\\``;
``cmd && cmd`` is two commands, a trailing ``# comment`` is dropped, ``> FILE`` writes the
output to FILE. ``cd DIR`` lines (or parts) are kept as steps: the examples of a page run in
order, in one folder. docs/cli.md is the generated reference (usage lines, not examples).

A block preceded by the marker line ``<!-- docs-test: skip REASON -->`` (blank lines between
allowed) is left out on purpose: a command that needs a server or a network, or that would
change something the test cannot provide. The reason is required and reported.
"""

from __future__ import annotations

import re
import shlex
from dataclasses import dataclass, field
from pathlib import Path

SHELL_INFO = {"", "sh", "shell", "bash", "console"}
SKIP = re.compile(r"^\s*<!--\s*docs-test:\s*skip\s+(?P<reason>\S.*?)\s*-->\s*$")
FENCE = re.compile(r"^(?P<indent> {0,3})(?P<fence>`{3,}|~{3,})\s*(?P<info>[^`\s]*)")


@dataclass
class Step:
    """One command of a page (``argv`` after ``nodekeep``), or a ``cd``."""

    path: Path
    line: int  # 1-based line of the page where the command starts
    text: str  # the command as written (continuations joined)
    argv: list[str]
    cd: str | None = None  # set for a 'cd DIR' step
    stdout_to: str | None = None  # '> FILE'

    @property
    def where(self) -> str:
        """'docs/qc.md:9' for messages."""
        return f"{self.path.parent.name}/{self.path.name}:{self.line}" \
            if self.path.parent.name == "docs" else f"{self.path.name}:{self.line}"


@dataclass
class Block:
    """A shell block of a page: its steps, and why it is skipped (None: it runs)."""

    path: Path
    line: int
    steps: list[Step] = field(default_factory=list)
    skip: str | None = None


def _blocks(path: Path) -> list[tuple[int, list[tuple[int, str]], str | None]]:
    """(first line, [(line number, text)], skip reason) of every shell block."""
    lines = path.read_text(encoding="utf-8").splitlines()
    out: list[tuple[int, list[tuple[int, str]], str | None]] = []
    skip: str | None = None
    i, prev_blank = 0, True
    while i < len(lines):
        text = lines[i]
        m_skip, m_fence = SKIP.match(text), FENCE.match(text)
        if m_skip:
            skip = m_skip["reason"]
        elif m_fence:
            fence, body, start = m_fence["fence"], [], i + 1
            i += 1
            while i < len(lines) and not lines[i].lstrip().startswith(fence):
                body.append((i + 1, lines[i]))
                i += 1
            if m_fence["info"].lower() in SHELL_INFO:
                out.append((start, body, skip))
            skip = None
        elif text.startswith("    ") and prev_blank and text.strip():
            body, start = [], i + 1
            while i < len(lines) and (lines[i].startswith("    ") or not lines[i].strip()):
                body.append((i + 1, lines[i][4:]))
                i += 1
            out.append((start, body, skip))
            skip, prev_blank = None, True
            continue
        elif text.strip():
            skip = None if not text.lstrip().startswith("<!--") else skip
        prev_blank = not text.strip()
        i += 1
    return out


def _commands(body: list[tuple[int, str]]) -> list[tuple[int, str]]:
    """Logical lines (continuations joined) with the line they start on."""
    out: list[tuple[int, str]] = []
    pending: tuple[int, str] | None = None
    for number, text in body:
        text = text.strip()
        if text.startswith("$ "):
            text = text[2:]
        if pending is not None:
            pending = (pending[0], pending[1] + " " + text)
        else:
            pending = (number, text)
        if pending[1].endswith("\\"):
            pending = (pending[0], pending[1][:-1].rstrip())
            continue
        out.append(pending)
        pending = None
    if pending is not None:
        out.append(pending)
    return out


def _steps(path: Path, number: int, text: str) -> list[Step]:
    """The steps of one logical line ('' when it holds no nodekeep command or cd)."""
    lexer = shlex.shlex(text, posix=True, punctuation_chars="&;>|")
    lexer.whitespace_split = True
    lexer.commenters = "#"
    tokens = list(lexer)
    parts: list[list[str]] = [[]]
    for tok in tokens:
        if tok in ("&&", ";"):
            parts.append([])
        else:
            parts[-1].append(tok)
    steps = []
    for part in parts:
        if not part:
            continue
        if part[0] == "cd" and len(part) == 2:
            steps.append(Step(path, number, text, [], cd=part[1]))
        elif part[0] == "nodekeep":
            argv, out = part[1:], None
            if ">" in argv:
                k = argv.index(">")
                argv, out = argv[:k], argv[k + 1]
            steps.append(Step(path, number, text, argv, stdout_to=out))
    return steps


def page_blocks(path: Path) -> list[Block]:
    """The shell blocks of a page that hold a nodekeep command, in order."""
    out = []
    for start, body, skip in _blocks(path):
        block = Block(path, start, skip=skip)
        for number, text in _commands(body):
            block.steps += _steps(path, number, text)
        if any(not s.cd for s in block.steps):
            out.append(block)
    return out


def pages(root: Path) -> list[Path]:
    """README.md and docs/*.md but the generated command reference."""
    return [root / "README.md", *sorted(p for p in (root / "docs").glob("*.md")
                                        if p.name != "cli.md")]


def shell_words(step: Step) -> str:
    """The step as one shell line, for messages."""
    return "nodekeep " + " ".join(shlex.quote(a) for a in step.argv)
