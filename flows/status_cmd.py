"""``lotgate status``: the last nights, open lots, signing identity, disk, store and schedule; exit code for a person.

Reads only: the store is opened without migrating it, the run lock is not taken, nothing is written.
"""

from __future__ import annotations

import argparse
import datetime as dt
import shutil
from pathlib import Path

from flows.cli import _console

STATUS_EXIT_CODES = """exit codes of lotgate status:
  0  nothing needs a person
  6  lots await a person: held, ready for approval, pending, or with overdue results
  7  the nightly operation needs a person: a failed, stopped or missing night, a store that does not
     answer or is newer than this lotgate, a signing certificate expired or expiring within 30 days,
     or the workspace's disk running full (7 also when lots await)
  2  the workspace itself cannot be read (its settings), as for every command"""


def _identity(ws):
    from pipeline.night.night_status import IdentityFacts
    from pipeline.records import signing
    from pipeline.records.signing import P12_NAME, PASSPHRASE_NAME

    if ws.signing_p12 is not None:
        p12, passphrase_file = ws.signing_p12, ws.signing_passphrase_file
    elif (ws.keys / "use-demo-identity").exists() and (ws.keys / P12_NAME).exists():
        p12, passphrase_file = ws.keys / P12_NAME, ws.keys / PASSPHRASE_NAME
    else:
        return None
    try:
        identity = signing.load_identity(p12, passphrase_file=passphrase_file, check_validity=False)
    except Exception as exc:  # any refusal of the identity is a finding to show, never a crash of status
        return IdentityFacts(None, None, " ".join(str(exc).split())[:300])
    return IdentityFacts(identity.signer_name, identity.not_after.astimezone(dt.UTC), None)


def _running(root: Path) -> str | None:
    """Who holds the run lock, from the note a night writes while it holds it (the lock itself is not touched).

    A note left by a killed run on this machine (its process gone) does not count.
    """
    import json
    import socket

    from pipeline.records.run_lock import INFO_FILE

    try:
        info = json.loads((root / INFO_FILE).read_text(encoding="utf-8"))
        pid, host = int(info["pid"]), str(info["host"])
    except (OSError, ValueError, KeyError, TypeError):
        return None
    if host == socket.gethostname() and not Path(f"/proc/{pid}").exists():
        return None
    return f"a night started {info.get('started_utc', '?')} by process {pid} on {host}"


def gather(root: Path):
    from flows.schedule_cmd import next_runs
    from pipeline.errors import InputError
    from pipeline.night.night_status import StatusFacts
    from pipeline.records.status_queries import StoreStatus, schema_head, store_status
    from pipeline.records.workspace import open_workspace
    from pipeline.records.workspace_id import workspace_id

    if not root.is_dir():
        raise InputError(f"the workspace {root} does not exist")
    ws = open_workspace(root)
    now = dt.datetime.now(dt.UTC)
    sqlite_file = Path(ws.database_url.removeprefix("sqlite:///")) if ws.database_url.startswith("sqlite:///") else None
    if sqlite_file is not None and not sqlite_file.exists():
        store = StoreStatus(True, None, None, schema_head(), (), ())
    else:
        store = store_status(ws.database_url, workspace_id(ws.root), shared=ws.store_shared)
    last_scheduled = upcoming = None
    if ws.schedule_cron:
        from zoneinfo import ZoneInfo

        from prefect._vendor.croniter import croniter

        last_scheduled = croniter(ws.schedule_cron, now.astimezone(ZoneInfo(ws.time_zone))).get_prev(dt.datetime)
        last_scheduled = last_scheduled.astimezone(dt.UTC)
        upcoming = next_runs(ws.schedule_cron, ws.time_zone, count=2, after=now)
    disk = shutil.disk_usage(ws.root)
    facts = StatusFacts(now, store, _identity(ws), disk.free, disk.total, ws.schedule_cron, last_scheduled,
                        _running(ws.root))
    return ws, facts, upcoming


def cmd_status(args: argparse.Namespace) -> int:
    from pipeline.night.night_status import Need, concerns, exit_code, night_outcome

    root = Path(args.workspace).expanduser().resolve()
    ws, facts, upcoming = gather(root)
    console = _console()
    store = facts.store
    console.print(f"[bold]{ws.plant_name}[/] — workspace {ws.root} — {facts.now_utc:%Y-%m-%d %H:%M} UTC")
    console.print(f"Store: {'answers' if store.reachable else 'DOES NOT ANSWER'}"
                  + (f", migration {store.schema_version} (this lotgate: {store.schema_head})"
                     if store.schema_version else "") + (f" — {store.problem}" if store.problem else ""))
    if ws.schedule_cron:
        console.print(f"Schedule: cron '{ws.schedule_cron}' ({ws.time_zone}); next "
                      + ", ".join(f"{t:%Y-%m-%d %H:%M %Z}" for t in upcoming or []))
    else:
        console.print("Schedule: none in workspace.yaml (nights run when started)")
    if facts.running:
        console.print(f"Running now: {facts.running}")
    identity = facts.identity
    if identity is not None and identity.not_after_utc is not None:
        console.print(f"Signing identity: {identity.signer_name}, valid to {identity.not_after_utc:%Y-%m-%d}")
    console.print(f"Disk: {facts.disk_free_bytes / 1024**3:.1f} GiB free of {facts.disk_total_bytes / 1024**3:.1f} GiB")
    if store.nights:
        console.print("Last nights:")
        for night in store.nights:
            end = f"{night.finished_utc:%Y-%m-%d %H:%M:%S}" if night.finished_utc else "—"
            console.print(f"  night {night.night_id}: {night.started_utc:%Y-%m-%d %H:%M:%S} → {end} UTC, "
                          f"{night_outcome(night)}; files {night.files_received} (archived {night.files_archived}, "
                          f"quarantined {night.files_quarantined}), lots decided {night.lots_decided}")
    if store.open_lots:
        console.print(f"Open lots ({len(store.open_lots)}):")
        for lot in store.open_lots[:args.lots]:
            why = ", ".join(lot.hold_categories) or "; ".join(lot.reasons[:1])
            console.print(f"  {lot.lot_id} ({lot.product}): {lot.disposition}" + (f" — {why}" if why else ""))
        if len(store.open_lots) > args.lots:
            console.print(f"  … and {len(store.open_lots) - args.lots} more")
    found = concerns(facts)
    for need in (Need.OPERATIONS, Need.LOTS):
        for concern in (c for c in found if c.need == need):
            console.print(f"[{'red' if need == Need.OPERATIONS else 'yellow'}]NEEDS A PERSON[/] {concern.text}")
    if not found:
        console.print("Nothing needs a person.")
    return exit_code(found)


def add_commands(sub) -> None:
    status = sub.add_parser("status", help="what the nights did and what needs a person (exit code)",
                            description="The workspace's last nights (start, end, outcome, counts), open holds and "
                                        "pending lots, overdue results, the signing identity's expiry, free disk, the "
                                        "store and its migration, the schedule and next run. Reads only.",
                            epilog=STATUS_EXIT_CODES, formatter_class=argparse.RawDescriptionHelpFormatter)
    status.add_argument("--workspace", required=True, metavar="DIR")
    status.add_argument("--lots", type=int, default=30, metavar="N", help="open lots listed (default 30)")
    status.set_defaults(func=cmd_status)

