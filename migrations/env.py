"""Alembic environment: runs against the engine the service hands over in ``attributes``.

Replicas may start together against one store, so migrations run one process at a time: on
SQLite the transaction takes the write lock as it begins, on PostgreSQL it takes an advisory
lock first; the processes that follow then find nothing left to do. Every revision runs in that
one transaction (``transactional_ddl``, which SQLite's DDL allows): with a commit after each, as
alembic does by default on SQLite, another process took the lock between two revisions and ran
the next one twice.
"""

from alembic import context
from sqlalchemy import text

from service.store.db import WRITE_LOCK
from service.store.tables import Base

engine = context.config.attributes["engine"]

with engine.connect() as connection:
    connection.execution_options(**{WRITE_LOCK: True})
    context.configure(
        connection=connection,
        target_metadata=Base.metadata,
        render_as_batch=connection.dialect.name == "sqlite",
        transactional_ddl=True,
    )
    with context.begin_transaction():
        if connection.dialect.name == "postgresql":
            connection.execute(
                text("SELECT pg_advisory_xact_lock(hashtext('excerpta migrations'))")
            )
        context.run_migrations()
    connection.commit()
