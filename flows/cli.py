"""The ``lotgate`` command line: demo, run, verify (and the record-keeping commands).

Holds are normal outcomes (exit 0). The exit codes (EXIT_CODES, also in ``lotgate --help``): 1 only
when a verification fails, 2 for a set-up error (settings, controlled files, keys, store: one
line naming the file and the field, no traceback) or a person's act refused, 3 when another night holds the run lock, 4
when what was asked for does not exist (an unknown lot, product or attribute), 5 for a defect
(the details in a file named on standard error).
"""

from __future__ import annotations

import argparse
import os
import sys
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

EXIT_OK, EXIT_VERIFY_FAILED, EXIT_SETUP, EXIT_LOCKED, EXIT_NOT_FOUND, EXIT_DEFECT = 0, 1, 2, 3, 4, 5
EXIT_CODES = """exit codes:
  0  done (holds are normal outcomes)
  1  a verification failed (lotgate verify)
  2  set-up error: workspace, settings, specifications, methods, layouts, keys or store;
     one line naming the file and the field, nothing written; or a person's act refused
     (a reason that says nothing, a signer not allowed, a release the lot's results bar)
  3  another night holds the workspace's run lock
  4  not found: an unknown lot, product or attribute, or a file to verify that does not exist
  5  a defect in lotgate: one line here, the details for the engineer in a file it names
  6, 7  lotgate status only: lots await a person (6), the operation needs a person (7)"""

QUIET_PREFECT = {
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    "DO_NOT_TRACK": "1",
    "PREFECT_SERVER_SERVICES_TASK_RUN_RECORDER_ENABLED": "false",
    "PREFECT_LOGGING_LEVEL": "WARNING",
    "PREFECT_LOGGING_TO_API_ENABLED": "false",
}


def quiet_prefect() -> None:
    """Settings measured to keep the temporary server's console clean (see DEVELOPERS.md)."""
    for key, value in QUIET_PREFECT.items():
        os.environ.setdefault(key, value)


@contextmanager
def server_started_early(orchestrated: bool = True) -> Iterator[None]:
    """Boot Prefect's temporary local server in the background while the caller sets up.

    Without a configured server (``PREFECT_API_URL``), a flow run starts Prefect's temporary
    server and waits ~3–4 s for it; started here, that wait overlaps the night's own imports
    and workspace checks. The flow then finds it running. Waits for it before returning.
    """
    from prefect.settings import PREFECT_API_URL

    if not orchestrated or PREFECT_API_URL.value():
        yield
        return
    from prefect.server.api.server import SubprocessASGIServer

    server = SubprocessASGIServer()
    booting = threading.Thread(target=server.start, name="prefect-server-boot", daemon=True)
    booting.start()
    try:
        yield
    finally:
        booting.join()


def _console():
    from rich.console import Console

    return Console(highlight=False, width=None if sys.stdout.isatty() else 140)


def _run_night(workspace: Path, *, orchestrated: bool = True):
    quiet_prefect()
    import logging

    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

    for noisy in ("pyhanko", "pyhanko_certvalidator"):
        logging.getLogger(noisy).setLevel(logging.CRITICAL)
    from pipeline.night.open import open_night

    # Every set-up error stops here, before Prefect's server or any worker starts (and the
    # signing passphrase leaves the environment, so neither inherits it).
    ws, store, signer = open_night(workspace)
    with server_started_early(orchestrated):
        from flows import nightly
        from pipeline.records.run_lock import run_lock
    labels = {"receive": "Reading and validating exports", "publish": "Reports, certificates and records"}
    console = _console()
    with Progress(TextColumn("{task.description:<36}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                  console=console, transient=False) as bar:
        tasks: dict[str, int] = {}

        def progress(stage: str, done: int, total: int) -> None:
            if stage not in tasks:
                tasks[stage] = bar.add_task(labels.get(stage, stage), total=total)
            bar.update(tasks[stage], completed=done, total=total)

        nightly.set_progress(progress)
        try:
            with run_lock(ws.root, store):
                if orchestrated:
                    summary = nightly.nightly(str(workspace), lock_held_by_caller=True)
                else:
                    summary = nightly.run_stages(ws, store, signer, orchestrated=False, lock=False)
        finally:
            nightly.set_progress(None)
    return summary


def print_summary(summary, console=None) -> None:
    from rich.table import Table

    from pipeline.vocabulary import Disposition

    console = console or _console()
    table = Table(title=f"Night {summary.night_id}: lot dispositions", show_lines=False)
    table.add_column("Lot", no_wrap=True)
    table.add_column("Product", no_wrap=True)
    table.add_column("Rev.", justify="right")
    table.add_column("Disposition", no_wrap=True)
    table.add_column("Reasons")
    for outcome in summary.outcomes:
        style = "green" if outcome.label in (Disposition.RELEASED, Disposition.READY_FOR_RELEASE) else "yellow"
        reasons = "\n".join(outcome.reasons[:4]) + (f"\n… and {len(outcome.reasons) - 4} more" if len(outcome.reasons) > 4 else "")
        label = outcome.label if outcome.new else f"{outcome.label} (unchanged, decided earlier)"
        table.add_row(outcome.lot_id, outcome.product, str(outcome.revision), f"[{style}]{label}[/]", reasons)
    if summary.outcomes:
        console.print(table)
    else:
        console.print("No lot to decide tonight.")
    released = sum(o.label == Disposition.RELEASED and o.new for o in summary.outcomes)
    ready = sum(o.label == Disposition.READY_FOR_RELEASE and o.new for o in summary.outcomes)
    pending = sum(o.label == Disposition.PENDING and o.new for o in summary.outcomes)
    held = sum(o.label not in (Disposition.RELEASED, Disposition.READY_FOR_RELEASE, Disposition.PENDING) and o.new
               for o in summary.outcomes)
    console.print(f"Files received {summary.received} = archived {summary.archived} + quarantined {summary.quarantined}.  "
                  f"Lots decided {released + ready + pending + held}: released {released}, ready for release {ready}, "
                  f"pending {pending}, held {held}; "
                  f"unchanged {sum(not o.new for o in summary.outcomes)}.")
    for name, reason in summary.quarantine_reasons:
        first = [line for line in reason.splitlines() if line.startswith("- ")][:2]
        console.print(f"[red]Quarantined[/] {name}: {' '.join(f.lstrip('- ') for f in first)}")
    for note in summary.notes:
        console.print(f"[yellow]Note[/]: {note}")
    if summary.lims_files:
        console.print(f"LIMS results: {', '.join(summary.lims_files)}")


def cmd_demo(args: argparse.Namespace) -> int:
    from pipeline.demo import plant as demo
    from pipeline.records.workspace import atomic_write, write_settings

    root = Path(args.workspace).expanduser().resolve()
    console = _console()
    if not (root / "workspace.yaml").exists():
        write_settings(root, {"plant_name": demo.PLANT_NAME, "time_zone": demo.PLANT_TIME_ZONE,
                              "signing": {"signer_name": demo.DEMO_SIGNER},
                              "trust": {"root_ca": "keys/root-ca.pem"}, "signer_register": "keys/signers.yaml",
                              "release": {"default_mode": "approval"}})
    (root / "keys").mkdir(parents=True, exist_ok=True)
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir(parents=True, exist_ok=True)
    nights = demo.build_scenario(seed=args.seed)
    console.print(f"Demo plant: {demo.PLANT_NAME}; {len(nights)} nights of invented exports into {root / 'inbox'}")
    for night_data in nights:
        for name, data in sorted(night_data.files.items()):
            atomic_write(root / "inbox" / name, data)
        console.rule(f"Night of {night_data.assay_date:%Y-%m-%d}: {len(night_data.files)} exports")
        summary = _run_night(root)
        print_summary(summary, console)
        if night_data.investigations:
            from flows.investigate_cmd import demo_investigations

            demo_investigations(root, night_data.investigations, console)
    if not args.leave_ready:
        _demo_approvals(root, console)
    console.print(f"\nOutputs in {root}: certificates/, reports/, lims/, decisions.jsonl, archive/, quarantine/.")
    console.print(f"Check a certificate:  lotgate verify --workspace {root} {root / 'certificates' / '<file>.pdf'}")
    return 0


DEMO_APPROVER = "mira.castellan"
DEMO_APPROVAL_REASON = "DEMO approval: results, assay validity and the prepared certificate reviewed"


def _demo_approvals(root: Path, console) -> None:
    """The demo reviewer (in the demo register) approves every lot left ready for release by the nights."""
    from pipeline.night.approval import approve_lots, lots_ready
    from pipeline.night.open import open_records
    from pipeline.records import signing
    from pipeline.records.demo_trust import create_demo_trust
    from pipeline.records.run_lock import run_lock

    ws, store = open_records(root)
    p12, passphrase = create_demo_trust(ws.keys, ws.plant_name).identity_of(DEMO_APPROVER)
    identity = signing.load_identity(p12, passphrase_env="", passphrase_file=passphrase)
    with run_lock(ws.root, store):
        lots = lots_ready(store, site_id=ws.site_id())
        done = approve_lots(ws, store, lots, identity=identity, reason=DEMO_APPROVAL_REASON) if lots else []
    console.rule(f"Approval by {identity.signer_name} (demo reviewer, in the demo register of authorised signers)")
    if not done:
        console.print("No lot is waiting for approval.")
    for approved in done:
        console.print(f"Approved {approved.lot_id}: revision {approved.revision}, released; "
                      f"{approved.certificate} carries the system's and {approved.approved_by}'s signatures")


def cmd_run(args: argparse.Namespace) -> int:
    root = Path(args.workspace).expanduser().resolve()
    summary = _run_night(root, orchestrated=not args.no_orchestration)
    print_summary(summary)
    return 0


def cmd_verify(args: argparse.Namespace) -> int:
    import logging

    from flows.verify_cmd import open_for_verify, verify_certificate_text
    from pipeline.records import ledger

    for noisy in ("pyhanko", "pyhanko_certvalidator"):
        logging.getLogger(noisy).setLevel(logging.CRITICAL)
    console = _console()
    failures = missing = 0
    opened = None
    if (args.workspace and not args.files) or args.archive:  # the workspace's records, checkpoints, archive
        from flows.verify_records import verify_workspace

        root = Path(args.workspace or Path(args.archive).resolve().parent)
        failures += not verify_workspace(root, Path(args.archive) if args.archive else None, console)
    elif not args.files:
        console.print("nothing to verify: name certificate PDFs or a decision log, or --workspace DIR / --archive DIR")
        return EXIT_SETUP
    for name in args.files:
        path = Path(name)
        if not path.exists():
            console.print(f"NOT FOUND {name}: no such file")
            missing += 1
            continue
        if path.suffix.lower() == ".pdf":
            opened = opened or open_for_verify(args.workspace)
            ok = verify_certificate_text(path, opened, console)
        elif path.suffix.lower() == ".jsonl":
            from flows.records_cmd import verify_trail_text

            check = ledger.verify_file(path)
            ok, reason = check.valid, check.reason
            if ok:
                both = verify_trail_text(path)
                if both is not None:
                    ok, reason = both
                    from flows.verify_records import workspace_findings

                    findings = workspace_findings(path.resolve().parent, with_archive=False)[1:]
                    ok = ok and all(good for good, _ in findings)
                    reason += "".join(f"\n  {'' if good else 'INVALID '}{line.strip()}" for good, line in findings)
            console.print(f"{'VALID' if ok else 'INVALID'} {name}: {reason}", markup=False, soft_wrap=True)
        else:
            ok = False
            console.print(f"INVALID {name}: not a certificate (.pdf) or a decision log (.jsonl)")
        failures += not ok
    return EXIT_VERIFY_FAILED if failures else EXIT_NOT_FOUND if missing else EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="lotgate",
        description="Nightly lot release for enzyme production: validates LIMS and plate-reader exports, computes "
                    "activity, protein, specific activity and kinetic constants, judges them against versioned "
                    "specifications and control charts, and writes signed certificates, batch reports, a "
                    "hash-chained decision log and results for the LIMS. It supports, and never replaces, the "
                    "authorised person who releases a lot.",
        epilog=EXIT_CODES, formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    demo = sub.add_parser("demo", help="write an invented plant's exports into DIR/inbox and run its nights",
                          description="Write the invented demo plant's exports (five nights, deterministic) into "
                                      "DIR/inbox and run each night on them. Running it again adds no duplicate decisions.")
    demo.add_argument("--workspace", default="./lotgate-demo", metavar="DIR", help="workspace folder (default ./lotgate-demo)")
    demo.add_argument("--seed", type=int, default=20261124, help="simulation seed (default 20261124)")
    demo.add_argument("--leave-ready", action="store_true",
                      help="leave the lots ready for release unapproved (to approve them at the desk or with "
                           "lotgate approve); by default the demo reviewer approves them")
    demo.set_defaults(func=cmd_demo)
    run = sub.add_parser("run", help="run the night on whatever is in DIR/inbox",
                         description="Run one night on every export in DIR/inbox: validate, compute, decide, "
                                     "write documents and records; used files go to DIR/archive, bad ones to DIR/quarantine.")
    run.add_argument("--workspace", required=True, metavar="DIR", help="workspace folder holding inbox/")
    run.add_argument("--no-orchestration", action="store_true",
                     help="call the stages as plain functions instead of a Prefect flow (same results)")
    run.set_defaults(func=cmd_run)
    verify = sub.add_parser("verify", help="check certificates (signatures, signers, record), the decision log's "
                                           "chain, or a workspace's records and archive",
                            description="Check each FILE: a certificate PDF against the workspace that issued it "
                                        "(each signature intact, chained to the workspace's configured trust anchor, "
                                        "key usage, validity at signing time, signer the system or a person authorised "
                                        "in the register, nothing added after the last signature but signatures, and "
                                        "the record: lot, revision, SHA-256 and the lot's current status), or a "
                                        "decision log .jsonl (hash chain). With --workspace and no FILE: the "
                                        "workspace's records (audit trail, every record row against its hash and "
                                        "audit event, append-only triggers, sealed checkpoints, archive). Exit 0 when "
                                        "all hold, 1 when one does not, 4 when a file does not exist.")
    verify.add_argument("files", nargs="*", metavar="FILE")
    verify.add_argument("--workspace", metavar="DIR",
                        help="the workspace that issued the certificates (required for a PDF): its configured trust "
                             "anchor, register of signers and store are used, never files found beside a document; "
                             "without FILE, its records are checked")
    verify.add_argument("--archive", metavar="DIR", help="re-check every archived input in DIR (default "
                        "WORKSPACE/archive) against its recorded SHA-256")
    verify.set_defaults(func=cmd_verify)
    from flows import records_cmd

    records_cmd.add_commands(sub)
    from flows import approve_cmd, bench, investigate_cmd, trend_cmd

    approve_cmd.add_commands(sub)

    trend_cmd.add_commands(sub)
    investigate_cmd.add_commands(sub)
    bench.add_commands(sub)
    from flows import desk_cmd

    desk_cmd.add_commands(sub)
    from flows import schedule_cmd, status_cmd

    schedule_cmd.add_commands(sub)
    status_cmd.add_commands(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    from pipeline.errors import LotgateError, NotFound
    from pipeline.records.run_lock import RunLocked

    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except RunLocked as exc:
        print(f"lotgate: {exc}", file=sys.stderr)
        return EXIT_LOCKED
    except NotFound as exc:
        print(f"lotgate: {exc}", file=sys.stderr)
        return EXIT_NOT_FOUND
    except LotgateError as exc:
        print(f"lotgate: {exc}", file=sys.stderr)
        return EXIT_SETUP
    except Exception as exc:  # a defect: keep the analyst's console readable, keep the details
        import tempfile
        import traceback

        handle, path = tempfile.mkstemp(prefix="lotgate-error-", suffix=".txt")
        with os.fdopen(handle, "w") as out:
            traceback.print_exc(file=out)
        print(f"lotgate: the run could not complete ({exc.__class__.__name__}: {exc}); "
              f"details for the engineer in {path}. Running the same command again resumes the night.",
              file=sys.stderr)
        return EXIT_DEFECT
    except KeyboardInterrupt:
        print("lotgate: interrupted; run the same command again to finish the night", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
