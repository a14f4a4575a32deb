"""Long-running processes for the operations tests: started in sessions of their own, stopped by PID.

Each process (a Prefect server, a worker, `lotgate serve`) starts in a new session with its output
in files. Stopping it sends SIGTERM to its PID, waits, then stops by PID every process still in
its session (the flow runs and servers it started), SIGKILL for those that do not stop.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@dataclass
class Started:
    name: str
    process: subprocess.Popen
    log: Path

    @property
    def pid(self) -> int:
        return self.process.pid

    def output(self) -> str:
        return self.log.read_text(errors="replace") if self.log.exists() else ""


def start(name: str, argv: list[str], folder: Path, env: dict[str, str]) -> Started:
    log = folder / f"{name}.log"
    with open(log, "wb") as out:
        process = subprocess.Popen(argv, stdout=out, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=env,
                                   start_new_session=True, cwd=folder)
    return Started(name, process, log)


def session_members(session: int) -> list[int]:
    """PIDs of the processes whose session id is ``session`` (read from /proc)."""
    members = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[3]) == session:  # after the command: state, ppid, pgrp, session
            members.append(int(entry.name))
    return members


def _wait_gone(pids: list[int], seconds: float) -> list[int]:
    deadline = time.monotonic() + seconds
    alive = list(pids)
    while alive and time.monotonic() < deadline:
        time.sleep(0.2)
        alive = [pid for pid in alive if _alive(pid)]
    return alive


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:  # a zombie is gone for our purpose
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


def stop(started: Started, grace_s: float = 15.0) -> list[int]:
    """Stop the process and everything left in its session, each by its PID; returns the PIDs it had to kill."""
    session = started.pid
    if started.process.poll() is None:
        started.process.send_signal(signal.SIGTERM)
        try:
            started.process.wait(timeout=grace_s)
        except subprocess.TimeoutExpired:
            started.process.kill()
            started.process.wait(timeout=10)
    left = [pid for pid in session_members(session) if pid != started.pid]
    for pid in left:
        try:
            os.kill(pid, signal.SIGTERM)
        except ProcessLookupError:
            pass
    killed = _wait_gone(left, grace_s)
    for pid in killed:
        try:
            os.kill(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    _wait_gone(killed, 5)
    return killed


def wait_for(check: Callable[[], object], timeout_s: float, what: str, *, every_s: float = 1.0,
             watch: list[Started] | None = None) -> object:
    """Poll ``check`` until it returns something true; fail naming ``what`` (and any watched process that died)."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        value = check()
        if value:
            return value
        for process in watch or []:
            if process.process.poll() is not None:
                raise AssertionError(f"{process.name} exited ({process.process.returncode}) while waiting for {what}:"
                                     f"\n{process.output()[-3000:]}")
        time.sleep(every_s)
    logs = "\n".join(f"--- {p.name}:\n{p.output()[-2000:]}" for p in watch or [])
    raise AssertionError(f"timed out after {timeout_s:.0f} s waiting for {what}\n{logs}")


def http_ok(url: str) -> bool:
    import urllib.request

    try:
        with urllib.request.urlopen(url, timeout=2) as response:
            return response.status == 200
    except OSError:
        return False
