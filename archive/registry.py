"""Registries: one place that names each pluggable implementation.

A registry maps a name (``sps``, ``stations``, ``huber``...) to an implementation and a
one-line description. The library looks implementations up by name; the command line builds
its choices and help from the same registry, so registering a new entry is all it takes for
``--format`` (or ``load KIND``, or ``[estimate] estimator``) to offer it. Implementations
may be given as a ``"module:attribute"`` string, imported on first use, so that listing the
names stays cheap. docs/maintainer-guide.md has the recipe for each registry.
"""

from __future__ import annotations

import importlib
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any, Generic, TypeVar

T = TypeVar("T")


@dataclass(frozen=True)
class Entry(Generic[T]):
    """One registered implementation."""

    name: str
    description: str
    target: Any  # the implementation, or "module:attribute" to import on first use
    extra: tuple[tuple[str, Any], ...] = ()

    def load(self) -> T:
        """The implementation (imported on first use when given as ``module:attribute``)."""
        if isinstance(self.target, str):
            module, _, attr = self.target.partition(":")
            return getattr(importlib.import_module(module), attr)
        return self.target

    def get(self, key: str, default: Any = None) -> Any:
        """An extra property of the entry (e.g. the file suffix of a format)."""
        return dict(self.extra).get(key, default)


class Registry(Generic[T]):
    """Named implementations of one kind of thing (``what`` names it in messages)."""

    def __init__(self, what: str, hint: str = "") -> None:
        self.what = what
        self.hint = hint
        self._entries: dict[str, Entry[T]] = {}

    def register(self, name: str, description: str, target: Any, **extra: Any) -> Entry[T]:
        """Add an entry; a name already taken is a programming error (ValueError)."""
        if not name or name != name.strip() or " " in name:
            raise ValueError(f"{self.what} name {name!r} must be one word")
        if name in self._entries:
            raise ValueError(f"{self.what} {name!r} is registered already")
        entry = Entry(name, description, target, tuple(sorted(extra.items())))
        self._entries[name] = entry
        return entry

    def unregister(self, name: str) -> None:
        """Remove an entry (tests that register a toy one take it out again)."""
        self._entries.pop(name, None)

    def entry(self, name: str) -> Entry[T]:
        """The entry called ``name``; :class:`UsageError` naming the known ones otherwise."""
        try:
            return self._entries[name]
        except KeyError:
            from archive.errors import UsageError

            raise UsageError(f"unknown {self.what} {name!r}",
                             hint=self.hint or f"use one of {', '.join(self.names())}") from None

    def get(self, name: str) -> T:
        """The implementation called ``name``."""
        return self.entry(name).load()

    def names(self) -> tuple[str, ...]:
        """Registered names, in registration order."""
        return tuple(self._entries)

    def __contains__(self, name: object) -> bool:
        return name in self._entries

    def __iter__(self) -> Iterator[Entry[T]]:
        return iter(list(self._entries.values()))

    def describe(self, sep: str = "; ") -> str:
        """``name: description`` of every entry, joined (for command help)."""
        return sep.join(f"{e.name}: {e.description}" for e in self)
