"""Desk accounts in the store (adapter): written once, and their append-only events.

An account's standing (failed attempts since the last success, locked or not) is read from its
events, never kept in a column that is updated. Each account event is written in the same
transaction as the audit event that reports it.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select

from pipeline.errors import InputError
from pipeline.records.store import Store
from pipeline.records.stored import utc
from pipeline.records.tables import DeskAccountEvent, DeskUser

# Account event kinds (stored words).
LOGIN_SUCCEEDED = "login-succeeded"
LOGIN_FAILED = "login-failed"
SIGNING_PASSWORD_FAILED = "signing-password-failed"
SIGNED = "signed"
LOCKED = "locked"
UNLOCKED = "unlocked"
LOGGED_OUT = "logged-out"
FAILURES = frozenset({LOGIN_FAILED, SIGNING_PASSWORD_FAILED})
RESETS = frozenset({LOGIN_SUCCEEDED, SIGNED, UNLOCKED})


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


def _user_of(row: DeskUser) -> StoredUser:
    return StoredUser(row.id, row.login, row.printed_name, row.role, row.password_hash, row.key_file, row.key_sha256,
                      row.signer_certificate_sha256, utc(row.created_at_utc), row.created_by)


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
        return _user_of(row)


def user_by_login(store: Store, login: str) -> StoredUser | None:
    with store.session() as s:
        row = s.scalar(select(DeskUser).where(DeskUser.login == login))
        return None if row is None else _user_of(row)


def user_by_id(store: Store, user_id: int) -> StoredUser | None:
    with store.session() as s:
        row = s.get(DeskUser, user_id)
        return None if row is None else _user_of(row)


def users(store: Store) -> list[StoredUser]:
    with store.session() as s:
        return [_user_of(r) for r in s.scalars(select(DeskUser).order_by(DeskUser.login))]


def record_account_event(store: Store, user_id: int, kind: str, detail: str | None,
                         events: list[dict[str, Any]]) -> None:
    """One account event and the audit events that report it, in one transaction."""
    with store.session() as s:
        s.add(DeskAccountEvent(user_id=user_id, kind=kind, at_utc=dt.datetime.now(dt.UTC), detail=detail))
        s.flush()
        store.chain_events(s, events)


def account_kinds(store: Store, user_id: int) -> list[str]:
    """The kinds of an account's events, oldest first."""
    with store.session() as s:
        return list(s.scalars(select(DeskAccountEvent.kind).where(DeskAccountEvent.user_id == user_id)
                              .order_by(DeskAccountEvent.id)))


def standing_of(kinds: list[str]) -> AccountStanding:
    """Failed attempts since the last sign-in, signature or unlock; locked from a lock until an unlock."""
    failures, locked = 0, False
    for kind in kinds:
        if kind in FAILURES:
            failures += 1
        elif kind in RESETS:
            failures = 0
        if kind == LOCKED:
            locked = True
        elif kind == UNLOCKED:
            locked = False
    return AccountStanding(failures, locked)


def account_standing(store: Store, user_id: int) -> AccountStanding:
    return standing_of(account_kinds(store, user_id))
