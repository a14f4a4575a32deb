"""Fan-out: a large night renders its documents as sub-flow runs of a chunk deployment on two workers.

The same night's exports run twice on the same Prefect server and workers, in two workspaces:
once rendered by the night's own process (its local process pool), once fanned out in chunks to
the workers. The reference is the local run: the same lots, the same dispositions and labels,
each lot decided once, every certificate's signature valid, no scratch left. Prints both
durations and the speed-up (a benchmark that prints, not a timed assertion): on one 2-core
machine the workers share the cores the local pool already uses, so no gain is expected here.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pytest

from pipeline.demo import plant as demo
from pipeline.records.workspace import atomic_write, write_settings
from tests.cli import run_cli
from tests.ops_processes import free_port, http_ok, start, stop, wait_for

pytestmark = pytest.mark.slow
PREFECT = str(Path(sys.executable).parent / "prefect")


def _site(root: Path, night, fan_out: dict | None) -> None:
    settings = {"plant_name": demo.PLANT_NAME, "signing": {"signer_name": demo.DEMO_SIGNER}}
    if fan_out:
        settings["fan_out"] = fan_out
    write_settings(root, settings)
    (root / "keys").mkdir()
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir()
    for name, data in night.files.items():
        atomic_write(root / "inbox" / name, data)


def test_a_large_night_fans_out_to_two_workers_with_the_same_records(tmp_path):
    from prefect.client.orchestration import get_client
    from prefect.deployments import run_deployment
    from prefect.settings import PREFECT_API_URL, temporary_settings

    from pipeline.records.pdf_verification import verify_pdf
    from pipeline.records.store import Store

    night = demo.build_scenario(nights=2, lipase_per_night=18, protease_per_night=12)[0]
    port = free_port()
    api = f"http://127.0.0.1:{port}/api"
    base = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_API")}
    env = {**base, "PYTHONPATH": os.getcwd(), "PREFECT_HOME": str(tmp_path / "prefect-home")}
    client_env = {**env, "PREFECT_API_URL": api}
    started = []
    try:
        started.append(start("server", [PREFECT, "server", "start", "--host", "127.0.0.1", "--port", str(port),
                                        "--analytics-off"], tmp_path, env))
        wait_for(lambda: http_ok(f"{api}/health"), 180, "the Prefect server", every_s=0.5, watch=started)
        local, fanned = tmp_path / "local", tmp_path / "fanned"
        _site(local, night, None)
        deployed = run_cli(["deploy", "--workspace", local, "--pool", "pool", "--queue", "plant", "--unscheduled"],
                           env=client_env, timeout=300)
        assert deployed.returncode == 0, deployed.stdout + deployed.stderr
        _site(fanned, night, {"deployment": "lotgate-render-chunk/render-fanned", "chunks": 2})
        deployed = run_cli(["deploy", "--workspace", fanned, "--pool", "pool", "--queue", "plant", "--unscheduled",
                            "--fan-out"], env=client_env, timeout=300)
        assert deployed.returncode == 0, deployed.stdout + deployed.stderr
        assert "lotgate-render-chunk/render-fanned" in deployed.stdout
        for number in (1, 2):
            started.append(start(f"worker-{number}", [PREFECT, "worker", "start", "--pool", "pool",
                                                      "--work-queue", "plant"], tmp_path, client_env))
        wait_for(lambda: all("started" in w.output() for w in started[1:]), 120, "two workers", watch=started)
        seconds = {}
        with temporary_settings(updates={PREFECT_API_URL: api}), get_client(sync_client=True) as client:
            for name in ("local", "fanned"):
                run = run_deployment(f"lotgate-night/night-{name}", timeout=0)
                state = wait_for(lambda run=run: (s := client.read_flow_run(run.id).state) and s.is_final() and s,
                                 600, f"the {name} night", every_s=2, watch=started)
                assert state.is_completed(), (name, state, [w.output()[-3000:] for w in started[1:]])
                finished = client.read_flow_run(run.id)
                seconds[name] = finished.total_run_time.total_seconds()
            from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterParentFlowRunId

            chunks = client.read_flow_runs(flow_run_filter=FlowRunFilter(
                parent_flow_run_id=FlowRunFilterParentFlowRunId(any_=[run.id])))
        print(f"\nFan-out of {len(night.files)} exports / 30 lots: night with local rendering {seconds['local']:.1f} s, "
              f"fanned out to two workers {seconds['fanned']:.1f} s; speed-up {seconds['local'] / seconds['fanned']:.2f}x")
    finally:
        for process in reversed(started):
            stop(process)
    rendered_by = [c for c in chunks if c.state and c.state.is_completed()]
    assert len(rendered_by) >= 2  # at least one window in two chunks, each a sub-flow run of the deployment
    reference = {d.lot_id: (d.disposition, d.record.label) for d in Store(f"sqlite:///{local / 'lotgate.db'}").decisions()}
    rows = Store(f"sqlite:///{fanned / 'lotgate.db'}").decisions()
    assert len(reference) == 30 and {d.lot_id: (d.disposition, d.record.label) for d in rows} == reference
    assert len(rows) == len(reference)  # each lot once
    for d in rows:
        assert (fanned / "reports" / d.record.report.file).is_file()
        if d.record.certificate is not None:
            pdf = fanned / "certificates" / d.record.certificate.file
            assert verify_pdf(pdf, trust_roots=[fanned / "keys" / "root-ca.pem"]).valid, pdf.name
    assert not (fanned / ".fanout").exists() and not [p for p in (fanned / ".staging").rglob("*") if p.is_file()]
