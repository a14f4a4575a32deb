"""Desk accounts in the store (adapter): written once, and their append-only events.

An account's standing (failed attempts since the last success, locked or not, a password set by
an administrator and not yet changed) is read from its events, never kept in a column that is
updated. Its password and sealed key are the latest ``desk_credentials`` row (a change or a
reset), else the account's own row. Each account event is written in the same transaction as the
audit event that reports it.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, select

from pipeline.errors import InputError
from pipeline.records.store import Store
from pipeline.records.stored import utc
from pipeline.records.tables import DeskAccountEvent, DeskCredentials, DeskUser

# Account event kinds (stored words).
LOGIN_SUCCEEDED = "login-succeeded"
LOGIN_FAILED = "login-failed"
SIGNING_PASSWORD_FAILED = "signing-password-failed"
SIGNED = "signed"
LOCKED = "locked"
UNLOCKED = "unlocked"
LOGGED_OUT = "logged-out"
PASSWORD_CHANGED = "password-changed"  # by the person, who typed the current password
PASSWORD_CHANGE_FAILED = "password-change-failed"  # a wrong current password on the change form
PASSWORD_RESET = "password-reset"  # set by an administrator: the person must change it at the next sign-in
FAILURES = frozenset({LOGIN_FAILED, SIGNING_PASSWORD_FAILED, PASSWORD_CHANGE_FAILED})
RESETS = frozenset({LOGIN_SUCCEEDED, SIGNED, UNLOCKED, PASSWORD_CHANGED, PASSWORD_RESET})
# Credential kinds (stored words of desk_credentials.kind).
CHANGED = "changed"
RESET = "reset"


@dataclass(frozen=True)
class StoredUser:
    id: int
    login: str
    printed_name: str
    role: str
    password_hash: str
    key_file: str | None
    key_sha256: str | None
    signer_certificate_sha256: str | None
    created_at_utc: dt.datetime
    created_by: str
    credentials_version: int = 0  # 0: the account's own password; N: its N-th change or reset


@dataclass(frozen=True)
class NewCredentials:
    kind: str  # CHANGED or RESET
    password_hash: str
    key_file: str | None
    key_sha256: str | None
    signer_certificate_sha256: str | None
    set_by: str


@dataclass(frozen=True)
class NewUser:
    login: str
    printed_name: str
    role: str
    password_hash: str
    key_file: str | None
    key_sha256: str | None
    signer_certificate_sha256: str | None
    created_by: str


@dataclass(frozen=True)
class AccountStanding:
    failures_since_success: int
    locked: bool
    must_change_password: bool = False  # an administrator set the password and the person has not changed it


def _user_of(s: Any, row: DeskUser) -> StoredUser:
    """The account with the password and sealed key in force (its latest credentials row, else its own)."""
    version = s.scalar(select(func.count()).select_from(DeskCredentials).where(DeskCredentials.user_id == row.id))
    latest = s.scalar(select(DeskCredentials).where(DeskCredentials.user_id == row.id)
                      .order_by(DeskCredentials.id.desc()).limit(1)) if version else None
    source: DeskUser | DeskCredentials = latest if latest is not None else row
    return StoredUser(row.id, row.login, row.printed_name, row.role, source.password_hash, source.key_file,
                      source.key_sha256, source.signer_certificate_sha256, utc(row.created_at_utc), row.created_by,
                      int(version or 0))


def add_user(store: Store, user: NewUser, events: list[dict[str, Any]]) -> StoredUser:
    """A new account and its audit events in one transaction; a login already taken is refused."""
    with store.session() as s:
        if s.scalar(select(DeskUser.id).where(DeskUser.login == user.login)) is not None:
            raise InputError(f"the desk already has an account named '{user.login}'; accounts are never replaced, "
                             "choose another name")
        row = DeskUser(**vars(user), created_at_utc=dt.datetime.now(dt.UTC))
        s.add(row)
        s.flush()
        store.chain_events(s, [{**e, "account_id": row.id} for e in events])
        return _user_of(s, row)


def user_by_login(store: Store, login: str) -> StoredUser | None:
    with store.session() as s:
        row = s.scalar(select(DeskUser).where(DeskUser.login == login))
        return None if row is None else _user_of(s, row)


def user_by_id(store: Store, user_id: int) -> StoredUser | None:
    with store.session() as s:
        row = s.get(DeskUser, user_id)
        return None if row is None else _user_of(s, row)


def users(store: Store) -> list[StoredUser]:
    with store.session() as s:
        return [_user_of(s, r) for r in s.scalars(select(DeskUser).order_by(DeskUser.login))]


def record_account_event(store: Store, user_id: int, kind: str, detail: str | None,
                         events: list[dict[str, Any]]) -> None:
    """One account event and the audit events that report it, in one transaction."""
    with store.session() as s:
        s.add(DeskAccountEvent(user_id=user_id, kind=kind, at_utc=dt.datetime.now(dt.UTC), detail=detail))
        s.flush()
        store.chain_events(s, events)


def set_credentials(store: Store, user_id: int, version: int, credentials: NewCredentials, kind: str,
                    detail: str | None, events: list[dict[str, Any]]) -> None:
    """An account's new password and sealed key, its account event and audit events, in one transaction.

    ``version`` is the credentials version the caller read (and sealed the key for): another change
    stored since then refuses this one, so two changes never both hold.
    """
    with store.session() as s:
        now = s.scalar(select(func.count()).select_from(DeskCredentials).where(DeskCredentials.user_id == user_id))
        if int(now or 0) != version:
            raise InputError("the account's password was changed meanwhile; nothing was recorded, try again")
        at = dt.datetime.now(dt.UTC)
        s.add(DeskCredentials(user_id=user_id, **vars(credentials), set_at_utc=at))
        s.add(DeskAccountEvent(user_id=user_id, kind=kind, at_utc=at, detail=detail))
        s.flush()
        store.chain_events(s, events)


def account_kinds(store: Store, user_id: int) -> list[str]:
    """The kinds of an account's events, oldest first."""
    with store.session() as s:
        return list(s.scalars(select(DeskAccountEvent.kind).where(DeskAccountEvent.user_id == user_id)
                              .order_by(DeskAccountEvent.id)))


def standing_of(kinds: list[str]) -> AccountStanding:
    """Failed attempts since the last sign-in, signature, unlock or new password; locked from a lock
    until an unlock; a password an administrator set must be changed until the person changes it."""
    failures, locked, must_change = 0, False, False
    for kind in kinds:
        if kind in FAILURES:
            failures += 1
        elif kind in RESETS:
            failures = 0
        if kind == LOCKED:
            locked = True
        elif kind == UNLOCKED:
            locked = False
        if kind in (PASSWORD_RESET, PASSWORD_CHANGED):
            must_change = kind == PASSWORD_RESET
    return AccountStanding(failures, locked, must_change)


def account_standing(store: Store, user_id: int) -> AccountStanding:
    return standing_of(account_kinds(store, user_id))
