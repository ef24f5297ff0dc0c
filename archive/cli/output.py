"""Printing results: readable text for people, JSON for scripts, progress bars on stderr."""

from __future__ import annotations

import json
import sys
import time
from collections.abc import Callable, Sequence
from datetime import date, datetime
from pathlib import Path
from typing import Any

import click

from archive.cli.options import CliState


def _json_default(value: Any) -> Any:
    if isinstance(value, (datetime, date)):
        return value.isoformat()
    if isinstance(value, Path):
        return str(value)
    if hasattr(value, "item"):
        return value.item()
    if hasattr(value, "tolist"):
        return value.tolist()
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")


def to_json(data: Any) -> str:
    """Indented JSON text of a result (datetimes as ISO 8601)."""
    return json.dumps(data, indent=2, default=_json_default, ensure_ascii=False, allow_nan=False)


def emit(state: CliState, data: Any, text: str | Callable[[], str]) -> None:
    """Print ``data`` as JSON under ``--json``, else the readable ``text``."""
    if state.as_json:
        click.echo(to_json(data))
    else:
        click.echo(text() if callable(text) else text)


def table(rows: Sequence[Sequence[Any]], headers: Sequence[str]) -> str:
    """A plain aligned text table."""
    cells = [[str(h) for h in headers]] + [["" if v is None else str(v) for v in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip() for r in cells]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def human_bytes(n: float) -> str:
    """1234567 -> '1.2 MB'."""
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if abs(n) < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n:.1f} TB"


class Bar:
    """A progress bar on stderr with counts and rate; silent when quiet or not a terminal
    unless forced. Implements :class:`archive.progress.Progress`."""

    def __init__(self, state: CliState, *, force: bool = False) -> None:
        self.enabled = not state.quiet and not state.as_json and (force or sys.stderr.isatty())
        self.total = 0
        self.done = 0
        self.unit = ""
        self.label = ""
        self.t0 = time.monotonic()
        self._last = 0.0

    def start(self, total: int, unit: str, label: str = "") -> None:
        self.total, self.unit, self.label = total, unit, label
        self.done = 0
        self.t0 = time.monotonic()
        self._draw(force=True)

    def advance(self, n: int = 1, item: str = "") -> None:
        self.done += n
        self._draw(item=item)

    def _fmt(self, v: float) -> str:
        return human_bytes(v) if self.unit == "bytes" else f"{v:,.0f} {self.unit}"

    def _draw(self, item: str = "", force: bool = False) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if not force and now - self._last < 0.2 and self.done < self.total:
            return
        self._last = now
        elapsed = max(now - self.t0, 1e-9)
        frac = self.done / self.total if self.total else 0.0
        filled = int(frac * 24)
        rate = self.done / elapsed
        line = (f"\r{self.label} [{'#' * filled}{'.' * (24 - filled)}] "
                f"{self._fmt(self.done)}/{self._fmt(self.total)} {self._fmt(rate)}/s {item[:30]}")
        click.echo(line.ljust(100), nl=False, err=True)

    def close(self) -> None:
        if self.enabled:
            self._draw(force=True)
            click.echo("", err=True)
