"""The night on PostgreSQL, chosen by the database URL alone; two runs at once."""

import json
import os
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text

from pipeline.demo import plant as demo
from pipeline.records.workspace import atomic_write, write_settings
from tests.cli import run_cli
from tests.pg import fresh_database

REPO = Path(__file__).resolve().parents[1]

pytestmark = [pytest.mark.slow, pytest.mark.postgres]


@pytest.fixture
def pg_url():
    url, drop = fresh_database()
    yield url
    drop()


def _env(url):
    env = dict(os.environ, LOTGATE_DATABASE_URL=url)
    env.pop("PREFECT_API_URL", None)
    return env


def test_the_demo_runs_on_postgresql_by_setting_only_the_url(pg_url, tmp_path):
    out = run_cli(["demo", "--workspace", tmp_path / "w"], env=_env(pg_url), timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    assert "ERROR" not in out.stdout + out.stderr and "Traceback" not in out.stdout + out.stderr
    assert not (tmp_path / "w" / "lotgate.db").exists()
    with create_engine(pg_url).connect() as connection:
        rows = connection.execute(text("select disposition, count(*) from decisions group by disposition")).all()
    # the same decisions as the golden copy of the demo on SQLite (tests/golden/demo), revision by revision
    golden = [json.loads(line) for line in (REPO / "tests" / "golden" / "demo" / "store" / "decisions.jsonl")
              .read_text().splitlines()]
    assert dict(rows) == dict(Counter(d["disposition"] for d in golden))
    assert dict(rows)["released"] == dict(rows)["ready for release"] == 47  # each ready lot approved by the reviewer


def _workspace(root):
    write_settings(root, {"plant_name": demo.PLANT_NAME, "signing": {"signer_name": demo.DEMO_SIGNER}})
    (root / "keys").mkdir()
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir()
    night = demo.build_scenario(nights=1)[0]
    for name, data in night.files.items():
        atomic_write(root / "inbox" / name, data)
    return night


def test_a_run_while_another_holds_the_lock_stops_before_touching_anything(pg_url, tmp_path):
    from pipeline.records.run_lock import run_lock
    from pipeline.records.store import Store

    root = tmp_path / "w"
    night = _workspace(root)
    command = [sys.executable, "-m", "flows.cli", "run", "--workspace", str(root)]
    with run_lock(root, Store(pg_url)):  # the advisory lock, as a running night holds it
        refused = subprocess.run(command, env=_env(pg_url), capture_output=True, text=True, timeout=600)
    assert refused.returncode == 3, refused.stderr[-2000:]
    assert "another night is already running" in refused.stderr + refused.stdout
    assert sorted(p.name for p in (root / "inbox").iterdir()) == sorted(night.files)
    with create_engine(pg_url).connect() as connection:
        assert connection.execute(text("select count(*) from decisions")).scalar() == 0


def test_two_runs_at_once_exactly_one_processes(pg_url, tmp_path):
    root = tmp_path / "w"
    night = _workspace(root)
    command = [sys.executable, "-m", "flows.cli", "run", "--workspace", str(root)]
    first = subprocess.Popen(command, env=_env(pg_url), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    # Start the second run once the first holds the lock (it writes who holds it).
    deadline = time.monotonic() + 120
    while not (root / ".lotgate-run.json").exists() and first.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    second = subprocess.Popen(command, env=_env(pg_url), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    results = []
    for run in (first, second):
        stdout, stderr = run.communicate(timeout=600)
        results.append((run.returncode, stdout, stderr))
    # The second either met the lock (exit 3) or, if the first had already finished, found an
    # empty inbox; either way exactly one run decided the lots, each once.
    assert results[0][0] == 0, results
    code, stdout, stderr = results[1]
    assert code == 3 and "another night is already running" in stderr or \
        code == 0 and "Files received 0 " in stdout, results
    with create_engine(pg_url).connect() as connection:
        assert connection.execute(text("select count(*) from decisions")).scalar() == len(night.lots)
        assert connection.execute(text("select count(distinct lot_id) from decisions")).scalar() == len(night.lots)


def test_a_run_on_postgresql_is_refused_while_a_sqlite_run_holds_the_same_workspace(pg_url, tmp_path):
    from pipeline.records.run_lock import run_lock
    from pipeline.records.store import Store

    root = tmp_path / "w"
    night = _workspace(root)
    command = [sys.executable, "-m", "flows.cli", "run", "--workspace", str(root), "--no-orchestration"]
    with run_lock(root, Store(f"sqlite:///{root / 'lotgate.db'}")):  # a night on the workspace's own SQLite store
        refused = subprocess.run(command, env=_env(pg_url), capture_output=True, text=True, timeout=600)
    assert refused.returncode == 3, refused.stderr[-2000:]
    assert "another night is already running on the workspace" in refused.stderr
    assert sorted(p.name for p in (root / "inbox").iterdir()) == sorted(night.files)
    with create_engine(pg_url).connect() as connection:
        assert connection.execute(text("select count(*) from night_runs")).scalar() == 0
