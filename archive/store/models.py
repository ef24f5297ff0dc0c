"""Catalog tables (SQLAlchemy 2). The schema is created and changed only by migrations.

Rows are never updated in place except the single ledger head row; corrections are new rows
that point at what they supersede. Hash columns hold hex SHA-256 strings; payloads that need
structure are canonical JSON text.
"""

from __future__ import annotations

from datetime import UTC, datetime

from sqlalchemy import (
    BigInteger,
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Integer,
    MetaData,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column
from sqlalchemy.types import TypeDecorator

NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

HASH = String(64)


class UTCDateTime(TypeDecorator):
    """A timestamp stored as UTC and always returned timezone-aware (UTC), on every backend."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime given to the catalog; use UTC-aware datetimes")
        value = value.astimezone(UTC)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value: datetime | None, dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            return value.replace(tzinfo=UTC)
        return value.astimezone(UTC)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)


def utcnow() -> datetime:
    """Current time, UTC-aware, microseconds kept."""
    return datetime.now(UTC)


class Survey(Base):
    """One survey (prospect) of the archive, with its projected CRS and height conventions."""

    __tablename__ = "surveys"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(200), unique=True)
    crs_epsg: Mapped[int] = mapped_column(Integer)
    crs_name: Mapped[str] = mapped_column(String(200))
    linear_unit: Mapped[str] = mapped_column(String(50))
    unit_factor: Mapped[float] = mapped_column(Float)
    vertical_datum: Mapped[str] = mapped_column(String(200), default="")
    # How GNSS heights are brought into the elevation model's datum:
    # "gga" (GGA geoid separation), "constant" (height_param = separation in metres),
    # or "grid" (height_param = a PROJ grid name).
    height_mode: Mapped[str] = mapped_column(String(20), default="gga")
    height_param: Mapped[str] = mapped_column(String(400), default="")
    client: Mapped[str] = mapped_column(String(200), default="")
    contractor: Mapped[str] = mapped_column(String(200), default="")
    area: Mapped[str] = mapped_column(String(200), default="")
    created_at: Mapped[datetime] = mapped_column(UTCDateTime)
    created_by: Mapped[str] = mapped_column(String(200))


class StoredObject(Base):
    """An object of the object store that the catalog references (kind tells what it is)."""

    __tablename__ = "objects"
    hash: Mapped[str] = mapped_column(HASH, primary_key=True)
    size: Mapped[int] = mapped_column(BigInteger)
    kind: Mapped[str] = mapped_column(String(40))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime)


class LedgerEvent(Base):
    """An append-only, hash-chained record of one state change.

    ``scheme`` says what the hash covers (:mod:`archive.store.ledger`): 1, events written
    before catalog revision 0003, hash the payload text itself; 2 hashes the payload's SHA-256
    (``payload_digest``) and the database session user (``db_user``, PostgreSQL only), so a
    custody bundle can carry an event it does not need with its payload left out
    (``payload`` NULL) and still prove the chain; ``survey_id`` names the survey without a
    foreign key for the same reason.
    """

    __tablename__ = "ledger_events"
    seq: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    at: Mapped[datetime] = mapped_column(UTCDateTime)
    actor: Mapped[str] = mapped_column(String(200))
    db_user: Mapped[str | None] = mapped_column(String(200), nullable=True)
    action: Mapped[str] = mapped_column(String(80), index=True)
    # the survey an event concerns, by id; no foreign key, so a bundle can carry the events
    # of surveys it does not hold
    survey_id: Mapped[int | None] = mapped_column(Integer, nullable=True)
    payload: Mapped[str | None] = mapped_column(Text, nullable=True)
    payload_digest: Mapped[str | None] = mapped_column(HASH, nullable=True)
    scheme: Mapped[int] = mapped_column(Integer, default=1, server_default="1")
    prev_hash: Mapped[str] = mapped_column(HASH)
    hash: Mapped[str] = mapped_column(HASH, unique=True)


class LedgerHead(Base):
    """The single row naming the newest ledger event; locked by every writer."""

    __tablename__ = "ledger_head"
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    seq: Mapped[int] = mapped_column(Integer)
    hash: Mapped[str] = mapped_column(HASH)


class RawFile(Base):
    """A raw fix log as received, stored byte for byte, with what its parse produced."""

    __tablename__ = "raw_files"
    __table_args__ = (UniqueConstraint("survey_id", "object_hash"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    survey_id: Mapped[int] = mapped_column(ForeignKey("surveys.id"), index=True)
    object_hash: Mapped[str] = mapped_column(ForeignKey("objects.hash"))
    original_name: Mapped[str] = mapped_column(String(1000))
    node: Mapped[str] = mapped_column(String(100), index=True)
    format: Mapped[str] = mapped_column(String(20))
    profile_hash: Mapped[str | None] = mapped_column(ForeignKey("objects.hash"), nullable=True)
    size: Mapped[int] = mapped_column(BigInteger)
    received_at: Mapped[datetime] = mapped_column(UTCDateTime)
    received_by: Mapped[str] = mapped_column(String(200))
    parser: Mapped[str] = mapped_column(String(80))
    n_lines: Mapped[int] = mapped_column(BigInteger)
    n_accepted: Mapped[int] = mapped_column(BigInteger)
    n_rejected: Mapped[int] = mapped_column(BigInteger)
    n_ignored: Mapped[int] = mapped_column(BigInteger)
    n_fixes: Mapped[int] = mapped_column(BigInteger)
    n_valid: Mapped[int] = mapped_column(BigInteger)
    t_first: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)
    t_last: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)
    fixes_hash: Mapped[str | None] = mapped_column(ForeignKey("objects.hash"), nullable=True)
    rejects_hash: Mapped[str | None] = mapped_column(ForeignKey("objects.hash"), nullable=True)
    # JSON: counts of rejects by reason, options used (date, node pattern), messages.
    details: Mapped[str] = mapped_column(Text, default="{}")


class InputVersion(Base):
    """One immutable version of a survey input table (stations, deployments, control, dem)."""

    __tablename__ = "input_versions"
    __table_args__ = (UniqueConstraint("survey_id", "kind", "version"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    survey_id: Mapped[int] = mapped_column(ForeignKey("surveys.id"), index=True)
    kind: Mapped[str] = mapped_column(String(30))
    version: Mapped[int] = mapped_column(Integer)
    table_hash: Mapped[str | None] = mapped_column(ForeignKey("objects.hash"), nullable=True)
    source_hash: Mapped[str] = mapped_column(ForeignKey("objects.hash"))
    original_name: Mapped[str] = mapped_column(String(1000))
    n_rows: Mapped[int] = mapped_column(BigInteger)
    # JSON: warnings found at load, format details (SPS headers, DEM CRS and datum, ...).
    warnings: Mapped[str] = mapped_column(Text, default="[]")
    meta: Mapped[str] = mapped_column(Text, default="{}")
    created_at: Mapped[datetime] = mapped_column(UTCDateTime)
    created_by: Mapped[str] = mapped_column(String(200))


class Run(Base):
    """A solution run, named by the SHA-256 of its canonical manifest."""

    __tablename__ = "runs"
    id: Mapped[str] = mapped_column(HASH, primary_key=True)
    survey_id: Mapped[int] = mapped_column(ForeignKey("surveys.id"), index=True)
    label: Mapped[str] = mapped_column(String(200), default="")
    manifest_hash: Mapped[str] = mapped_column(ForeignKey("objects.hash"))
    positions_hash: Mapped[str] = mapped_column(ForeignKey("objects.hash"))
    positions_digest: Mapped[str] = mapped_column(HASH)
    code_version: Mapped[str] = mapped_column(String(80))
    n_positions: Mapped[int] = mapped_column(Integer)
    n_flagged: Mapped[int] = mapped_column(Integer)
    summary: Mapped[str] = mapped_column(Text, default="{}")
    created_at: Mapped[datetime] = mapped_column(UTCDateTime)
    created_by: Mapped[str] = mapped_column(String(200))


class Edit(Base):
    """A manual decision on a station, immutable; later edits supersede earlier ones."""

    __tablename__ = "edits"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    survey_id: Mapped[int] = mapped_column(ForeignKey("surveys.id"), index=True)
    kind: Mapped[str] = mapped_column(String(30))
    line: Mapped[float] = mapped_column(Float)
    point: Mapped[float] = mapped_column(Float)
    point_index: Mapped[int] = mapped_column(Integer, default=1)
    payload: Mapped[str] = mapped_column(Text, default="{}")
    reason: Mapped[str] = mapped_column(Text)
    supersedes: Mapped[int | None] = mapped_column(ForeignKey("edits.id"), nullable=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime)
    created_by: Mapped[str] = mapped_column(String(200))


class Delivery(Base):
    """A file delivered to someone, stored by hash, with the run and edits it came from."""

    __tablename__ = "deliveries"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    survey_id: Mapped[int] = mapped_column(ForeignKey("surveys.id"), index=True)
    run_id: Mapped[str] = mapped_column(ForeignKey("runs.id"))
    edit_set_hash: Mapped[str] = mapped_column(HASH)
    edit_ids: Mapped[str] = mapped_column(Text, default="[]")
    format: Mapped[str] = mapped_column(String(20))
    file_hash: Mapped[str] = mapped_column(ForeignKey("objects.hash"))
    manifest_hash: Mapped[str] = mapped_column(ForeignKey("objects.hash"))
    final_hash: Mapped[str] = mapped_column(ForeignKey("objects.hash"))
    file_name: Mapped[str] = mapped_column(String(1000))
    recipient: Mapped[str] = mapped_column(String(200))
    note: Mapped[str] = mapped_column(Text, default="")
    allowed_flags: Mapped[bool] = mapped_column(Boolean, default=False)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime)
    created_by: Mapped[str] = mapped_column(String(200))
