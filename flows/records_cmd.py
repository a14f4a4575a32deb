"""Record-keeping commands: keys, history, decide (and the store side of verify)."""

from __future__ import annotations

import argparse
import getpass
import os
import sys
from pathlib import Path

from rich.console import Console
from rich.table import Table

from pipeline.errors import NotFound


def _console() -> Console:
    return Console(highlight=False, width=None if sys.stdout.isatty() else 140)



def cmd_keys_demo(args: argparse.Namespace) -> int:
    from pipeline.records import signing
    from pipeline.records.demo_identity import create_demo_identity
    from pipeline.records.workspace import open_workspace

    ws = open_workspace(Path(args.workspace).expanduser())
    folder = Path(args.out).expanduser() if args.out else ws.keys
    name = args.name or ws.signer_name
    identity = create_demo_identity(folder, ws.plant_name, name)
    if not args.out:
        (ws.keys / "use-demo-identity").touch()
    loaded = signing.load_identity(identity.p12_path, passphrase=identity.passphrase_path.read_bytes().strip())
    console = _console()
    console.print(f"Demo signing identity of {loaded.signer_name} (marked DEMO, for trying the tool only):")
    console.print(f"  PKCS#12      {identity.p12_path} (mode 0600)")
    console.print(f"  passphrase   {identity.passphrase_path} (mode 0600)")
    console.print(f"  root CA      {identity.root_ca_path}")
    console.print(f"  valid        {loaded.not_before:%Y-%m-%d} to {loaded.not_after:%Y-%m-%d}")
    console.print(f"  fingerprint  {loaded.fingerprint_sha256}")
    return 0


def cmd_history(args: argparse.Namespace) -> int:
    from pipeline.night.open import open_records
    from pipeline.release.dossier import local_time_text

    ws, store = open_records(Path(args.workspace))
    rows = store.decisions(args.lot)
    if not rows:
        raise NotFound(f"no decision for lot {args.lot} in {ws.root}")
    console = _console()
    table = Table(title=f"Lot {args.lot}: every revision (oldest first; none is ever overwritten)")
    for column in ("Rev.", "Decided", "By", "Disposition", "What changed and why", "Reasons"):
        table.add_column(column)
    for row in rows:
        superseded = f"\n(superseded by rev. {next(r.revision for r in rows if r.id == row.superseded_by)})" \
            if row.superseded_by else "\n(current)"
        table.add_row(str(row.revision), local_time_text(row.decided_at_utc, ws.time_zone), row.decided_by,
                      row.record.label + superseded,
                      row.change_note or "first decision", "\n".join(row.record.reasons[:4]) or "—")
    console.print(table)
    return 0


def _passphrase(args: argparse.Namespace) -> bytes | None:
    if args.passphrase_file or os.environ.get("LOTGATE_SIGNING_PASSPHRASE"):
        return None  # load_identity reads the environment variable, then the file
    if sys.stdin.isatty():
        return getpass.getpass("Passphrase of your signing identity: ").encode("utf-8")
    return None


def cmd_decide(args: argparse.Namespace) -> int:
    from pipeline.night.open import open_records
    from pipeline.night.person_decision import decide_lot
    from pipeline.records import signing
    from pipeline.records.run_lock import run_lock

    ws, store = open_records(Path(args.workspace))
    if not store.decisions(args.lot):
        raise NotFound(f"lot {args.lot} has no decision in the store at {ws.root}; nothing to review")
    identity = signing.load_identity(Path(args.identity), passphrase=_passphrase(args),
                                     passphrase_file=Path(args.passphrase_file) if args.passphrase_file else None)
    with run_lock(ws.root, store):
        outcome = decide_lot(ws, store, args.lot, release=args.release, reason=args.reason, identity=identity)
    console = _console()
    console.print(f"Lot {outcome.lot_id}: revision {outcome.revision}, {outcome.disposition} by {identity.signer_name}; "
                  "recorded in the store and the audit trail, signed with your identity.")
    if outcome.certificate:
        console.print(f"Certificate re-issued: {ws.root / outcome.certificate}")
    return 0


def verify_trail_text(log_path: Path) -> tuple[bool, str] | None:
    """Check the log against its workspace's store, when the store can be found."""
    from pipeline.errors import InputError
    from pipeline.night.open import open_records
    from pipeline.records import audit

    try:
        _, store = open_records(log_path.resolve().parent)
    except InputError:  # no store beside the log: the log is checked on its own
        return None
    check = audit.verify_trail(store, log_path)
    return check.valid, check.reason


def add_commands(sub: argparse._SubParsersAction) -> None:
    keys = sub.add_parser("keys", help="signing identities", description="Create or inspect signing identities.")
    keys_sub = keys.add_subparsers(dest="keys_command", required=True, metavar="ACTION")
    demo = keys_sub.add_parser("demo", help="create a DEMO signing identity (never for real use)",
                               description="Create a demo plant root CA and a signer certificate issued by it, in a "
                                           "PKCS#12 file of mode 0600 with its passphrase in a file of mode 0600.")
    demo.add_argument("--workspace", default="./lotgate-demo", metavar="DIR")
    demo.add_argument("--name", help="the signer's printed name (default: the workspace's signer)")
    demo.add_argument("--out", metavar="DIR", help="folder for a person's own identity (default DIR/keys, the nightly signer)")
    demo.set_defaults(func=cmd_keys_demo)

    history = sub.add_parser("history", help="every revision of a lot's decision, with what changed and why",
                             description="Show every revision of a lot's results and decision, oldest first.")
    history.add_argument("lot", metavar="LOT")
    history.add_argument("--workspace", required=True, metavar="DIR")
    history.set_defaults(func=cmd_history)

    decide = sub.add_parser("decide", help="record an authorised person's release or rejection of a lot",
                            description="Record an authorised person's disposition of a lot as a new revision, signed "
                                        "with that person's own identity (PKCS#12 and its passphrase). A release "
                                        "re-issues the certificate under that signature.")
    decide.add_argument("lot", metavar="LOT")
    choice = decide.add_mutually_exclusive_group(required=True)
    choice.add_argument("--release", action="store_true", help="release the lot")
    choice.add_argument("--reject", action="store_true", help="reject the lot")
    decide.add_argument("--reason", required=True, metavar="TEXT", help="what was reviewed and why")
    decide.add_argument("--identity", required=True, metavar="P12", help="your PKCS#12 signing identity")
    decide.add_argument("--passphrase-file", metavar="FILE",
                        help="file (mode 0600) holding the passphrase; else LOTGATE_SIGNING_PASSPHRASE or a prompt")
    decide.add_argument("--workspace", required=True, metavar="DIR")
    decide.set_defaults(func=cmd_decide)
