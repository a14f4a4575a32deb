"""``lotgate serve`` and ``lotgate deploy``: the night as a Prefect deployment, on a schedule or on a work pool.

``serve`` runs in the foreground (systemd, a container): it registers the workspace's deployment
with the workspace's cron schedule in the plant's time zone and runs each scheduled night in a
process of its own (Prefect's runner). Without ``PREFECT_API_URL`` it starts Prefect's local
server itself, on 127.0.0.1, and stops it on exit.

``deploy`` registers the same deployment on a Prefect server's process work pool (created when
missing) and work queue, for workers on other machines; it returns at once.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import re
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from flows.cli import EXIT_OK, _console, quiet_prefect
from pipeline.errors import InputError, LotgateError

DEPLOYMENT_FLOW = "lotgate-night"
SERVER_START_TIMEOUT_S = 180


def deployment_name(root: Path, given: str | None = None) -> str:
    """``night-<workspace folder>`` unless named: one deployment per workspace (site)."""
    name = given or f"night-{root.name}"
    if not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9._-]{0,62}", name):
        raise InputError(f"the deployment name {name!r} may hold letters, digits, '.', '_' and '-' only (64 at most)")
    return name


def next_runs(cron: str, time_zone: str, count: int = 3, after: dt.datetime | None = None) -> list[dt.datetime]:
    """The next ``count`` times the cron fires, in the plant's time zone (Prefect's own cron reading)."""
    from zoneinfo import ZoneInfo

    from prefect._vendor.croniter import croniter

    start = (after or dt.datetime.now(dt.UTC)).astimezone(ZoneInfo(time_zone))
    it = croniter(cron, start)
    return [it.get_next(dt.datetime) for _ in range(count)]


def _checked_workspace(root: Path):
    """The workspace's settings, folders, controlled documents, store and signer checked before serving."""
    from pipeline.night.open import open_night
    from pipeline.records.signing import DEFAULT_PASSPHRASE_ENV as PASSPHRASE_ENV

    # The served nights run in child processes: they need the passphrase from the environment when
    # the plant gives it that way (a passphrase_file is the better choice for a service).
    secret = os.environ.get(PASSPHRASE_ENV)
    try:
        ws, store, _signer = open_night(root)
    finally:
        if secret is not None:
            os.environ[PASSPHRASE_ENV] = secret
    if ws.notify_urls:  # a missing secret is found now, not at the end of the first night
        from pipeline.records.notify import recipients
        from pipeline.records.workspace import SETTINGS_FILE

        recipients(ws.notify_urls, ws.notify_secrets_file, str(ws.root / SETTINGS_FILE))
    return ws, store


def nightly_deployment(root: Path, name: str, cron: str | None, time_zone: str, **where):
    from prefect.client.schemas.schedules import CronSchedule
    from prefect.deployments.runner import EntrypointType

    from flows.nightly import nightly

    schedule = None if cron is None else CronSchedule(cron=cron, timezone=time_zone)
    return nightly.to_deployment(
        name=name, schedule=schedule, parameters={"workspace": str(root)},
        entrypoint_type=EntrypointType.MODULE_PATH, tags=["lotgate", f"workspace:{root.name}"],
        description=f"lotgate nightly lot release for the workspace {root}", **where)


@contextmanager
def _prefect_server() -> Iterator[str]:
    """The configured Prefect server's API URL, or a Prefect server started here on 127.0.0.1 (stopped on exit).

    A full server (``prefect server start``), not the temporary in-process one: schedules need its
    scheduler service. It is a child process of this one, stopped by its PID when serving ends.
    """
    from prefect.settings import PREFECT_API_URL, temporary_settings

    configured = PREFECT_API_URL.value()
    if configured:
        yield str(configured)
        return
    import shutil
    import signal
    import socket
    import subprocess
    import sys
    import time

    import httpx

    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    prefect = shutil.which("prefect", path=str(Path(sys.executable).parent)) or "prefect"
    server = subprocess.Popen([prefect, "server", "start", "--host", "127.0.0.1", "--port", str(port),  # noqa: S603 (fixed arguments)
                               "--analytics-off"], stdin=subprocess.DEVNULL)
    api = f"http://127.0.0.1:{port}/api"
    try:
        deadline = time.monotonic() + SERVER_START_TIMEOUT_S
        while True:
            try:
                if httpx.get(f"{api}/health", timeout=2).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            if server.poll() is not None or time.monotonic() > deadline:
                raise LotgateError(f"Prefect's server did not start on 127.0.0.1:{port}")
            time.sleep(0.5)
        os.environ["PREFECT_API_URL"] = api  # the served nights' processes inherit it
        with temporary_settings(updates={PREFECT_API_URL: api}):
            yield api
    finally:
        if server.poll() is None:
            server.send_signal(signal.SIGTERM)
            try:
                server.wait(timeout=20)
            except subprocess.TimeoutExpired:
                server.kill()
                server.wait(timeout=10)


def cmd_serve(args: argparse.Namespace) -> int:
    quiet_prefect_for_service()
    root = Path(args.workspace).expanduser().resolve()
    ws, _store = _checked_workspace(root)
    if ws.schedule_cron is None:
        raise InputError(f"{root / 'workspace.yaml'}: no schedule is set; add for example "
                         "'schedule: {cron: \"30 1 * * *\"}' (five cron fields, in the plant's time zone)")
    name = deployment_name(root, args.name)
    with _prefect_server() as api:
        from prefect import serve

        deployment = nightly_deployment(root, name, ws.schedule_cron, ws.time_zone)
        upcoming = ", ".join(f"{t:%Y-%m-%d %H:%M %Z}" for t in next_runs(ws.schedule_cron, ws.time_zone))
        # plain lines, unwrapped: a service's journal reads them
        print(f"Serving {DEPLOYMENT_FLOW}/{name} for {root}: cron '{ws.schedule_cron}' ({ws.time_zone}); "
              f"next nights {upcoming}; Prefect API {api}. Stop with Ctrl-C or SIGTERM.", flush=True)
        serve(deployment, print_starting_message=False, limit=1)
    return EXIT_OK


def quiet_prefect_for_service() -> None:
    """The command line's quiet settings, but the runner's own INFO lines kept (a service's journal wants them)."""
    os.environ.setdefault("PREFECT_LOGGING_LEVEL", "INFO")
    quiet_prefect()


def cmd_deploy(args: argparse.Namespace) -> int:
    quiet_prefect_for_service()
    from prefect.settings import PREFECT_API_URL

    root = Path(args.workspace).expanduser().resolve()
    api = PREFECT_API_URL.value()
    if not api:
        raise InputError("lotgate deploy needs the Prefect server's address: set PREFECT_API_URL "
                         "(e.g. http://prefect.plant.example:4200/api)")
    ws, _store = _checked_workspace(root)
    name = deployment_name(root, args.name)
    queue = args.queue or name
    ensure_process_pool(args.pool)
    deployment = nightly_deployment(root, name, None if args.unscheduled else ws.schedule_cron, ws.time_zone,
                                    work_pool_name=args.pool, work_queue_name=queue)
    deployment_id = deployment.apply()
    console = _console()
    console.print(f"Deployment {DEPLOYMENT_FLOW}/{name} ({deployment_id}) on pool '{args.pool}', queue '{queue}'"
                  + (f", cron '{ws.schedule_cron}' ({ws.time_zone})" if ws.schedule_cron and not args.unscheduled
                     else ", no schedule (runs when triggered)") + f"; Prefect API {api}.")
    console.print(f"Start a worker on a machine that sees {root}:  PREFECT_API_URL={api} "
                  f"prefect worker start --pool {args.pool} --work-queue {queue}")
    console.print(f"Run a night now:  prefect deployment run '{DEPLOYMENT_FLOW}/{name}'")
    if args.fan_out:
        chunk_name = register_chunk_deployment(root, name, args.pool, queue)
        console.print(f"Fan-out deployment {chunk_name} on the same pool and queue; to use it, set in "
                      f"{root / 'workspace.yaml'}:  fan_out: {{deployment: \"{chunk_name}\", chunks: 2}}")
    return EXIT_OK


def register_chunk_deployment(root: Path, name: str, pool: str, queue: str) -> str:
    """The deployment that renders chunks of this workspace's large nights on workers (flows/fanout.py)."""
    from prefect.deployments.runner import EntrypointType

    from flows.fanout import CHUNK_FLOW, render_chunk_flow

    chunk_name = f"render-{name.removeprefix('night-')}"
    render_chunk_flow.to_deployment(
        name=chunk_name, entrypoint_type=EntrypointType.MODULE_PATH, work_pool_name=pool, work_queue_name=queue,
        tags=["lotgate", f"workspace:{root.name}"],
        description=f"lotgate: renders chunks of large nights' documents for {root}").apply()
    return f"{CHUNK_FLOW}/{chunk_name}"


def ensure_process_pool(pool: str) -> None:
    """The process work pool ``pool``, created when it does not exist; another pool type is refused."""
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.actions import WorkPoolCreate
    from prefect.exceptions import ObjectNotFound

    with get_client(sync_client=True) as client:
        try:
            existing = client.read_work_pool(pool)
        except ObjectNotFound:
            client.create_work_pool(WorkPoolCreate(name=pool, type="process"))
            return
        if existing.type != "process":
            raise LotgateError(f"the Prefect work pool '{pool}' is of type '{existing.type}'; lotgate deploys to a "
                               "process pool (workers run the night on machines that see the workspace)")


def add_commands(sub) -> None:
    serve = sub.add_parser("serve", help="run the nights on the workspace's schedule, in the foreground",
                           description="Serve the workspace's nightly deployment on its schedule ('schedule: {cron: "
                                       "\"30 1 * * *\"}' in workspace.yaml, in the plant's time zone), in the foreground "
                                       "(for systemd or a container). Uses PREFECT_API_URL when set, else starts "
                                       "Prefect's local server on 127.0.0.1.")
    serve.add_argument("--workspace", required=True, metavar="DIR")
    serve.add_argument("--name", metavar="NAME", help="deployment name (default night-<workspace folder>)")
    serve.set_defaults(func=cmd_serve)
    deploy = sub.add_parser("deploy", help="register the workspace's night on a Prefect work pool",
                            description="Register the workspace's nightly deployment on the Prefect server named by "
                                        "PREFECT_API_URL, on a process work pool (created if missing) and a work queue "
                                        "(default: the deployment's name, one per site). Workers started with "
                                        "'prefect worker start --pool NAME --work-queue Q' then run its nights.")
    deploy.add_argument("--workspace", required=True, metavar="DIR")
    deploy.add_argument("--pool", required=True, metavar="NAME", help="the process work pool")
    deploy.add_argument("--queue", metavar="Q", help="the work queue (default: the deployment name)")
    deploy.add_argument("--name", metavar="NAME", help="deployment name (default night-<workspace folder>)")
    deploy.add_argument("--unscheduled", action="store_true", help="register without the workspace's schedule")
    deploy.add_argument("--fan-out", action="store_true",
                        help="also register the deployment that renders chunks of a large night on workers")
    deploy.set_defaults(func=cmd_deploy)
