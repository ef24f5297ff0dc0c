"""Alembic environment: runs against the engine handed over by the library
(``config.attributes['engine']``), or against ``sqlalchemy.url`` when run by hand."""

from alembic import context
from sqlalchemy import create_engine

from archive.store.models import Base

config = context.config
target_metadata = Base.metadata


def run_migrations() -> None:
    engine = config.attributes.get("engine")
    if engine is None:
        engine = create_engine(config.get_main_option("sqlalchemy.url"))
    with engine.connect() as connection:
        sqlite = connection.dialect.name == "sqlite"
        if sqlite:
            # SQLite alters a table by copying it (batch mode): foreign keys are switched off
            # around the copy, as SQLite's ALTER TABLE procedure asks, and checked after it.
            # The pragma cannot change inside a transaction, so it is set on the driver's
            # connection (autocommit) before the migration's transaction begins.
            connection.connection.dbapi_connection.execute("PRAGMA foreign_keys=OFF")
        context.configure(
            connection=connection,
            target_metadata=target_metadata,
            render_as_batch=sqlite,
            compare_type=True,
        )
        with context.begin_transaction():
            context.run_migrations()
            if sqlite:
                bad = connection.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
                if bad:
                    raise RuntimeError(f"migration left broken references: {bad[:5]}")
        connection.commit()
        if sqlite:
            connection.connection.dbapi_connection.execute("PRAGMA foreign_keys=ON")


if context.is_offline_mode():
    context.configure(url=config.get_main_option("sqlalchemy.url"), target_metadata=target_metadata,
                      literal_binds=True)
    with context.begin_transaction():
        context.run_migrations()
else:
    run_migrations()
