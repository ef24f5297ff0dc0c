"""Progress reporting that library code can call without knowing who listens.

Long-running library functions take an optional ``progress`` object with this small
interface; the command line passes a bar on stderr (silenced by ``--quiet``), library
users pass nothing.
"""

from __future__ import annotations

from typing import Protocol


class Progress(Protocol):
    """Receives progress of one long task."""

    def start(self, total: int, unit: str, label: str = "") -> None:
        """A task of ``total`` units (files, bytes, deployments) begins."""

    def advance(self, n: int = 1, item: str = "") -> None:
        """``n`` more units are done; ``item`` names what was just finished."""

    def close(self) -> None:
        """The task is over."""


class NoProgress:
    """Progress that goes nowhere (the library default)."""

    def start(self, total: int, unit: str, label: str = "") -> None:
        return None

    def advance(self, n: int = 1, item: str = "") -> None:
        return None

    def close(self) -> None:
        return None
