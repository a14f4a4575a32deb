"""``lotgate approve``: an authorised person approves lots that are ready for release (thin shell)."""

from __future__ import annotations

import argparse
from pathlib import Path

from flows.person_identity import add_identity_arguments
from pipeline.errors import InputError


def cmd_approve(args: argparse.Namespace) -> int:
    from flows.person_identity import load_person_identity
    from flows.records_cmd import _console
    from pipeline.night.approval import approve_lots, lots_ready
    from pipeline.night.open import open_records
    from pipeline.records.run_lock import run_lock

    if bool(args.lots) == (args.night is not None):
        raise InputError("name the lots to approve (LOT ...) or one night (--night N), not both and not neither")
    ws, store = open_records(Path(args.workspace))
    identity = load_person_identity(args)
    console = _console()
    with run_lock(ws.root, store):
        lots = lots_ready(store, night_id=args.night, lots=tuple(args.lots), site_id=ws.site_id())
        if not lots:
            console.print(f"No lot of night {args.night} is ready for release; nothing approved.")
            return 0
        done = approve_lots(ws, store, lots, identity=identity, reason=args.reason)
    for approved in done:
        console.print(f"Lot {approved.lot_id}: revision {approved.revision}, released: approved by "
                      f"{approved.approved_by} at {approved.signed_at_utc}; certificate with both signatures: "
                      f"{ws.root / approved.certificate}")
    return 0


def add_commands(sub: argparse._SubParsersAction) -> None:
    approve = sub.add_parser(
        "approve", help="an authorised person approves lots that are ready for release",
        description="Approve lots the night found ready for release: your digital signature (PKCS#12 from the "
                    "plant's CA, listed in the register of authorised signers with the role 'release approval') "
                    "is added to each lot's certificate beside the system's, and the lot's next revision records "
                    "the release. Nothing is written when a check fails. Releasing a lot remains your "
                    "responsibility under the plant's procedures and local GMP regulation.")
    approve.add_argument("lots", nargs="*", metavar="LOT", help="the lots to approve")
    approve.add_argument("--night", type=int, metavar="N", help="approve every lot of night N that is ready")
    approve.add_argument("--reason", required=True, metavar="TEXT",
                         help="what you reviewed (at least two words; the plant's reference when it sets a pattern)")
    add_identity_arguments(approve)
    approve.add_argument("--workspace", required=True, metavar="DIR")
    approve.set_defaults(func=cmd_approve)
