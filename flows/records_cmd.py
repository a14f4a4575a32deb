"""Record-keeping commands: keys, history, decide (and the store side of verify)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from rich.console import Console
from rich.table import Table

from flows.person_identity import add_identity_arguments, load_person_identity
from pipeline.errors import NotFound


def _console() -> Console:
    return Console(highlight=False, width=None if sys.stdout.isatty() else 140)



def cmd_keys_demo(args: argparse.Namespace) -> int:
    from pipeline.records import signing
    from pipeline.records.demo_trust import create_demo_trust, issue_person
    from pipeline.records.workspace import open_workspace

    ws = open_workspace(Path(args.workspace).expanduser())
    console = _console()
    if args.out:
        folder = Path(args.out).expanduser()
        p12, passphrase = issue_person(ws.keys, folder, ws.plant_name, args.name or ws.signer_name)
        loaded = signing.load_identity(p12, passphrase_env="", passphrase_file=passphrase)
        console.print(f"Demo identity of {loaded.signer_name} (marked DEMO, for trying the tool only), issued by the "
                      f"workspace's demo CA: {p12} (mode 0600), passphrase {passphrase} (mode 0600)")
        console.print(f"  fingerprint  {loaded.fingerprint_sha256}")
        console.print("  Not yet authorised: add this fingerprint and the person's roles to the register of "
                      "authorised signers (a new version of that controlled file).")
        return 0
    trust = create_demo_trust(ws.keys, ws.plant_name)
    (ws.keys / "use-demo-identity").touch()
    system = signing.load_identity(trust.system_p12, passphrase_env="", passphrase_file=trust.system_passphrase)
    console.print("Demo identities (marked DEMO, for trying the tool only; a plant brings its own from its own CA):")
    console.print(f"  trust anchor     {trust.root_ca}")
    console.print(f"  system identity  {system.signer_name}: {trust.system_p12} (mode 0600), signs what the system "
                  "attests, never a person's act")
    for person, p12, _ in trust.people:
        console.print(f"  reviewer         {person}: {p12} (mode 0600)")
    console.print(f"  register         {trust.register} (who may sign what)")
    console.print(f"  valid            {system.not_before:%Y-%m-%d} to {system.not_after:%Y-%m-%d}")
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


def cmd_decide(args: argparse.Namespace) -> int:
    from pipeline.night.open import open_records
    from pipeline.night.person_decision import decide_lot
    from pipeline.records.run_lock import run_lock

    ws, store = open_records(Path(args.workspace))
    if not store.decisions(args.lot):
        raise NotFound(f"lot {args.lot} has no decision in the store at {ws.root}; nothing to review")
    identity = load_person_identity(args)
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
    demo = keys_sub.add_parser("demo", help="create DEMO signing identities (never for real use)",
                               description="Create a demo plant root CA, the installation's system identity, two demo "
                                           "reviewers and a register of authorised signers naming them (PKCS#12 "
                                           "files and passphrase files of mode 0600); with --out, one more person's "
                                           "identity issued by that CA (not in the register until added).")
    demo.add_argument("--workspace", default="./lotgate-demo", metavar="DIR")
    demo.add_argument("--name", help="the person's printed name (with --out)")
    demo.add_argument("--out", metavar="DIR", help="folder for one more person's own identity")
    demo.set_defaults(func=cmd_keys_demo)

    history = sub.add_parser("history", help="every revision of a lot's decision, with what changed and why",
                             description="Show every revision of a lot's results and decision, oldest first.")
    history.add_argument("lot", metavar="LOT")
    history.add_argument("--workspace", required=True, metavar="DIR")
    history.set_defaults(func=cmd_history)

    decide = sub.add_parser("decide", help="record an authorised person's release or rejection of a lot",
                            description="Record an authorised person's disposition of a lot as a new revision, signed "
                                        "with that person's own identity (PKCS#12 and its passphrase), who must hold "
                                        "the role 'release approval' (or 'rejection') in the register of authorised "
                                        "signers at that moment. A release re-issues the certificate under that "
                                        "signature; it is refused while a result of the lot's current revision "
                                        "is out of specification (with no investigation outcome, confirmed, or "
                                        "invalidated before a night has decided its retest), undecided, missing "
                                        "or invalid. A rejection is always possible. Nothing is written when a "
                                        "check fails.")
    decide.add_argument("lot", metavar="LOT")
    choice = decide.add_mutually_exclusive_group(required=True)
    choice.add_argument("--release", action="store_true", help="release the lot")
    choice.add_argument("--reject", action="store_true", help="reject the lot")
    decide.add_argument("--reason", required=True, metavar="TEXT",
                        help="what was reviewed and why (at least two words; the plant's reference when it sets a pattern)")
    add_identity_arguments(decide)
    decide.add_argument("--workspace", required=True, metavar="DIR")
    decide.set_defaults(func=cmd_decide)
