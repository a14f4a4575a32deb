"""The results store's database: engine, SQLite settings and Alembic migrations (adapter)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from alembic import command
from alembic.config import Config
from filelock import FileLock
from sqlalchemy import Engine, create_engine, event, text
from sqlalchemy.exc import SQLAlchemyError

from pipeline.errors import StoreError

MIGRATIONS = Path(__file__).resolve().parent / "migrations"
MIGRATION_LOCK_KEY = 472_901_001


def _sqlite_pragmas(connection: Any, _record: Any) -> None:
    """Write-ahead log: readers never block the writer, and a commit costs one sync, not three."""
    cursor = connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA synchronous=NORMAL")
    cursor.execute("PRAGMA busy_timeout=30000")
    cursor.close()


def open_engine(url: str) -> Engine:
    """The SQLAlchemy engine for ``url``; SQLite connections get the write-ahead log."""
    engine = create_engine(url, future=True)
    if engine.dialect.name == "sqlite":
        event.listen(engine, "connect", _sqlite_pragmas)
    return engine


def migrate(engine: Engine, revision: str = "head") -> None:
    """Bring the database to ``revision`` with Alembic; one process at a time."""
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS))
    if engine.dialect.name == "postgresql":
        with engine.begin() as connection:
            connection.exec_driver_sql(f"SELECT pg_advisory_xact_lock({MIGRATION_LOCK_KEY})")
            config.attributes["connection"] = connection
            command.upgrade(config, revision)
        return
    database = engine.url.database
    lock = FileLock(f"{database}.migrate.lock") if database and database != ":memory:" else None
    if lock is not None:
        Path(database).parent.mkdir(parents=True, exist_ok=True)
        lock.acquire(timeout=60)
    try:
        with engine.begin() as connection:
            # The driver opens no transaction for DDL on its own, so a process killed in the middle of
            # a migration would leave tables without their version; an explicit BEGIN makes the whole
            # upgrade one transaction (SQLite's DDL is transactional).
            connection.exec_driver_sql("BEGIN")
            config.attributes["connection"] = connection
            command.upgrade(config, revision)
    finally:
        if lock is not None:
            lock.release()


def check_url(url: str) -> None:
    """A database URL SQLAlchemy can read, whose driver is installed; a set-up error (StoreError) otherwise."""
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import ArgumentError, NoSuchModuleError

    try:
        make_url(url).get_dialect().import_dbapi()
    except (ArgumentError, NoSuchModuleError, ImportError) as exc:
        raise StoreError(f"the database URL {safe_url(url)} cannot be used ({exc.__class__.__name__}: {exc}); "
                         "allowed: sqlite:///FILE or postgresql+psycopg://USER@HOST:PORT/DATABASE") from exc


def safe_url(url: str) -> str:
    """The URL with any password hidden, for messages."""
    if "@" in url and "://" in url:
        scheme, rest = url.split("://", 1)
        credentials, host = rest.rsplit("@", 1)
        user = credentials.split(":", 1)[0]
        return f"{scheme}://{user}:***@{host}" if ":" in credentials else url
    return url


_HELD = text("SELECT count(*) FROM pg_locks WHERE locktype = 'advisory' AND pid = pg_backend_pid() AND granted "
             "AND classid = :first AND objid = :second AND objsubid = 2")  # the second key shows as an unsigned oid


class AdvisoryLock:
    """A PostgreSQL session-level advisory lock (two 32-bit keys) on a connection of its own."""

    def __init__(self, engine: Engine, first: int, second: int):
        self.keys = {"first": first, "second": second}
        self.connection = engine.connect()

    def try_take(self) -> bool:
        taken = bool(self.connection.execute(text("SELECT pg_try_advisory_lock(:first, :second)"), self.keys).scalar())
        self.connection.commit()
        return taken

    def lost_because(self) -> str | None:
        """None while this session is alive and holds the lock; otherwise why not, in words."""
        try:
            held = self.connection.execute(_HELD, {"first": self.keys["first"],
                                                   "second": self.keys["second"] & 0xFFFFFFFF}).scalar()
            self.connection.commit()
        except SQLAlchemyError as exc:
            return f"its database session ended ({exc.__class__.__name__})"
        return None if held else "the database no longer counts it as held"

    def close(self) -> None:
        """Release the lock (if the session still lives) and close the session."""
        try:
            self.connection.execute(text("SELECT pg_advisory_unlock(:first, :second)"), self.keys)
            self.connection.commit()
        except SQLAlchemyError:  # the session is gone, and its lock with it
            pass
        finally:
            self.connection.close()
