"""A scheduled night fires: `lotgate serve` with a one-minute cron processes a demo inbox by itself.

`serve` starts Prefect's local server itself (no PREFECT_API_URL), on 127.0.0.1; the test waits for
the night to be recorded, checks its decisions (the demo's first nights carry no deliberate problem:
every lot released, a simulation's known truth), then stops serve and every process it started, by PID.
"""

from __future__ import annotations

import os
import sqlite3
import sys

import pytest

from pipeline.demo import plant as demo
from pipeline.records.workspace import atomic_write, write_settings
from tests.ops_processes import session_members, start, stop, wait_for

pytestmark = pytest.mark.slow


def _finished_nights(root):
    try:
        with sqlite3.connect(f"file:{root / 'lotgate.db'}?mode=ro", uri=True, timeout=1) as db:
            return db.execute("select night_id, files_received, lots_decided from night_closings "
                              "where how = 'closed'").fetchall()
    except sqlite3.Error:
        return []


def test_a_one_minute_cron_runs_the_night_on_the_inbox(tmp_path):
    root = tmp_path / "site-a"
    write_settings(root, {"plant_name": demo.PLANT_NAME, "signing": {"signer_name": demo.DEMO_SIGNER},
                          "schedule": {"cron": "* * * * *"}, "time_zone": "Europe/Berlin"})
    (root / "keys").mkdir()
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir()
    night = demo.build_scenario(nights=2, lipase_per_night=3, protease_per_night=2)[0]
    for name, data in night.files.items():
        atomic_write(root / "inbox" / name, data)
    env = {key: value for key, value in os.environ.items() if not key.startswith("PREFECT_API")}
    env.update(PYTHONPATH=os.getcwd(), PREFECT_HOME=str(tmp_path / "prefect-home"), PREFECT_LOGGING_LEVEL="INFO")
    serve = start("serve", [sys.executable, "-m", "flows.cli", "serve", "--workspace", str(root)], tmp_path, env)
    try:
        wait_for(lambda: "Serving lotgate-night/night-site-a" in serve.output(), 120, "serve to start",
                 watch=[serve])
        assert "cron '* * * * *' (Europe/Berlin)" in serve.output()
        nights = wait_for(lambda: _finished_nights(root), 300, "the scheduled night", every_s=2, watch=[serve])
    finally:
        members = session_members(serve.pid)
        killed = stop(serve)
    assert len(members) >= 2  # serve and the Prefect server it started (and a flow run, if one was running)
    assert not [pid for pid in members if os.path.exists(f"/proc/{pid}") and _not_zombie(pid)], killed
    (night_id, received, decided), *_ = nights
    assert received == len(night.files) and decided == 5
    assert not any((root / "inbox").iterdir())
    with sqlite3.connect(root / "lotgate.db") as db:
        dispositions = [row[0] for row in db.execute("select disposition from decisions")]
    assert dispositions == ["ready for release"] * 5  # release mode 'approval': a person approves


def _not_zombie(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat") as stat:
            return stat.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False
