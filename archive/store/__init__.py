"""The custody core: catalog, content-addressed objects, hash-chained ledger, verification.

Nothing above this layer talks to the database engine or the filesystem of the object store
directly; it goes through :class:`~archive.store.archive.Archive`.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from archive.store.archive import Archive

__all__ = ["Archive"]


def __getattr__(name: str) -> Any:
    # ``Archive`` (SQLAlchemy and the catalog models under it) is imported when first asked
    # for: a process that only writes objects (a parsing process) never loads the catalog.
    if name == "Archive":
        from archive.store.archive import Archive

        return Archive
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
