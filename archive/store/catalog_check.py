"""The catalog database checked as a file and as a set of constraints, for ``verify``.

``verify`` proves the archive's content against its ledger; these checks prove the
container that holds it, so a damaged catalog is a named finding instead of a crash later:

- SQLite: ``PRAGMA integrity_check`` (every page, b-tree and index entry), each message
  named by the table or index it concerns; every text column decodable as UTF-8 (SQLite
  stores whatever bytes it is given, and Python cannot read a row with invalid UTF-8).
- Both backends: every foreign key resolves and every unique constraint holds, checked by
  query rather than trusted to the engine (SQLite may run with foreign keys off, and a
  PostgreSQL session may disable triggers or an index may be corrupt).
- PostgreSQL with the ``amcheck`` extension installed: ``bt_index_check`` on every index
  of the catalog. PostgreSQL keeps text encoding valid itself.

Each problem is a ``(kind, subject, detail)`` triple; kinds are ``damaged-catalog`` and
``broken-constraint``.
"""

from __future__ import annotations

import re

from sqlalchemy import Engine, String, Text, text
from sqlalchemy.exc import DBAPIError

from archive.store.models import Base

Finding = tuple[str, str, str]
MAX_MESSAGES = 100  # integrity_check stops after this many messages

_INDEX_HINT = ("the rows are intact, only an index is wrong: restore the catalog from a "
               "backup, or rebuild its indexes (sqlite3 CATALOG 'REINDEX') and verify again")
_PAGE_HINT = ("restore the catalog from a backup (the objects folder is not affected) and "
              "verify again")


def _first_line(exc: BaseException) -> str:
    orig = getattr(exc, "orig", None) or exc
    words = str(orig).strip()
    return words.splitlines()[0] if words else type(orig).__name__


def check_catalog(engine: Engine) -> list[Finding]:
    """Every problem of the catalog database itself (never raises for a damaged catalog)."""
    found: list[Finding] = []
    if engine.dialect.name == "sqlite":
        found += _sqlite_integrity(engine)
        if found:  # a damaged file: the row-level checks below would only repeat it
            return found
        found += _sqlite_text(engine)
    found += _constraints(engine)
    if engine.dialect.name == "postgresql":
        found += _pg_amcheck(engine)
    return found


def _sqlite_integrity(engine: Engine) -> list[Finding]:
    try:
        with engine.connect() as conn:
            roots = {int(r[1]): (r[0], r[2]) for r in conn.exec_driver_sql(
                "SELECT name, rootpage, type FROM sqlite_schema WHERE rootpage > 0")}
            rows = [r[0] for r in conn.exec_driver_sql(
                f"PRAGMA integrity_check({MAX_MESSAGES})")]
    except DBAPIError as exc:
        return [("damaged-catalog", "catalog file",
                 f"SQLite cannot check it: {_first_line(exc)}; {_PAGE_HINT}")]
    if rows == ["ok"]:
        return []
    out: list[Finding] = []
    for message in rows:
        for part in str(message).split("\n"):
            part = part.strip()
            if not part or part.startswith("***"):
                continue
            out.append(_named(part, roots))
    return out


def _named(message: str, roots: dict[int, tuple[str, str]]) -> Finding:
    """An integrity_check message as a finding naming the table or index concerned."""
    m = re.search(r"from index (\S+)|in index (\S+)|entries in index (\S+)", message)
    if m:
        name = next(g for g in m.groups() if g)
        return ("damaged-catalog", f"index {name}", f"{message}; {_INDEX_HINT}")
    m = re.search(r"Tree (\d+) page (\d+)", message)
    if m:
        kind_name = roots.get(int(m.group(1)))
        what = f"{kind_name[1]} {kind_name[0]}" if kind_name else f"tree {m.group(1)}"
        return ("damaged-catalog", f"{what}, page {m.group(2)}", f"{message}; {_PAGE_HINT}")
    m = re.search(r"[Pp]age (\d+)", message)
    subject = f"catalog page {m.group(1)}" if m else "catalog file"
    return ("damaged-catalog", subject, f"{message}; {_PAGE_HINT}")


def _text_columns() -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for table in Base.metadata.sorted_tables:
        cols = [c.name for c in table.columns if isinstance(c.type, String | Text)]
        if cols:
            out[table.name] = cols
    return out


def _sqlite_text(engine: Engine) -> list[Finding]:
    """Every text cell of every catalog table is valid UTF-8 (read as bytes, decoded here)."""
    out: list[Finding] = []
    with engine.connect() as conn:
        for table, cols in _text_columns().items():
            blobs = ", ".join(f'CAST("{c}" AS BLOB)' for c in cols)
            try:
                result = conn.exec_driver_sql(f'SELECT rowid, {blobs} FROM "{table}"')
                for row in result:
                    for col, value in zip(cols, row[1:], strict=True):
                        if value is None:
                            continue
                        try:
                            bytes(value).decode("utf-8")
                        except UnicodeDecodeError as exc:
                            out.append(("damaged-catalog", f"{table} row {row[0]}",
                                        f"column {col} is not valid UTF-8 (byte {exc.start}); "
                                        + _PAGE_HINT))
            except DBAPIError as exc:
                out.append(("damaged-catalog", f"table {table}",
                            f"cannot be read: {_first_line(exc)}; {_PAGE_HINT}"))
    return out


def _constraints(engine: Engine) -> list[Finding]:
    """Foreign keys resolve and unique constraints hold, by query."""
    out: list[Finding] = []
    with engine.connect() as conn:
        for table in Base.metadata.sorted_tables:
            pk = [c.name for c in table.primary_key.columns]
            key = " || '/' || ".join(f'CAST(c."{k}" AS TEXT)' for k in pk) if pk else "''"
            for fk in table.foreign_keys:
                col, parent = fk.parent.name, fk.column
                if parent.table.name == "objects":
                    continue  # verify names these itself (bad-reference)
                sql = (f'SELECT {key} FROM "{table.name}" c LEFT JOIN "{parent.table.name}" p '
                       f'ON c."{col}" = p."{parent.name}" '
                       f'WHERE c."{col}" IS NOT NULL AND p."{parent.name}" IS NULL LIMIT 20')
                try:
                    for (k,) in conn.exec_driver_sql(sql):
                        out.append(("broken-constraint", f"{table.name} row {k}",
                                    f"column {col} names {parent.table.name} "
                                    f"{parent.name} that does not exist"))
                except DBAPIError as exc:
                    out.append(("damaged-catalog", f"table {table.name}",
                                f"cannot be read: {_first_line(exc)}; {_PAGE_HINT}"))
            for cons in table.constraints:
                cols = [c.name for c in getattr(cons, "columns", [])]
                if type(cons).__name__ not in ("UniqueConstraint", "PrimaryKeyConstraint") \
                        or not cols:
                    continue
                names = ", ".join(f'"{c}"' for c in cols)
                sql = (f'SELECT {names}, COUNT(*) FROM "{table.name}" GROUP BY {names} '
                       "HAVING COUNT(*) > 1 LIMIT 20")
                try:
                    for row in conn.exec_driver_sql(sql):
                        values = "/".join(str(v) for v in row[:-1])
                        out.append(("broken-constraint", f"{table.name} key {values}",
                                    f"{row[-1]} rows share ({', '.join(cols)}), which must "
                                    "be unique"))
                except DBAPIError as exc:
                    out.append(("damaged-catalog", f"table {table.name}",
                                f"cannot be read: {_first_line(exc)}; {_PAGE_HINT}"))
    return out


def _pg_amcheck(engine: Engine) -> list[Finding]:
    """``bt_index_check`` on every catalog index, where the amcheck extension is installed."""
    out: list[Finding] = []
    with engine.connect() as conn:
        if not conn.execute(text(
                "SELECT 1 FROM pg_extension WHERE extname = 'amcheck'")).first():
            return out
        names = [t.name for t in Base.metadata.sorted_tables]
        indexes = conn.execute(text(
            "SELECT i.indexrelid::regclass::text FROM pg_index i "
            "JOIN pg_class c ON c.oid = i.indrelid JOIN pg_am a ON a.oid = "
            "(SELECT relam FROM pg_class WHERE oid = i.indexrelid) "
            "WHERE c.relname = ANY(:names) AND a.amname = 'btree' "
            "AND c.relnamespace = to_regnamespace(current_schema())::oid"),
            {"names": names}).scalars().all()
    for index in indexes:
        try:
            with engine.connect() as conn:
                conn.execute(text("SELECT bt_index_check(CAST(:i AS regclass), true)"),
                             {"i": index})
        except DBAPIError as exc:
            out.append(("damaged-catalog", f"index {index}",
                        f"{_first_line(exc)}; rebuild it (REINDEX INDEX {index}) or restore "
                        "the catalog from a backup"))
    return out
