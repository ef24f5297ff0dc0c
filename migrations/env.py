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
        context.configure(
            connection=connection,
            target_metadata=target_metadata,
            render_as_batch=connection.dialect.name == "sqlite",
            compare_type=True,
        )
        with context.begin_transaction():
            context.run_migrations()
        connection.commit()


if context.is_offline_mode():
    context.configure(url=config.get_main_option("sqlalchemy.url"), target_metadata=target_metadata,
                      literal_binds=True)
    with context.begin_transaction():
        context.run_migrations()
else:
    run_migrations()
