"""One night per workspace, whatever the database; a night that lost its store lock stops before writing.

Attacks: a run on SQLite and one with LOTGATE_DATABASE_URL set on the same workspace; a second
workspace on a store that is not its own; a copied workspace (the same identity) on a shared
PostgreSQL store; the session holding the PostgreSQL lock ended with pg_terminate_backend.
"""

import os
import subprocess
import sys
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text

from flows import nightly
from pipeline.demo import plant as demo
from pipeline.errors import InputError, StoreError
from pipeline.records.run_lock import NIGHT_LOCK_CLASS, RunLocked, run_lock
from pipeline.records.store import Store
from pipeline.records.workspace import atomic_write, open_workspace, write_settings
from pipeline.records.workspace_id import ID_FILE, lock_key, workspace_id
from tests.pg import fresh_database

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture
def pg_url():
    url, drop = fresh_database()
    yield url
    drop()


def _inbox(root, files):
    (root / "inbox").mkdir(parents=True, exist_ok=True)
    for name, data in files.items():
        atomic_write(root / "inbox" / name, data)


def _night(root):
    ws = open_workspace(root)
    ws.make_folders()
    return nightly.run_stages(ws, Store(ws.database_url), None, orchestrated=False)  # nothing to sign


def test_the_workspace_identity_is_written_once_and_a_damaged_one_is_refused(tmp_path):
    first = workspace_id(tmp_path)
    assert workspace_id(tmp_path) == first and len(first) == 32
    assert lock_key(first) == lock_key(first) and -2**31 <= lock_key(first) < 2**31
    (tmp_path / ID_FILE).write_text("edited by hand\n")
    with pytest.raises(InputError, match="does not hold a workspace identity"):
        workspace_id(tmp_path)


@pytest.mark.postgres
def test_a_sqlite_run_and_a_postgresql_run_cannot_share_a_workspace(pg_url, tmp_path):
    sqlite = Store(f"sqlite:///{tmp_path / 'lotgate.db'}")
    postgres = Store(pg_url)
    for holder, other in ((sqlite, postgres), (postgres, sqlite)):
        with run_lock(tmp_path, holder):
            with pytest.raises(RunLocked, match=f"another night is already running on the workspace {tmp_path}"):
                with run_lock(tmp_path, other):
                    pass
    with run_lock(tmp_path, postgres):  # released by both
        pass


@pytest.mark.postgres
def test_a_copied_workspace_meets_the_store_lock_and_two_sites_each_hold_their_own(pg_url, tmp_path):
    store = Store(pg_url)
    site_a, copy_of_a, site_b = (tmp_path / name for name in ("a", "copy-of-a", "b"))
    for root in (site_a, copy_of_a, site_b):
        root.mkdir()
    workspace_id(site_a)
    (copy_of_a / ID_FILE).write_bytes((site_a / ID_FILE).read_bytes())
    with run_lock(site_a, store):
        with pytest.raises(RunLocked):  # another folder, the same workspace: the store's lock refuses it
            with run_lock(copy_of_a, store):
                pass
        with run_lock(site_b, Store(pg_url)):  # another workspace on a shared store runs beside it
            pass


def test_a_store_refuses_a_night_from_another_workspace_before_anything_moves(tmp_path):
    shared_db = tmp_path / "plant.db"
    site_a, site_b = tmp_path / "a", tmp_path / "b"
    for root in (site_a, site_b):
        write_settings(root, {"database_url": f"sqlite:///{shared_db}"})
        _inbox(root, {f"export-{root.name}.csv": f"not an export from {root.name}\n".encode()})
    _night(site_a)
    with pytest.raises(StoreError, match="holds the nights of another workspace"):
        _night(site_b)
    assert [p.name for p in (site_b / "inbox").iterdir()] == ["export-b.csv"]
    assert [f.file_name for f in Store(f"sqlite:///{shared_db}").files()] == ["export-a.csv"]
    # Declared shared by the plant: site b runs, and does not take site a's live night for an interrupted one.
    for root in (site_a, site_b):
        write_settings(root, {"database_url": f"sqlite:///{shared_db}", "store_shared": True})
    store = Store(f"sqlite:///{shared_db}")
    live = store.start_night("test", workspace_id(site_a), shared=True)
    _night(site_b)
    assert [n.id for n in store.unfinished_nights(workspace_id(site_a))] == [live]
    assert not [e for e in store.audit_events() if '"night-interrupted"' in e.body]
    assert sorted(f.file_name for f in store.files()) == ["export-a.csv", "export-b.csv"]


_PAUSED_NIGHT = """
import sys
from flows import cli
from pipeline.night import receive

real = receive.parse_in_chunks

def paused(*args):
    print("paused", flush=True)
    sys.stdin.readline()
    yield from real(*args)

receive.parse_in_chunks = paused
sys.exit(cli.main(["run", "--workspace", sys.argv[1], "--no-orchestration"]))
"""


def _demo_workspace(root):
    write_settings(root, {"plant_name": demo.PLANT_NAME, "signing": {"signer_name": demo.DEMO_SIGNER}})
    (root / "keys").mkdir()
    (root / "keys" / "use-demo-identity").touch()
    night = demo.build_scenario(nights=1)[0]
    _inbox(root, night.files)
    return night


def _count(url, query):
    engine = create_engine(url)
    try:
        with engine.connect() as connection:
            return connection.execute(text(query)).scalar()
    finally:
        engine.dispose()


@pytest.mark.slow
@pytest.mark.postgres
def test_a_night_whose_lock_session_is_ended_stops_and_no_second_night_starts(pg_url, tmp_path):
    root = tmp_path / "w"
    night = _demo_workspace(root)
    env = dict(os.environ, LOTGATE_DATABASE_URL=pg_url)
    first = subprocess.Popen([sys.executable, "-c", _PAUSED_NIGHT, str(root)], cwd=REPO, env=env, text=True,
                             stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        assert first.stdout.readline().strip() == "paused", first.stderr.read()[-2000:]
        # The night is inside its receive stage, holding the store's lock: end that session.
        key = lock_key(workspace_id(root)) & 0xFFFFFFFF
        terminated = _count(pg_url, "SELECT count(pg_terminate_backend(pid)) FROM pg_locks WHERE locktype = "
                                    f"'advisory' AND classid = {NIGHT_LOCK_CLASS} AND objid = {key} AND granted")
        assert terminated == 1
        second = subprocess.run([sys.executable, "-m", "flows.cli", "run", "--workspace", str(root),
                                 "--no-orchestration"], cwd=REPO, env=env, capture_output=True, text=True, timeout=600)
        assert second.returncode == 3 and "another night is already running" in second.stderr, second.stderr[-2000:]
        assert _count(pg_url, "SELECT count(*) FROM night_runs") == 1
        assert _count(pg_url, "SELECT count(*) FROM audit_events WHERE kind = 'night-interrupted'") == 0
        stdout, stderr = first.communicate("\n", timeout=600)  # the first night goes on ...
    finally:
        if first.poll() is None:
            first.kill()
            first.wait()
    # ... and stops before its next write, saying why.
    assert first.returncode == 3 and "lost its run lock in the results store" in stderr, stderr[-2000:]
    assert "its database session ended" in stderr and "Traceback" not in stderr
    assert _count(pg_url, "SELECT count(*) FROM audit_events WHERE kind = 'file-received'") == 0
    assert _count(pg_url, "SELECT count(*) FROM decisions") == 0
    # The next run finishes the night: each file received once, each lot decided once.
    third = subprocess.run([sys.executable, "-m", "flows.cli", "run", "--workspace", str(root),
                            "--no-orchestration"], cwd=REPO, env=env, capture_output=True, text=True, timeout=600)
    assert third.returncode == 0, third.stderr[-2000:]
    assert _count(pg_url, "SELECT count(*) FROM audit_events WHERE kind IN ('file-received', 'file-quarantined')"
                          ) == len(night.files)
    assert _count(pg_url, "SELECT count(DISTINCT file_name) FROM input_files") == len(night.files)
    assert _count(pg_url, "SELECT count(*) FROM input_files") == len(night.files)
    assert _count(pg_url, "SELECT count(DISTINCT lot_id) FROM decisions") == len(night.lots)
    assert _count(pg_url, "SELECT count(*) FROM decisions") == len(night.lots)
    assert _count(pg_url, "SELECT count(*) FROM audit_events WHERE kind = 'night-interrupted'") == 1  # the first


@pytest.mark.postgres
def test_every_store_on_the_locked_database_stops_writing_once_the_lock_session_is_ended(pg_url, tmp_path):
    from pipeline.records import audit
    from pipeline.records.run_lock import RunLockLost

    locked, flows_own = Store(pg_url), Store(pg_url)  # the flow opens its own store on the URL the command locked
    with run_lock(tmp_path, locked):
        flows_own.add_events([audit.event("test-event", time_zone="UTC")])
        key = lock_key(workspace_id(tmp_path)) & 0xFFFFFFFF
        assert _count(pg_url, "SELECT count(pg_terminate_backend(pid)) FROM pg_locks WHERE locktype = 'advisory' "
                              f"AND classid = {NIGHT_LOCK_CLASS} AND objid = {key}") == 1
        with pytest.raises(RunLockLost, match="lost its run lock .* its database session ended"):
            flows_own.add_events([audit.event("test-event", time_zone="UTC")])
    assert len(Store(pg_url).audit_events()) == 1
    Store(pg_url).add_events([audit.event("test-event", time_zone="UTC")])  # released: no check left behind
