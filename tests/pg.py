"""PostgreSQL for tests: start the local server if it is down, make throw-away databases."""

import shutil
import subprocess
import uuid
from pathlib import Path

import pytest

ADMIN_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"


def postgres_installed() -> bool:
    return Path("/etc/postgresql").is_dir() or shutil.which("pg_ctlcluster") is not None


def ensure_running() -> None:
    """Start the cluster when nothing answers on 127.0.0.1:5432 (this machine kind: trust auth)."""
    from sqlalchemy import create_engine, text

    def up() -> bool:
        try:
            with create_engine(ADMIN_URL).connect() as connection:
                connection.execute(text("select 1"))
            return True
        except Exception:
            return False

    if up():
        return
    versions = sorted(p.name for p in Path("/etc/postgresql").iterdir())
    subprocess.run(["pg_ctlcluster", "--skip-systemctl-redirect", versions[-1], "main", "start"], check=False)
    if not up():
        pytest.fail("PostgreSQL is installed but did not start on 127.0.0.1:5432")


def fresh_database() -> tuple[str, callable]:
    """A new empty database; returns its URL and a function that drops it."""
    from sqlalchemy import create_engine, text

    if not postgres_installed():
        pytest.skip("no PostgreSQL server is installed on this machine (/etc/postgresql is absent)")
    ensure_running()
    name = f"lotgate_{uuid.uuid4().hex[:12]}"
    admin = create_engine(ADMIN_URL, isolation_level="AUTOCOMMIT")
    with admin.connect() as connection:
        connection.execute(text(f'CREATE DATABASE "{name}"'))

    def drop() -> None:
        with admin.connect() as connection:
            connection.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()

    return f"postgresql+psycopg://postgres@127.0.0.1:5432/{name}", drop


def database_of(kind: str, sqlite_url: str | None):
    """For a fixture parametrised over both stores: ``sqlite_url`` when ``kind`` is "sqlite", else a
    fresh PostgreSQL database, dropped when the test is done."""
    if kind == "sqlite":
        yield sqlite_url
        return
    url, drop = fresh_database()
    yield url
    drop()
