"""Alembic environment for advisory (run through `advisory db upgrade`)."""

from alembic import context
from sqlalchemy import engine_from_config, pool

from advisory.store.schema import Base

config = context.config
target_metadata = Base.metadata

#: Tables owned by other libraries (the scheduler's job store).
FOREIGN_TABLES = {"apscheduler_jobs"}


def include_object(obj, name, type_, reflected, compare_to):
    return not (type_ == "table" and name in FOREIGN_TABLES)


def run_migrations_offline() -> None:
    context.configure(url=config.get_main_option("sqlalchemy.url"), target_metadata=target_metadata,
                      literal_binds=True, render_as_batch=True, include_object=include_object)
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    engine = config.attributes.get("engine")
    if engine is None:
        engine = engine_from_config(config.get_section(config.config_ini_section, {}),
                                    prefix="sqlalchemy.", poolclass=pool.NullPool)
    with engine.connect() as connection:
        context.configure(connection=connection, target_metadata=target_metadata, render_as_batch=True,
                          include_object=include_object, compare_type=True)
        with context.begin_transaction():
            context.run_migrations()
        connection.commit()


if context.is_offline_mode():
    run_migrations_offline()
else:
    run_migrations_online()
