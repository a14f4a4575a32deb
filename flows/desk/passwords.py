"""A desk password changed by its person, or reset by an administrator (21 CFR 11.300(b): passwords
periodically checked and revised — from memory).

The order of a change, so that a process stopped anywhere leaves a password that works:
1. under the workspace's run lock, the current password is checked (a wrong one is a failed
   attempt, counted like a failed sign-in; the account locks at the limit);
2. the sealed key is opened with the current password and sealed under the new one into a NEW
   file (``keys/desk/LOGIN+N.p12``: written to a temporary file, flushed, renamed); the file in
   force is not touched — stopped here, the store still names the old hash and the old file;
3. ONE transaction stores the new hash with the new file's name and SHA-256 (``desk_credentials``),
   the account event and its audit event — from here the new password is the one;
4. the former sealed file is removed — stopped before, it is a file no record names, removed by
   the account's next change or reset (and never opened: the store names the new one).

A reset cannot re-seal: the key is sealed under a password only the person knew. The account
then keeps no signing key until its PKCS#12 is imported again with its own passphrase (given to
the reset, or by a later reset); the person must choose a new password at the next sign-in.
"""

from __future__ import annotations

from pathlib import Path

from flows.desk.accounts import (
    Desk,
    check_password_policy,
    desk_write,
    hash_password,
    password_matches,
    record_failure,
)
from flows.desk.keystore import SealedIdentity, reseal_identity, seal_identity, unused_key_files
from flows.desk.roles import DeskRole, signs
from pipeline.errors import InputError, LotgateError
from pipeline.records import audit
from pipeline.records import desk_accounts as accounts


class PasswordNotChanged(LotgateError):
    """A change refused for the person's current password or the account's standing (nothing changed)."""


def _sweep(desk: Desk, user: accounts.StoredUser) -> None:
    """Remove the account's sealed files that no credentials in force name (left by a stopped change)."""
    for path in unused_key_files(desk.ws.root, user.login, user.key_file):
        path.unlink(missing_ok=True)


def _forget_unrecorded(desk: Desk, user_id: int, sealed: SealedIdentity | None) -> None:
    """A new sealed file whose credentials were not stored is removed — only if the store does not name it."""
    if sealed is None:
        return
    now = accounts.user_by_id(desk.store, user_id)
    if now is not None and now.key_file != sealed.key_file:
        (desk.ws.root / sealed.key_file).unlink(missing_ok=True)


def _store(desk: Desk, user: accounts.StoredUser, credentials: accounts.NewCredentials, kind: str,
           event: dict[str, object], sealed: SealedIdentity | None) -> accounts.StoredUser:
    """Step 3 (one transaction), then step 4 (the former sealed file removed)."""
    try:
        accounts.set_credentials(desk.store, user.id, user.credentials_version, credentials, kind, None, [event])
    except BaseException:
        _forget_unrecorded(desk, user.id, sealed)
        raise
    if user.key_file and user.key_file != credentials.key_file:
        _remove_former(desk, user.key_file)
    now = accounts.user_by_id(desk.store, user.id)
    assert now is not None
    return now


def _remove_former(desk: Desk, key_file: str) -> None:
    (desk.ws.root / key_file).unlink(missing_ok=True)


def change_password(desk: Desk, user_id: int, *, current: str, new: str, repeat: str,
                    client: str) -> accounts.StoredUser:
    """The person's own change: the current password checked, the key re-sealed, one record. Raises
    PasswordNotChanged (current password, standing), InputError (the new one), DeskBusy."""
    if new != repeat:
        raise InputError("the new password and its repetition differ; nothing was changed")
    check_password_policy(new)
    tz = desk.ws.time_zone
    with desk_write(desk):
        user = accounts.user_by_id(desk.store, user_id)
        if user is None or accounts.account_standing(desk.store, user_id).locked:
            raise PasswordNotChanged("this account is locked; ask the administrator to unlock it")
        if not password_matches(user.password_hash, current):
            locked = record_failure(desk, user, accounts.PASSWORD_CHANGE_FAILED, "desk-password-change-refused",
                                    client=client, why="wrong current password")
            raise PasswordNotChanged("the current password is not right: nothing was changed"
                                     + ("; the account is now locked" if locked else ""))
        if new == current:
            raise InputError("the new password is the current one; choose another (nothing was changed)")
        password_hash = hash_password(new)
        _sweep(desk, user)
        sealed = None
        if user.key_file is not None and user.key_sha256 is not None and user.signer_certificate_sha256 is not None:
            sealed = reseal_identity(desk.ws.root, user.login, user.credentials_version + 1, user.key_file,
                                     user.key_sha256, user.signer_certificate_sha256, current, new)
        credentials = accounts.NewCredentials(
            accounts.CHANGED, password_hash, sealed.key_file if sealed else None, sealed.key_sha256 if sealed else None,
            sealed.certificate_sha256 if sealed else None, user.login)
        event = audit.event("desk-password-changed", time_zone=tz, account=user.login, by=user.login, client=client,
                            signing_key="sealed again under the new password" if sealed else "none")
        return _store(desk, user, credentials, accounts.PASSWORD_CHANGED, event, sealed)


def check_reset(desk: Desk, login: str, p12: Path | None) -> accounts.StoredUser:
    """Refuse, before any password is asked: no such account, a PKCS#12 for a role that never signs."""
    user = accounts.user_by_login(desk.store, login)
    if user is None:
        raise InputError(f"no desk account named '{login}'")
    if p12 is not None and not signs(DeskRole(user.role)):
        raise InputError(f"a {user.role} never signs: an account of this role takes no signing identity")
    return user


def reset_password(desk: Desk, login: str, new: str, *, by: str, p12: Path | None = None,
                   p12_passphrase: bytes | None = None,
                   p12_passphrase_file: Path | None = None) -> accounts.StoredUser:
    """An administrator's new password for an account. The key sealed under the old password cannot be
    opened: with ``p12`` the person's PKCS#12 is sealed afresh under the new password; without, the
    account keeps no signing key. Either way the former sealed file is removed after the record."""
    check_reset(desk, login, p12)
    password_hash = hash_password(new)
    with desk_write(desk):
        user = check_reset(desk, login, p12)
        _sweep(desk, user)
        sealed = None
        if p12 is not None:
            sealed = seal_identity(desk.ws.root, login, p12, p12_passphrase, new, p12_passphrase_file,
                                   version=user.credentials_version + 1)
            if sealed.signer_name != user.printed_name:
                (desk.ws.root / sealed.key_file).unlink(missing_ok=True)
                raise InputError(f"{p12.name} is the signing identity of {sealed.signer_name}, not of "
                                 f"{user.printed_name} whose account {login} is; nothing was changed")
        credentials = accounts.NewCredentials(
            accounts.RESET, password_hash, sealed.key_file if sealed else None, sealed.key_sha256 if sealed else None,
            sealed.certificate_sha256 if sealed else None, by)
        event = audit.event(
            "desk-password-reset", time_zone=desk.ws.time_zone, account=login, by=by,
            signing_key=("imported again from the person's PKCS#12" if sealed else
                         "none (the former one was sealed under the old password)" if user.key_file else "none"),
            signer_certificate_sha256=sealed.certificate_sha256 if sealed else None)
        return _store(desk, user, credentials, accounts.PASSWORD_RESET, event, sealed)
