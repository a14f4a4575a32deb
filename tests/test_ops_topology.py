"""The production topology on loopback: a Prefect server on PostgreSQL, a process work pool, two sites'
deployments (`lotgate deploy`) on their own work queues, two workers, one shared PostgreSQL store.

Checked: both sites' nights run at once on the two workers and store their decisions (the demo's
first nights carry no deliberate problem: every lot released — a simulation's known truth); while
the run lock of site A is held elsewhere, a triggered night of site A fails in Prefect without
touching a file, and runs once the lock is free. Prefect's own database is a throw-away PostgreSQL
database made by the test, separate from lotgate's store. Every process is stopped by its PID.
Prints the server's start time and memory (RSS and PSS of its processes).
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import pytest

from pipeline.demo import plant as demo
from pipeline.records.workspace import atomic_write, write_settings
from tests.cli import run_cli
from tests.ops_processes import free_port, http_ok, session_members, start, stop, wait_for
from tests.pg import fresh_database

pytestmark = pytest.mark.slow
PREFECT = str(Path(sys.executable).parent / "prefect")


def memory_kib(pids: list[int]) -> tuple[int, int]:
    """Sum of RSS and PSS (KiB) of these processes, from /proc/PID/smaps_rollup."""
    rss = pss = 0
    for pid in pids:
        try:
            for line in Path(f"/proc/{pid}/smaps_rollup").read_text().splitlines():
                if line.startswith("Rss:"):
                    rss += int(line.split()[1])
                elif line.startswith("Pss:"):
                    pss += int(line.split()[1])
        except OSError:
            continue
    return rss, pss


def _site(root: Path, store_url: str, night) -> None:
    write_settings(root, {"plant_name": f"{demo.PLANT_NAME} — {root.name}", "database_url": store_url,
                          "store_shared": True, "signing": {"signer_name": demo.DEMO_SIGNER}})
    (root / "keys").mkdir()
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir()
    for name, data in night.files.items():
        atomic_write(root / "inbox" / name, data)


def _final_state(client, flow_run_id, timeout_s: float, watch):
    def final():
        state = client.read_flow_run(flow_run_id).state
        return state if state is not None and state.is_final() else None

    return wait_for(final, timeout_s, f"flow run {flow_run_id}", every_s=2, watch=watch)


def test_server_pool_two_workers_two_sites_and_the_run_lock(tmp_path):
    from prefect.client.orchestration import get_client
    from prefect.deployments import run_deployment
    from prefect.settings import PREFECT_API_URL, temporary_settings

    from pipeline.records.run_lock import run_lock
    from pipeline.records.store import Store

    prefect_db, drop_prefect_db = fresh_database()
    store_url, drop_store = fresh_database()
    started = []
    port = free_port()
    api = f"http://127.0.0.1:{port}/api"
    base = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_API")}
    env = {**base, "PYTHONPATH": os.getcwd(), "PREFECT_HOME": str(tmp_path / "prefect-home"),
           "PREFECT_LOGGING_LEVEL": "INFO"}
    try:
        begun = time.monotonic()
        server = start("server", [PREFECT, "server", "start", "--host", "127.0.0.1", "--port", str(port),
                                  "--analytics-off"], tmp_path,
                       {**env, "PREFECT_SERVER_DATABASE_CONNECTION_URL":
                        prefect_db.replace("postgresql+psycopg://", "postgresql+asyncpg://")})
        started.append(server)
        wait_for(lambda: http_ok(f"{api}/health"), 180, "the Prefect server", every_s=0.5, watch=[server])
        start_s = time.monotonic() - begun
        time.sleep(3)
        rss, pss = memory_kib(session_members(server.pid))
        print(f"\nPrefect server on PostgreSQL: healthy after {start_s:.1f} s; memory RSS {rss / 1024:.0f} MiB, "
              f"PSS {pss / 1024:.0f} MiB ({len(session_members(server.pid))} processes)")

        nights = demo.build_scenario(nights=3, lipase_per_night=3, protease_per_night=2)
        sites = {name: tmp_path / name for name in ("site-a", "site-b")}
        _site(sites["site-a"], store_url, nights[0])
        _site(sites["site-b"], store_url, nights[1])  # other lots: lot ids are unique across sites sharing a store
        client_env = {**env, "PREFECT_API_URL": api}
        for name, root in sites.items():
            deployed = run_cli(["deploy", "--workspace", root, "--pool", "lotgate-pool", "--queue", name],
                               env=client_env, timeout=300)
            assert deployed.returncode == 0, deployed.stdout + deployed.stderr
            assert f"on pool 'lotgate-pool', queue '{name}'" in deployed.stdout
        for number in (1, 2):
            started.append(start(f"worker-{number}", [PREFECT, "worker", "start", "--pool", "lotgate-pool",
                                                      "--work-queue", "site-a", "--work-queue", "site-b"],
                                 tmp_path, client_env))
        workers = started[1:]
        wait_for(lambda: all("started" in w.output() for w in workers), 120, "two workers", watch=workers)

        with temporary_settings(updates={PREFECT_API_URL: api}), get_client(sync_client=True) as client:
            # site A's run lock held elsewhere (as by a night started by hand): its triggered night must not run
            lock_store = Store(store_url)
            with run_lock(sites["site-a"], lock_store):
                refused = run_deployment("lotgate-night/night-site-a", timeout=0)
                state = _final_state(client, refused.id, 300, started)
            assert state.is_failed(), state
            assert len(list((sites["site-a"] / "inbox").iterdir())) == len(nights[0].files)  # nothing touched
            # both sites at once, on the two workers
            runs = {name: run_deployment(f"lotgate-night/night-{name}", timeout=0) for name in sites}
            states = {name: _final_state(client, run.id, 400, started) for name, run in runs.items()}
            assert all(s.is_completed() for s in states.values()), (
                f"{states}\n" + "\n".join(f"--- {w.name} ---\n{w.output()[-6000:]}" for w in workers))
            ran_on = {client.read_flow_run(run.id).work_queue_name for run in runs.values()}
            assert ran_on == {"site-a", "site-b"}
        decisions = Store(store_url).decisions()
        by_site = {name: {d.lot_id for d in decisions if d.record.input_files and _site_of(d, nights) == name}
                   for name in sites}
        assert len(decisions) == 10 and {d.disposition for d in decisions} == {"ready for release"}
        assert all(len(lots) == 5 for lots in by_site.values()), by_site
        for root in sites.values():
            assert not any((root / "inbox").iterdir())
    finally:
        for process in reversed(started):
            stop(process)
        for process in started:
            assert process.process.poll() is not None and not [
                pid for pid in session_members(process.pid) if Path(f"/proc/{pid}").exists()
                and Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0] != "Z"]
        drop_store()
        drop_prefect_db()


def _site_of(decision, nights) -> str:
    names = set(decision.record.input_files)
    return "site-a" if names <= set(nights[0].files) else "site-b" if names <= set(nights[1].files) else "?"
