"""The custody core: catalog, content-addressed objects, hash-chained ledger, verification.

Nothing above this layer talks to the database engine or the filesystem of the object store
directly; it goes through :class:`~archive.store.archive.Archive`.
"""

from archive.store.archive import Archive

__all__ = ["Archive"]
