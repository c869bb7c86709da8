"""Alembic's environment: always given an open connection by `store_migrate.migrate` (no alembic.ini, no URL)."""

from alembic import context

connection = context.config.attributes["connection"]
context.configure(connection=connection, render_as_batch=connection.dialect.name == "sqlite")
with context.begin_transaction():
    context.run_migrations()
