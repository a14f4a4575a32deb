"""Alembic migrations of the results store (run by pipeline.records.database.migrate when a Store opens)."""
