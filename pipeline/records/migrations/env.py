"""Alembic environment: migrations run on the connection that pipeline.records.database hands over."""

from alembic import context

connection = context.config.attributes.get("connection")
if connection is None:  # pragma: no cover - the project always passes a connection
    raise RuntimeError("run lotgate's migrations through pipeline.records.database.migrate, which passes a connection")
context.configure(connection=connection, target_metadata=None, render_as_batch=True)
with context.begin_transaction():
    context.run_migrations()
