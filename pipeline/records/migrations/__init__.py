"""Alembic migrations of the results store (run by pipeline.store.Store on open)."""
