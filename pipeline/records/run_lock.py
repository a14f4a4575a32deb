"""One night at a time (adapter): an advisory lock on PostgreSQL, a file lock with SQLite.

A second run started while the first holds the lock stops at once with RunLocked, before it
touches any file, and names who holds it when that is known.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import socket
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from filelock import FileLock, Timeout

from pipeline.errors import LotgateError
from pipeline.records.store import RUN_LOCK_KEY, Store


class RunLocked(LotgateError):
    """Another night is running on this workspace or database."""


def _holder_text(path: Path) -> str:
    try:
        info = json.loads(path.read_text(encoding="utf-8"))
        return f" (started {info['started_utc']} by process {info['pid']} on {info['host']})"
    except (OSError, ValueError, KeyError):
        return ""


@contextmanager
def run_lock(root: Path, store: Store, wait_s: float = 0.0) -> Iterator[None]:
    """Hold the night's lock for the duration of the block."""
    info_path = root / ".lotgate-run.json"
    if store.is_postgresql:
        connection = store.engine.connect()
        try:
            got = False
            deadline = dt.datetime.now() + dt.timedelta(seconds=wait_s)
            while True:
                got = bool(connection.exec_driver_sql(f"SELECT pg_try_advisory_lock({RUN_LOCK_KEY})").scalar())
                connection.commit()
                if got or dt.datetime.now() >= deadline:
                    break
                import time

                time.sleep(0.5)
            if not got:
                raise RunLocked("another night is already running against this database"
                                f"{_holder_text(info_path)}; this run stopped before touching any file. "
                                "Run it again when the other one has finished.")
            _write_info(info_path)
            try:
                yield
            finally:
                info_path.unlink(missing_ok=True)
                connection.exec_driver_sql(f"SELECT pg_advisory_unlock({RUN_LOCK_KEY})")
                connection.commit()
        finally:
            connection.close()
        return
    lock = FileLock(str(root / ".lotgate-run.lock"))
    try:
        lock.acquire(timeout=wait_s)
    except Timeout:
        raise RunLocked(f"another night is already running on the workspace {root}{_holder_text(info_path)}; "
                        "this run stopped before touching any file. Run it again when the other one has finished.") from None
    try:
        _write_info(info_path)
        yield
    finally:
        info_path.unlink(missing_ok=True)
        lock.release()


def _write_info(path: Path) -> None:
    path.write_text(json.dumps({"pid": os.getpid(), "host": socket.gethostname(),
                                "started_utc": dt.datetime.now(dt.UTC).isoformat(timespec="seconds")}),
                    encoding="utf-8")
