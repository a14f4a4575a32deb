"""A person's signing identity, kept sealed under their desk password (21 CFR 11.200: ID + password).

At ``lotgate users add`` the person's PKCS#12 is opened once with its own passphrase and written
again, encrypted with the desk password (PBES2: PBKDF2-HMAC-SHA256, AES-256-CBC), into
``DIR/keys/desk/LOGIN.p12`` (mode 0600). The server never holds the password or an unlocked
key between requests: the password typed again at signing is what opens the key, for that act.
The file's SHA-256 and the certificate's fingerprint are recorded with the account, so a key
file exchanged behind the desk's back is refused.

A new password never rewrites a sealed file: the key is sealed again into a new file beside it
(``LOGIN+N.p12`` for the account's N-th change or reset, '+' being no character of an account
name), the store then names the new file with the new password hash in one transaction, and only
then is the former file removed. Stopped anywhere, the store names a file that its password opens.
"""

from __future__ import annotations

import hashlib
import os
import re
from dataclasses import dataclass
from pathlib import Path

from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.serialization import pkcs12

from pipeline.errors import SigningError
from pipeline.records import signing
from pipeline.records.workspace import atomic_write

KEY_FOLDER = ("keys", "desk")
PBKDF2_ROUNDS = 600_000  # OWASP's 2023 figure for PBKDF2-HMAC-SHA256 (from memory)


@dataclass(frozen=True)
class SealedIdentity:
    key_file: str  # relative to the workspace
    key_sha256: str
    signer_name: str
    certificate_sha256: str


def key_file_name(login: str, version: int) -> str:
    """The sealed key's file for an account's credentials version (0: the account's first)."""
    return f"{login}.p12" if version == 0 else f"{login}+{version}.p12"


def unused_key_files(root: Path, login: str, in_use: str | None) -> list[Path]:
    """The account's sealed files that its credentials in force do not name (left by a stopped change)."""
    folder = root.joinpath(*KEY_FOLDER)
    if not folder.is_dir():
        return []
    pattern = re.compile(re.escape(login) + r"(\+[0-9]+)?\.p12")
    keep = (root / in_use).resolve() if in_use else None
    return sorted(p for p in folder.iterdir() if pattern.fullmatch(p.name) and p.resolve() != keep)


def _write_sealed(root: Path, login: str, version: int, key, cert, extra, desk_password: str) -> tuple[Path, bytes]:
    encryption = (serialization.PrivateFormat.PKCS12.encryption_builder().kdf_rounds(PBKDF2_ROUNDS)
                  .key_cert_algorithm(pkcs12.PBES.PBESv2SHA256AndAES256CBC).hmac_hash(hashes.SHA256())
                  .build(desk_password.encode("utf-8")))
    data = pkcs12.serialize_key_and_certificates(login.encode("utf-8"), key, cert, extra, encryption)
    folder = root.joinpath(*KEY_FOLDER)
    folder.mkdir(parents=True, exist_ok=True)
    os.chmod(folder, 0o700)
    target = folder / key_file_name(login, version)
    if target.exists():
        raise SigningError(f"{target} exists already; a sealed identity is never replaced")
    atomic_write(target, data)  # a temporary file flushed to disk, then renamed: the whole file or none
    os.chmod(target, 0o600)
    handle = os.open(folder, os.O_RDONLY)
    try:  # the rename itself on disk before any record names the file (a power cut after the commit)
        os.fsync(handle)
    finally:
        os.close(handle)
    return target, data


def seal_identity(root: Path, login: str, p12: Path, p12_passphrase: bytes | None, desk_password: str,
                  p12_passphrase_file: Path | None = None, *, version: int = 0) -> SealedIdentity:
    """Open the person's PKCS#12 (checked like every identity), re-encrypt it under the desk password."""
    identity = signing.load_identity(p12, passphrase=p12_passphrase, passphrase_env="",
                                     passphrase_file=p12_passphrase_file)
    secret = p12_passphrase if p12_passphrase is not None else (
        p12_passphrase_file.read_bytes().strip() if p12_passphrase_file is not None else None)
    try:
        key, cert, extra = pkcs12.load_key_and_certificates(p12.read_bytes(), secret)
    except ValueError as exc:
        raise SigningError(f"cannot open signing identity {p12}: {exc}") from exc
    target, data = _write_sealed(root, login, version, key, cert, extra, desk_password)
    return SealedIdentity(str(target.relative_to(root)), hashlib.sha256(data).hexdigest(), identity.signer_name,
                          identity.fingerprint_sha256)


def unseal_identity(root: Path, key_file: str, key_sha256: str, certificate_sha256: str,
                    desk_password: str) -> signing.SigningIdentity:
    """The identity sealed for an account, opened with the password typed at signing; refused if changed."""
    path = (root / key_file).resolve()
    if not path.is_relative_to(root.joinpath(*KEY_FOLDER).resolve()) or not path.is_file():
        raise SigningError(f"the sealed signing identity {key_file} of this account is missing")
    data = path.read_bytes()
    if hashlib.sha256(data).hexdigest() != key_sha256:
        raise SigningError(f"the sealed signing identity {key_file} changed since the account was made "
                           "(SHA-256 differs); nothing is signed with it. Tell the administrator.")
    identity = signing.load_identity(path, passphrase=desk_password.encode("utf-8"), passphrase_env="")
    if identity.fingerprint_sha256 != certificate_sha256:
        raise SigningError(f"the certificate in {key_file} is not the one linked to this account")
    return identity


def reseal_identity(root: Path, login: str, version: int, key_file: str, key_sha256: str, certificate_sha256: str,
                    old_password: str, new_password: str) -> SealedIdentity:
    """The account's sealed identity, opened with the old password (checked as at signing) and sealed
    under the new one into the file of credentials ``version``; the old file is left as it is."""
    identity = unseal_identity(root, key_file, key_sha256, certificate_sha256, old_password)
    sealed = (root / key_file).read_bytes()
    if hashlib.sha256(sealed).hexdigest() != key_sha256:  # read again: the bytes sealed anew are the ones checked
        raise SigningError(f"the sealed signing identity {key_file} changed while it was read; nothing was changed")
    key, cert, extra = pkcs12.load_key_and_certificates(sealed, old_password.encode("utf-8"))
    target, data = _write_sealed(root, login, version, key, cert, extra, new_password)
    return SealedIdentity(str(target.relative_to(root)), hashlib.sha256(data).hexdigest(), identity.signer_name,
                          identity.fingerprint_sha256)
