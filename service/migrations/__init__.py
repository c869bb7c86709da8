"""Alembic migrations of the audit store (run on start by `store_migrate.migrate`)."""
