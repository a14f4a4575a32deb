"""Desk accounts: made by the administrator's command, signed in at the desk (Argon2, locks, audit events).

Every write here (an account, a sign-in, a failure, a lock) holds the workspace's run lock for a
moment, so it is chained into the audit trail and mirrored to the decision log exactly like a
night's events; while a night runs, the desk asks the person to try again in a few minutes.
"""

from __future__ import annotations

import getpass
import re
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from argon2 import PasswordHasher
from argon2.exceptions import InvalidHashError, VerificationError

from flows.desk.keystore import KEY_FOLDER, SealedIdentity, seal_identity
from flows.desk.roles import DeskRole, signs
from flows.desk.settings import DeskSettings
from pipeline.errors import InputError, LotgateError
from pipeline.records import audit
from pipeline.records import desk_accounts as accounts
from pipeline.records.run_lock import RunLocked, run_lock
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace

LOGIN_PATTERN = re.compile(r"^[a-z][a-z0-9._-]{1,59}$")
MIN_PASSWORD = 12
WRITE_WAIT_S = 5.0
_HASHER = PasswordHasher()  # argon2id with the library's defaults (RFC 9106 second recommended profile)
_WRITES = threading.Lock()  # one desk write at a time in this process; the run lock keeps out a night


class DeskBusy(LotgateError):
    """A night holds the workspace: the desk writes nothing now."""


class SignInRefused(LotgateError):
    """Wrong name or password, or a locked account (the message never says which of name or password)."""


@dataclass(frozen=True)
class Desk:
    """What every desk handler works with."""

    ws: Workspace
    store: Store
    settings: DeskSettings


@contextmanager
def desk_write(desk: Desk) -> Iterator[None]:
    """Hold the workspace's run lock for one desk write, then mirror the trail to the decision log."""
    with _WRITES:
        try:
            with run_lock(desk.ws.root, desk.store, wait_s=WRITE_WAIT_S):
                audit.sync_log(desk.store, desk.ws.log)
                try:
                    yield
                finally:  # a refused act's failure event is mirrored too
                    audit.sync_log(desk.store, desk.ws.log)
        except RunLocked as exc:
            raise DeskBusy("a night is writing the records of this workspace now; nothing was recorded. "
                           "Try again in a few minutes.") from exc


def check_password_policy(password: str) -> None:
    """The desk's one password rule (an account's first password, a change, a reset): at least 12 characters."""
    if len(password) < MIN_PASSWORD:
        raise InputError(f"a desk password needs at least {MIN_PASSWORD} characters, received {len(password)}")


def hash_password(password: str) -> str:
    check_password_policy(password)
    return _HASHER.hash(password)


def password_matches(password_hash: str, password: str) -> bool:
    try:
        return _HASHER.verify(password_hash, password)
    except (VerificationError, InvalidHashError):
        return False


def check_new_account(store: Store, login: str, role: DeskRole, p12: Path | None) -> None:
    """Refuse, before any password is asked: a bad name, a name taken, a signing role without an identity."""
    if not LOGIN_PATTERN.fullmatch(login):
        raise InputError(f"an account name is 2–60 characters: a lower-case letter, then lower-case letters, digits, "
                         f"'.', '_' or '-'; received {login!r}")
    if signs(role) and p12 is None:
        raise InputError(f"a {role} signs: give the person's signing identity (--signer-p12 FILE)")
    if not signs(role) and p12 is not None:
        raise InputError(f"a {role} never signs: an account of this role takes no signing identity")
    if accounts.user_by_login(store, login) is not None:
        raise InputError(f"the desk already has an account named '{login}'; accounts are never replaced")


def create_account(ws: Workspace, store: Store, login: str, role: DeskRole, password: str, *,
                   p12: Path | None = None, p12_passphrase: bytes | None = None,
                   p12_passphrase_file: Path | None = None, by: str | None = None) -> accounts.StoredUser:
    """A new account; a signing role must bring the person's PKCS#12, sealed under the desk password."""
    check_new_account(store, login, role, p12)
    password_hash = hash_password(password)
    by = by or getpass.getuser()
    with desk_write(Desk(ws, store, DeskSettings())):
        check_new_account(store, login, role, p12)
        sealed: SealedIdentity | None = None
        if p12 is not None:
            # No account has this name (checked above, under the lock): a sealed file under it was left by an
            # add that stopped before its account was stored, and no record refers to it.
            ws.root.joinpath(*KEY_FOLDER, f"{login}.p12").unlink(missing_ok=True)
            sealed = seal_identity(ws.root, login, p12, p12_passphrase, password, p12_passphrase_file)
        printed = sealed.signer_name if sealed else login
        event = audit.event("desk-account-added", time_zone=ws.time_zone, account=login, role=str(role),
                            printed_name=printed, by=by,
                            signer_certificate_sha256=sealed.certificate_sha256 if sealed else None)
        try:
            return accounts.add_user(store, accounts.NewUser(
                login, printed, str(role), password_hash, sealed.key_file if sealed else None,
                sealed.key_sha256 if sealed else None, sealed.certificate_sha256 if sealed else None, by), [event])
        except BaseException:
            if sealed is not None:  # no account: its sealed key is not kept either
                (ws.root / sealed.key_file).unlink(missing_ok=True)
            raise


def record_failure(desk: Desk, user: accounts.StoredUser, kind: str, audit_kind: str, **fields: object) -> bool:
    """A failed password (inside a desk write); the account is locked at the limit. Returns True when locked now."""
    tz = desk.ws.time_zone
    accounts.record_account_event(desk.store, user.id, kind, None, [audit.event(
        audit_kind, time_zone=tz, account=user.login, **fields)])
    standing = accounts.account_standing(desk.store, user.id)
    if standing.failures_since_success >= desk.settings.lock_after_failures and not standing.locked:
        accounts.record_account_event(desk.store, user.id, accounts.LOCKED, None, [audit.event(
            "desk-account-locked", time_zone=tz, account=user.login,
            failures=standing.failures_since_success)])
        return True
    return False


def sign_in(desk: Desk, login: str, password: str, client: str) -> accounts.StoredUser:
    """Check a sign-in; every attempt is an audit event. Raises SignInRefused (one wording) or DeskBusy."""
    refused = SignInRefused("the name or the password is not right, or the account is locked; "
                            "after repeated failures ask the administrator to unlock it")
    login = (login or "").strip()[:60]
    tz = desk.ws.time_zone
    with desk_write(desk):
        user = accounts.user_by_login(desk.store, login)
        if user is None:
            desk.store.add_events([audit.event("desk-login-failed", time_zone=tz, account=login,
                                               client=client, why="unknown account")])
            raise refused
        if accounts.account_standing(desk.store, user.id).locked:
            accounts.record_account_event(desk.store, user.id, accounts.LOGIN_FAILED, "locked", [audit.event(
                "desk-login-failed", time_zone=tz, account=login, client=client, why="account locked")])
            raise refused
        if not password_matches(user.password_hash, password):
            record_failure(desk, user, accounts.LOGIN_FAILED, "desk-login-failed", client=client,
                           why="wrong password")
            raise refused
        accounts.record_account_event(desk.store, user.id, accounts.LOGIN_SUCCEEDED, None, [audit.event(
            "desk-login", time_zone=tz, account=login, role=user.role, client=client)])
        return user


def sign_out(desk: Desk, user_id: int, login: str, why: str) -> None:
    with desk_write(desk):
        accounts.record_account_event(desk.store, user_id, accounts.LOGGED_OUT, why, [audit.event(
            "desk-logout", time_zone=desk.ws.time_zone, account=login, why=why)])


def unlock_account(desk: Desk, login: str, by: str) -> None:
    user = accounts.user_by_login(desk.store, login)
    if user is None:
        raise InputError(f"no desk account named '{login}'")
    with desk_write(desk):
        accounts.record_account_event(desk.store, user.id, accounts.UNLOCKED, f"by {by}", [audit.event(
            "desk-account-unlocked", time_zone=desk.ws.time_zone, account=login, by=by)])
