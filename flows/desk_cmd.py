"""``lotgate desk`` (the reviewer's desk in a browser) and ``lotgate users`` (the administrator's accounts)."""

from __future__ import annotations

import argparse
import getpass
import os
import sys
from pathlib import Path

from pipeline.errors import InputError

PASSWORD_ENV = "LOTGATE_DESK_PASSWORD"  # for scripted set-up only; the prompt is the normal way


def _open(workspace: str):
    from flows.desk.accounts import Desk
    from flows.desk.settings import read_desk_settings
    from pipeline.night.open import open_records

    ws, store = open_records(Path(workspace))
    return Desk(ws, store, read_desk_settings(ws.root))


def _p12_secret(p12: Path | None, passphrase_file: str | None) -> bytes | None:
    """The PKCS#12's passphrase from LOTGATE_SIGNING_PASSPHRASE or a prompt (unless a file gives it)."""
    from pipeline.records import signing

    if p12 is None or passphrase_file:
        return None
    secret = signing.take_passphrase()
    if secret is None and sys.stdin.isatty():
        secret = getpass.getpass(f"Passphrase of {p12.name}: ").encode("utf-8")
    return secret


def _new_password(login: str) -> str:
    secret = os.environ.pop(PASSWORD_ENV, None)
    if secret:
        return secret
    if not sys.stdin.isatty():
        raise InputError(f"no terminal to ask {login}'s desk password on; set {PASSWORD_ENV} for a scripted set-up")
    first = getpass.getpass(f"Desk password for {login} (at least 12 characters; the person types it to sign): ")
    if getpass.getpass("The same again: ") != first:
        raise InputError("the two passwords differ; nothing was recorded")
    return first


def cmd_users_add(args: argparse.Namespace) -> int:
    from flows.desk.accounts import check_new_account, create_account
    from flows.desk.roles import DeskRole

    desk = _open(args.workspace)
    p12 = Path(args.signer_p12).expanduser() if args.signer_p12 else None
    check_new_account(desk.store, args.name, DeskRole(args.role), p12)
    p12_secret = _p12_secret(p12, args.p12_passphrase_file)
    password = _new_password(args.name)
    user = create_account(desk.ws, desk.store, args.name, DeskRole(args.role), password, p12=p12,
                          p12_passphrase=p12_secret,
                          p12_passphrase_file=Path(args.p12_passphrase_file) if args.p12_passphrase_file else None)
    print(f"Account {user.login} ({user.role}) added for {user.printed_name}; recorded in the audit trail.")
    if user.key_file:
        print(f"Signing identity sealed under the desk password: {desk.ws.root / user.key_file} (mode 0600). "
              "Keep the original PKCS#12 where your procedures say; the desk never needs it again.")
    return 0


def cmd_users_list(args: argparse.Namespace) -> int:
    from flows.desk.roles import DeskRole, signs
    from pipeline.records import desk_accounts as accounts

    desk = _open(args.workspace)
    for u in accounts.users(desk.store):
        standing = accounts.account_standing(desk.store, u.id)
        print(f"{u.login:<20} {u.role:<14} {u.printed_name:<32} "
              f"{'locked' if standing.locked else 'open'} ({standing.failures_since_success} failed)"
              + (", password set by the administrator" if standing.must_change_password else "")
              + (", no signing key" if signs(DeskRole(u.role)) and u.key_file is None else ""))
    return 0


def cmd_users_unlock(args: argparse.Namespace) -> int:
    from flows.desk.accounts import unlock_account

    desk = _open(args.workspace)
    unlock_account(desk, args.name, f"{getpass.getuser()} (command line)")
    print(f"Account {args.name} unlocked; recorded in the audit trail.")
    return 0


def cmd_users_reset_password(args: argparse.Namespace) -> int:
    from flows.desk.passwords import check_reset, reset_password
    from flows.desk.roles import DeskRole, signs
    from pipeline.records import desk_accounts as accounts

    desk = _open(args.workspace)
    p12 = Path(args.signer_p12).expanduser() if args.signer_p12 else None
    before = check_reset(desk, args.name, p12)
    p12_secret = _p12_secret(p12, args.p12_passphrase_file)
    password = _new_password(args.name)
    user = reset_password(desk, args.name, password, by=f"{getpass.getuser()} (command line)", p12=p12,
                          p12_passphrase=p12_secret,
                          p12_passphrase_file=Path(args.p12_passphrase_file) if args.p12_passphrase_file else None)
    print(f"Password of {user.login} reset; recorded in the audit trail. {user.printed_name} must choose their own "
          "at the next sign-in; every session of theirs at the desk has ended.")
    if user.key_file:
        print(f"Signing identity imported again from {p12} and sealed under the new password: "
              f"{desk.ws.root / user.key_file} (mode 0600).")
    elif signs(DeskRole(user.role)):
        print(f"{user.login} cannot sign at the desk now: "
              + ("the signing key was sealed under the old password, which only the person knew, so it could not "
                 "be opened and was removed. " if before.key_file else "")
              + f"Import it again with the person's PKCS#12 and its passphrase: lotgate users reset-password "
                f"{user.login} --signer-p12 FILE --workspace {args.workspace}")
    if accounts.account_standing(desk.store, user.id).locked:
        print(f"The account is still locked: lotgate users unlock {user.login} --workspace {args.workspace}")
    return 0


def cmd_desk(args: argparse.Namespace) -> int:
    import uvicorn

    from flows.desk.app import create_app
    from flows.desk.settings import check_cookie_setting

    desk = _open(args.workspace)
    check_cookie_setting(desk.settings, args.host)
    print(f"lotgate desk for {desk.ws.root} on http://{args.host}:{args.port}/ "
          f"(sessions end after {desk.settings.session_timeout_s / 60:.0f} min without a request). Ctrl-C stops it.",
          flush=True)
    uvicorn.run(create_app(desk), host=args.host, port=args.port, log_level="warning", proxy_headers=True,
                forwarded_allow_ips="127.0.0.1", server_header=False)
    return 0


def add_commands(sub: argparse._SubParsersAction) -> None:
    desk = sub.add_parser("desk", help="the reviewer's desk: the morning review in a browser, with e-signatures",
                          description="Serve the reviewer's desk for a workspace. It listens on 127.0.0.1 by "
                                      "default; serve it to others only behind the plant's TLS reverse proxy.")
    desk.add_argument("--workspace", required=True, metavar="DIR")
    desk.add_argument("--host", default="127.0.0.1")
    desk.add_argument("--port", type=int, default=8470, metavar="N")
    desk.set_defaults(func=cmd_desk)

    users = sub.add_parser("users", help="desk accounts (administrator)",
                           description="Add, list and unlock the desk's accounts and reset a password. Accounts "
                                       "are never removed; every change is an audit event.")
    users_sub = users.add_subparsers(dest="users_command", required=True, metavar="ACTION")
    add = users_sub.add_parser("add", help="add an account",
                               description="Add a desk account. A reviewer, investigator or chart owner signs: give "
                                           "their PKCS#12 (--signer-p12); it is sealed under their desk password. "
                                           "The password is asked on the terminal (twice).")
    add.add_argument("name", metavar="NAME", help="account name: lower-case letters, digits, '.', '_' or '-'")
    add.add_argument("--role", required=True,
                     choices=["viewer", "reviewer", "investigator", "chart-owner", "administrator"])
    add.add_argument("--signer-p12", metavar="FILE", help="the person's PKCS#12 signing identity (signing roles)")
    add.add_argument("--p12-passphrase-file", metavar="FILE",
                     help="file (mode 0600) with the PKCS#12's passphrase; else LOTGATE_SIGNING_PASSPHRASE or a prompt")
    add.add_argument("--workspace", required=True, metavar="DIR")
    add.set_defaults(func=cmd_users_add)
    listing = users_sub.add_parser("list", help="list the accounts and their standing")
    listing.add_argument("--workspace", required=True, metavar="DIR")
    listing.set_defaults(func=cmd_users_list)
    unlock = users_sub.add_parser("unlock", help="unlock an account locked after failed passwords")
    unlock.add_argument("name", metavar="NAME")
    unlock.add_argument("--workspace", required=True, metavar="DIR")
    unlock.set_defaults(func=cmd_users_unlock)
    reset = users_sub.add_parser(
        "reset-password", help="set a new password for a person who lost theirs",
        description="Set a new desk password (asked on the terminal, twice; or LOTGATE_DESK_PASSWORD). The "
                    "person's signing key was sealed under the old password and cannot be opened without it: give "
                    "their PKCS#12 (--signer-p12, with its passphrase) to seal it under the new password, or the "
                    "account signs nothing until you do. The person must choose their own password at the next "
                    "sign-in; their sessions end.")
    reset.add_argument("name", metavar="NAME")
    reset.add_argument("--signer-p12", metavar="FILE", help="the person's PKCS#12 signing identity, imported again")
    reset.add_argument("--p12-passphrase-file", metavar="FILE",
                       help="file (mode 0600) with the PKCS#12's passphrase; else LOTGATE_SIGNING_PASSPHRASE or a prompt")
    reset.add_argument("--workspace", required=True, metavar="DIR")
    reset.set_defaults(func=cmd_users_reset_password)
