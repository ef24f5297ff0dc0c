"""What a survey-input reader returns: the table, the warnings found, and format details.

A warning is a plain dict ``{"code", "line", "message"}`` (``line`` is the 1-based line of
the record in the source file, or None when the problem concerns the whole file), so it can
be stored as JSON with the input version and listed by the command line.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa


@dataclass
class ParsedInput:
    """A parsed input file: its table (None for an elevation model), warnings and meta."""

    table: pa.Table | None
    warnings: list[dict[str, Any]] = field(default_factory=list)
    meta: dict[str, Any] = field(default_factory=dict)


def problem(code: str, message: str, line: int | None = None) -> dict[str, Any]:
    """One warning: a short code, the line it concerns (or None) and a readable message."""
    return {"code": code, "line": None if line is None else int(line), "message": message}


def format_problem(path: str, w: dict[str, Any]) -> str:
    """``file:line: message`` for one warning."""
    where = path if w.get("line") is None else f"{path}:{w['line']}"
    return f"{where}: {w['message']}"
