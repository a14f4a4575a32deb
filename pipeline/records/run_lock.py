"""One night per workspace (adapter): a file lock in the workspace, and on PostgreSQL a lock in the store too.

The file lock (``DIR/.lotgate-night.lock``) is taken whatever the database, so a run on SQLite
and one with ``LOTGATE_DATABASE_URL`` set cannot work on the same workspace at once. Where the
store is PostgreSQL (which several workspaces may share) the night also holds an advisory lock
keyed by the workspace identity, on a session of its own; before every commit the store asks
that session whether it still holds the lock, so a night whose lock session was ended stops
before its next write. A second run started while the first holds the lock stops at once with
RunLocked, before it touches any file, and names who holds it when that is known.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import socket
import time
from collections.abc import Iterator
from contextlib import contextmanager, nullcontext
from pathlib import Path

from filelock import FileLock, Timeout

from pipeline.errors import LotgateError
from pipeline.records.database import AdvisoryLock
from pipeline.records.store import Store
from pipeline.records.workspace_id import lock_key, workspace_id

LOCK_FILE = ".lotgate-night.lock"
INFO_FILE = ".lotgate-run.json"
NIGHT_LOCK_CLASS = 472_901  # first key of the store's two-key advisory lock; the second is the workspace's


class RunLocked(LotgateError):
    """Another night is running on this workspace."""


class RunLockLost(RunLocked):
    """The night's lock in the store was lost: it must stop before its next write."""


def _holder_text(path: Path) -> str:
    try:
        info = json.loads(path.read_text(encoding="utf-8"))
        return f" (started {info['started_utc']} by process {info['pid']} on {info['host']})"
    except (OSError, ValueError, KeyError):
        return ""


def _refused(root: Path) -> RunLocked:
    return RunLocked(f"another night is already running on the workspace {root}{_holder_text(root / INFO_FILE)}; "
                     "this run stopped before touching any file. Run it again when the other one has finished.")


@contextmanager
def run_lock(root: Path, store: Store, wait_s: float = 0.0) -> Iterator[None]:
    """Hold the night's lock on the workspace (and on a PostgreSQL store) for the duration of the block."""
    lock = FileLock(str(root / LOCK_FILE))
    try:
        lock.acquire(timeout=wait_s)
    except Timeout:
        raise _refused(root) from None
    try:
        with _store_lock(root, store, wait_s) if store.is_postgresql else nullcontext():
            _write_info(root / INFO_FILE)
            try:
                yield
            finally:
                (root / INFO_FILE).unlink(missing_ok=True)
    finally:
        lock.release()


@contextmanager
def _store_lock(root: Path, store: Store, wait_s: float) -> Iterator[None]:
    """The advisory lock keyed by the workspace identity, on its own session, checked before each commit."""
    lock = AdvisoryLock(store.engine, NIGHT_LOCK_CLASS, lock_key(workspace_id(root)))
    try:
        deadline = time.monotonic() + wait_s
        while not lock.try_take():
            if time.monotonic() >= deadline:
                raise _refused(root)
            time.sleep(0.5)
        store.set_commit_check(lambda: _check_held(lock))
        try:
            yield
        finally:
            store.set_commit_check(None)
    finally:
        lock.close()


def _check_held(lock: AdvisoryLock) -> None:
    """Raise RunLockLost unless the lock session is alive and still holds the night's lock."""
    why = lock.lost_because()
    if why is not None:
        raise RunLockLost(f"this night lost its run lock in the results store: {why}. It stopped before its next "
                          "write, so that no other night's records are mixed with its own; run it again to finish "
                          "the night (what was committed stands).")


def _write_info(path: Path) -> None:
    path.write_text(json.dumps({"pid": os.getpid(), "host": socket.gethostname(),
                                "started_utc": dt.datetime.now(dt.UTC).isoformat(timespec="seconds")}),
                    encoding="utf-8")
