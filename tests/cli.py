"""Running the ``lotgate`` command line from a test, and stopping everything it started.

A command that orchestrates starts Prefect's temporary server as a child process. Should that
server outlive the command (a slow shutdown on a loaded machine), a test reading the command's
output through pipes would wait for it forever. So the command writes to files, runs in a
session of its own, and when it has returned every process left in that session is stopped.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def run_cli(argv: list[str], *, timeout: float = 600, **kwargs) -> subprocess.CompletedProcess:
    """``python -m flows.cli ARGV`` with text output captured; the processes it leaves are stopped."""
    with tempfile.TemporaryDirectory() as folder:
        out_path, err_path = Path(folder) / "stdout", Path(folder) / "stderr"
        with open(out_path, "wb") as out, open(err_path, "wb") as err:
            process = subprocess.Popen([sys.executable, "-m", "flows.cli", *map(str, argv)], stdout=out, stderr=err,
                                       stdin=subprocess.DEVNULL, start_new_session=True, **kwargs)
            try:
                code = process.wait(timeout=timeout)
            finally:
                stop_session(process.pid)
        return subprocess.CompletedProcess(argv, code, out_path.read_text(errors="replace"),
                                           err_path.read_text(errors="replace"))


def stop_session(session_id: int, grace_s: float = 5.0) -> None:
    """SIGTERM, then SIGKILL, to every process still in the session the command started."""
    for sig in (signal.SIGTERM, signal.SIGKILL):
        try:
            os.killpg(session_id, sig)
        except ProcessLookupError:
            return
        deadline = time.monotonic() + grace_s
        while time.monotonic() < deadline:
            try:
                os.killpg(session_id, 0)
            except ProcessLookupError:
                return
            time.sleep(0.1)
