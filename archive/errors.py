"""One exception root for everything nodekeep refuses or cannot do.

Each subclass carries the data of the problem and builds its own message; the command line
turns any :class:`NodekeepError` into a one-line reason and an exit code in one place
(``archive.cli.main``). Library users catch :class:`NodekeepError`.
"""

from __future__ import annotations


class NodekeepError(Exception):
    """Root of every expected failure. ``exit_code`` is what the command line returns."""

    exit_code = 1

    def __init__(self, message: str, *, hint: str | None = None) -> None:
        self.hint = hint
        super().__init__(message)

    def __str__(self) -> str:
        base = super().__str__()
        return f"{base} ({self.hint})" if self.hint else base


class UsageError(NodekeepError):
    """The request itself is wrong: bad option values, missing survey, unknown names."""

    exit_code = 2


class ArchiveNotFound(NodekeepError):
    """No archive at the given place, nor in NODEKEEP_ARCHIVE, nor above the current folder."""

    def __init__(self, where: str) -> None:
        super().__init__(
            f"no nodekeep archive found {where}",
            hint="create one with 'nodekeep init DIR' or pass --archive DIR",
        )


class SchemaBehind(NodekeepError):
    """The catalog schema is older than this version of nodekeep."""

    def __init__(self, current: str | None, head: str) -> None:
        self.current, self.head = current, head
        super().__init__(
            f"the archive catalog is at schema revision {current or 'none'}, this nodekeep needs {head}",
            hint="run 'nodekeep upgrade' to migrate it",
        )


class SchemaAhead(NodekeepError):
    """The catalog was written by a newer nodekeep than this one."""

    def __init__(self, current: str) -> None:
        super().__init__(
            f"the archive catalog is at schema revision {current}, unknown to this nodekeep",
            hint="upgrade nodekeep itself (pip install -U nodekeep)",
        )


class InputError(NodekeepError):
    """A file given as input cannot be used. Names the file and, where known, line and columns."""

    def __init__(
        self,
        path: str,
        problem: str,
        *,
        line: int | None = None,
        columns: str | None = None,
        expected: str | None = None,
        hint: str | None = None,
    ) -> None:
        self.path, self.problem, self.line = path, problem, line
        self.columns, self.expected = columns, expected
        where = path if line is None else f"{path}:{line}"
        msg = f"{where}: {problem}"
        if columns:
            msg += f" (columns {columns})"
        if expected:
            msg += f"; expected {expected}"
        super().__init__(msg, hint=hint)


class CRSProblem(NodekeepError):
    """A coordinate reference system is unknown, of the wrong kind, or needs a missing grid."""


class IntegrityError(NodekeepError):
    """Stored data does not match its hash, or a reference does not resolve."""

    exit_code = 3


class Refused(NodekeepError):
    """A request the archive refuses on purpose (would overwrite, unacknowledged flags, ...)."""

    exit_code = 4


class StorageError(NodekeepError):  # an EnvironmentProblem of storage (same exit code)
    """The archive's storage refused a write (disk full, read-only media, no permission).

    Raised before anything is recorded: the archive stays whole (at most an unreferenced
    object is left, which ``verify`` reports as dangling)."""

    exit_code = 5


class EnvironmentProblem(NodekeepError):
    """The world around the archive failed, not the request and not nodekeep: a full disk,
    a lost database connection, a missing optional module, storage that refuses writes.

    Exit code 5, as for storage: nothing was recorded by the step that failed; fix the
    environment (free space, restart the server, install the extra) and run it again."""

    exit_code = 5


class CatalogDamaged(IntegrityError):
    """The catalog database itself is damaged (a corrupt page, undecodable text, a cut file)."""

    def __init__(self, where: str, detail: str) -> None:
        super().__init__(
            f"the catalog {where} is damaged: {detail}",
            hint="restore the catalog from a backup (the objects folder is not affected); "
                 "'nodekeep verify' names what is damaged")


class ObjectDamaged(IntegrityError):
    """A stored object is missing, no longer hashes to its name, or cannot be parsed.

    ``owner`` names what the object belongs to (a node's log, a survey input version, a
    run), filled by the archive that read it; the command stops before recording anything."""

    def __init__(self, h: str, detail: str, owner: str | None = None) -> None:
        self.h, self.detail, self.owner = h, detail, owner
        super().__init__(self._text(),
                         hint="restore it from a backup of the objects folder; "
                              "'nodekeep verify' lists every damaged object")

    def _text(self) -> str:
        about = f" ({self.owner})" if self.owner else ""
        return f"stored object {self.h[:16]}{about} {self.detail}"

    def __reduce__(self) -> tuple[object, ...]:  # survives the trip back from a worker process
        return (ObjectDamaged, (self.h, self.detail, self.owner))

    def with_owner(self, owner: str | None) -> ObjectDamaged:
        """The same error naming what the object belongs to."""
        if owner:
            self.owner = owner
            self.args = (self._text(),)
        return self


class ReadOnly(StorageError):
    """The archive cannot be written here (opened with ``--read-only``, a catalog or object
    folder without write permission, a PostgreSQL role granted SELECT only, a read-only
    server): a command that would change it is refused before it does anything."""

    def __init__(self, where: str, reason: str, *, what: str = "this command",
                 hint: str | None = None) -> None:
        self.where, self.reason = where, reason
        super().__init__(f"the archive {where} is read-only here ({reason}); {what} would "
                         "change it",
                         hint=hint or "every query command works read-only (where, trace, "
                                      "show, history, verify, reproduce, bundle, ...); to "
                                      "change the archive, use an account that may write it")
