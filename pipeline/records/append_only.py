"""Append-only in the database: triggers refusing UPDATE and DELETE on the record tables.

SQLite and PostgreSQL both get a BEFORE UPDATE and a BEFORE DELETE trigger per table (PostgreSQL
also BEFORE TRUNCATE) that aborts the statement, naming the table. On PostgreSQL the plant may
also split roles (``role_split_statements``): the owner runs the migrations; the application role
the nights connect as may SELECT and INSERT only, so an UPDATE, DELETE or TRUNCATE is refused by
the grants before any trigger runs.

A later migration that rebuilds one of these tables on SQLite (Alembic's batch mode copies the
table) drops its triggers: it must call ``create_triggers`` again. ``missing_triggers`` lets
``lotgate verify`` say when a table lost them.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import text

REFUSAL = "lotgate: {table} is append-only; records are never changed or deleted"
PG_FUNCTION = "lotgate_refuse_change"


def _sqlite_triggers(table: str) -> list[str]:
    message = REFUSAL.format(table=table)
    return [f"CREATE TRIGGER IF NOT EXISTS {table}_no_{what.lower()} BEFORE {what} ON {table} "
            f"BEGIN SELECT RAISE(ABORT, '{message}'); END" for what in ("UPDATE", "DELETE")]


def _pg_function() -> str:
    return (f"CREATE OR REPLACE FUNCTION {PG_FUNCTION}() RETURNS trigger LANGUAGE plpgsql AS $$ BEGIN "
            f"RAISE EXCEPTION 'lotgate: % is append-only; records are never changed or deleted', TG_TABLE_NAME "
            "USING ERRCODE = 'insufficient_privilege'; END $$")


def _pg_triggers(table: str) -> list[str]:
    return [f"DROP TRIGGER IF EXISTS {table}_no_change ON {table}",
            f"CREATE TRIGGER {table}_no_change BEFORE UPDATE OR DELETE ON {table} "
            f"FOR EACH ROW EXECUTE FUNCTION {PG_FUNCTION}()",
            f"DROP TRIGGER IF EXISTS {table}_no_truncate ON {table}",
            f"CREATE TRIGGER {table}_no_truncate BEFORE TRUNCATE ON {table} "
            f"FOR EACH STATEMENT EXECUTE FUNCTION {PG_FUNCTION}()"]


def trigger_statements(dialect: str, tables: tuple[str, ...]) -> list[str]:
    """The DDL making ``tables`` append-only on ``dialect`` (pure)."""
    if dialect == "postgresql":
        return [_pg_function(), *(sql for table in tables for sql in _pg_triggers(table))]
    if dialect == "sqlite":
        return [sql for table in tables for sql in _sqlite_triggers(table)]
    raise ValueError(f"no append-only triggers are written for the {dialect} database")


def create_triggers(connection: Any, tables: tuple[str, ...]) -> None:
    for sql in trigger_statements(connection.dialect.name, tables):
        connection.execute(text(sql))  # text(): the dialect escapes the '%' of RAISE for the driver


def drop_triggers(connection: Any, tables: tuple[str, ...]) -> None:
    for table in tables:
        if connection.dialect.name == "postgresql":
            connection.exec_driver_sql(f"DROP TRIGGER IF EXISTS {table}_no_change ON {table}")
            connection.exec_driver_sql(f"DROP TRIGGER IF EXISTS {table}_no_truncate ON {table}")
        else:
            for what in ("update", "delete"):
                connection.exec_driver_sql(f"DROP TRIGGER IF EXISTS {table}_no_{what}")


def missing_triggers(connection: Any, tables: tuple[str, ...]) -> list[str]:
    """The tables among ``tables`` whose refusing triggers are not (all) in place."""
    if connection.dialect.name == "postgresql":
        found = {row[0] for row in connection.execute(text(
            "SELECT tgname FROM pg_trigger WHERE NOT tgisinternal AND tgenabled <> 'D'"))}
        wanted = {table: (f"{table}_no_change", f"{table}_no_truncate") for table in tables}
    else:
        found = {row[0] for row in connection.execute(text("SELECT name FROM sqlite_master WHERE type = 'trigger'"))}
        wanted = {table: (f"{table}_no_update", f"{table}_no_delete") for table in tables}
    return [table for table, names in wanted.items() if not all(name in found for name in names)]


# The owner/application split on PostgreSQL (run by the plant's database administrator; see DEVELOPERS.md).
def role_split_statements(owner: str, app: str, database: str) -> list[str]:
    """Two roles (pure): ``owner`` owns the schema and runs the migrations (lotgate's first open, and each
    upgrade); ``app``, the role nights and commands connect as, may read and add rows, never change or
    delete them, now and in tables later migrations add (default privileges)."""
    return [f"CREATE ROLE {owner} LOGIN", f"CREATE ROLE {app} LOGIN",
            f"GRANT CONNECT ON DATABASE {database} TO {owner}, {app}",
            f"ALTER SCHEMA public OWNER TO {owner}",
            f"GRANT USAGE ON SCHEMA public TO {app}",
            f"ALTER DEFAULT PRIVILEGES FOR ROLE {owner} IN SCHEMA public GRANT SELECT, INSERT ON TABLES TO {app}",
            f"ALTER DEFAULT PRIVILEGES FOR ROLE {owner} IN SCHEMA public GRANT USAGE, SELECT ON SEQUENCES TO {app}"]
