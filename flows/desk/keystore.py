"""A person's signing identity, kept sealed under their desk password (21 CFR 11.200: ID + password).

At ``lotgate users add`` the person's PKCS#12 is opened once with its own passphrase and written
again, encrypted with the desk password (PBES2: PBKDF2-HMAC-SHA256, AES-256-CBC), into
``DIR/keys/desk/LOGIN.p12`` (mode 0600). The server never holds the password or an unlocked
key between requests: the password typed again at signing is what opens the key, for that act.
The file's SHA-256 and the certificate's fingerprint are recorded with the account, so a key
file exchanged behind the desk's back is refused.
"""

from __future__ import annotations

import hashlib
import os
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


def seal_identity(root: Path, login: str, p12: Path, p12_passphrase: bytes | None, desk_password: str,
                  p12_passphrase_file: Path | None = None) -> SealedIdentity:
    """Open the person's PKCS#12 (checked like every identity), re-encrypt it under the desk password."""
    identity = signing.load_identity(p12, passphrase=p12_passphrase, passphrase_env="",
                                     passphrase_file=p12_passphrase_file)
    secret = p12_passphrase if p12_passphrase is not None else (
        p12_passphrase_file.read_bytes().strip() if p12_passphrase_file is not None else None)
    try:
        key, cert, extra = pkcs12.load_key_and_certificates(p12.read_bytes(), secret)
    except ValueError as exc:
        raise SigningError(f"cannot open signing identity {p12}: {exc}") from exc
    encryption = (serialization.PrivateFormat.PKCS12.encryption_builder().kdf_rounds(PBKDF2_ROUNDS)
                  .key_cert_algorithm(pkcs12.PBES.PBESv2SHA256AndAES256CBC).hmac_hash(hashes.SHA256())
                  .build(desk_password.encode("utf-8")))
    data = pkcs12.serialize_key_and_certificates(login.encode("utf-8"), key, cert, extra, encryption)
    folder = root.joinpath(*KEY_FOLDER)
    folder.mkdir(parents=True, exist_ok=True)
    os.chmod(folder, 0o700)
    target = folder / f"{login}.p12"
    if target.exists():
        raise SigningError(f"{target} exists already; a sealed identity is never replaced")
    atomic_write(target, data)
    os.chmod(target, 0o600)
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
