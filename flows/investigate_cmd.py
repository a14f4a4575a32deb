"""`lotgate investigate`: an authorised person's signed outcome of an out-of-specification investigation."""

from __future__ import annotations

import argparse
from pathlib import Path

from flows.person_identity import add_identity_arguments


def cmd_investigate(args: argparse.Namespace) -> int:
    from flows.person_identity import load_person_identity
    from flows.records_cmd import _console
    from pipeline.night.investigation import record_investigation
    from pipeline.night.open import open_records
    from pipeline.records.run_lock import run_lock

    ws, store = open_records(Path(args.workspace))
    identity = load_person_identity(args)
    with run_lock(ws.root, store):
        done = record_investigation(ws, store, args.lot, test=args.test, outcome=args.outcome,
                                    reference=args.reference, reason=args.reason, retest_plan=args.retest_plan,
                                    identity=identity)
    console = _console()
    console.print(f"Lot {done.lot_id}, {done.attribute}: investigation {done.reference} recorded as "
                  f"'{done.outcome}' by {identity.signer_name} (the result {done.result.reported} of "
                  f"{done.result.tested_on}); signed with your identity and chained in the audit trail.")
    if args.outcome == "invalidated":
        console.print("The result is invalidated; the next valid result of the test counts (a retest is needed "
                      "if none has arrived). The next night decides the lot again from its record.")
    else:
        console.print("The result stands: the lot stays held until an authorised person rejects it (lotgate decide --reject).")
    return 0


def add_commands(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("investigate", help="record the signed outcome of an out-of-specification investigation",
                       description="Record an authorised person's outcome of the investigation of a lot's standing "
                                   "out-of-specification result, signed with that person's identity. 'invalidated': "
                                   "an assignable laboratory cause was found, the result is invalidated and the "
                                   "retest counts; 'confirmed': the OOS result stands. The investigation is the "
                                   "plant's procedure; lotgate records and enforces its outcome.")
    p.add_argument("lot", metavar="LOT")
    p.add_argument("--test", required=True, metavar="CODE", help="the attribute code or LIMS test code of the result")
    p.add_argument("--outcome", required=True, choices=["invalidated", "confirmed"])
    p.add_argument("--reference", required=True, metavar="INV-…", help="the investigation's reference")
    p.add_argument("--reason", required=True, metavar="TEXT", help="the cause found, or why the result is confirmed")
    p.add_argument("--retest-plan", metavar="TEXT", help="the retest plan (required with --outcome invalidated)")
    add_identity_arguments(p)
    p.add_argument("--workspace", required=True, metavar="DIR")
    p.set_defaults(func=cmd_investigate)


def demo_investigations(root: Path, investigations: tuple, console) -> None:
    """The demo's investigation outcomes, recorded by the DEMO reviewer of the demo register (never for real use)."""
    from pipeline.errors import InputError
    from pipeline.night.investigation import record_investigation
    from pipeline.night.open import open_records
    from pipeline.records import signing
    from pipeline.records.demo_trust import DEMO_REVIEWERS, create_demo_trust
    from pipeline.records.run_lock import run_lock

    ws, store = open_records(root)
    p12, passphrase = create_demo_trust(ws.keys, ws.plant_name).identity_of(DEMO_REVIEWERS[0].person)
    identity = signing.load_identity(p12, passphrase_env="", passphrase_file=passphrase)
    for inv in investigations:
        try:
            with run_lock(ws.root, store):
                done = record_investigation(ws, store, inv.lot_id, test=inv.test, outcome=inv.outcome,
                                            reference=inv.reference, reason=inv.reason, retest_plan=inv.retest_plan,
                                            identity=identity)
        except InputError as exc:  # a demo run again: the outcome is on record already
            console.print(f"Investigation {inv.reference} of lot {inv.lot_id}: not recorded again ({exc})")
            continue
        console.print(f"Investigation {done.reference} of lot {done.lot_id} ({done.attribute}) recorded by "
                      f"{identity.signer_name}: {done.outcome}")
