"""A DEMO workspace's whole trust set from one demo root CA: system identity, reviewers, register.

``create_demo_trust(keys, plant, reviewers)`` writes into the workspace's ``keys/`` folder:

* ``root-ca.pem`` — the demo plant's root CA (the workspace's trust anchor), and its private key
  ``demo-root-ca.key`` (mode 0600; a real plant's CA key never sits in a workspace);
* ``signer.p12`` + ``signer.passphrase`` — the installation's SYSTEM identity (CN "lotgate system —
  <plant> (DEMO)", organizationalUnit saying it is the system);
* ``people/<person>/signer.p12`` + ``signer.passphrase`` — one identity per demo reviewer;
* ``signers.yaml`` — the register of authorised signers naming the reviewers' certificates.

Running it again leaves every existing file as it is and adds only what is missing. Everything
is labelled DEMO.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import yaml
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec

from pipeline.errors import SigningError
from pipeline.records.demo_identity import (
    DemoCa,
    _write_private,
    issue_demo_signer,
    new_demo_ca,
    system_common_name,
)
from pipeline.records.signing import P12_NAME, PASSPHRASE_NAME, ROOT_CA_NAME
from pipeline.vocabulary import SignerRole

CA_KEY_NAME = "demo-root-ca.key"
REGISTER_NAME = "signers.yaml"
PEOPLE = "people"
VALID_DAYS = 3650


@dataclass(frozen=True)
class DemoReviewer:
    """An invented person of the demo plant, and what the demo register lets them sign."""

    person: str
    printed_name: str
    roles: tuple[SignerRole, ...]


DEMO_REVIEWERS = (
    DemoReviewer("mira.castellan", "Mira Castellan",
                 (SignerRole.RELEASE_APPROVAL, SignerRole.REJECTION, SignerRole.RESULT_INVALIDATION,
                  SignerRole.REBASELINE)),
    DemoReviewer("jonas.brandt", "Jonas Brandt", (SignerRole.RELEASE_APPROVAL, SignerRole.REJECTION)),
)


@dataclass(frozen=True)
class DemoTrust:
    keys: Path
    root_ca: Path
    system_p12: Path
    system_passphrase: Path
    register: Path
    people: tuple[tuple[str, Path, Path], ...]  # (person, p12, passphrase file)

    def identity_of(self, person: str) -> tuple[Path, Path]:
        for name, p12, passphrase in self.people:
            if name == person:
                return p12, passphrase
        raise SigningError(f"no demo identity for {person!r}")


def _load_ca(keys: Path, plant_name: str) -> DemoCa:
    key = serialization.load_pem_private_key((keys / CA_KEY_NAME).read_bytes(), password=None)
    cert = x509.load_pem_x509_certificate((keys / ROOT_CA_NAME).read_bytes())
    if not isinstance(key, ec.EllipticCurvePrivateKey):
        raise SigningError(f"{keys / CA_KEY_NAME} is not the demo CA's EC key")
    return DemoCa(key, cert, f"{plant_name} (DEMO)")


def _ca(keys: Path, plant_name: str, start: dt.datetime, end: dt.datetime) -> DemoCa:
    have_cert, have_key = (keys / ROOT_CA_NAME).exists(), (keys / CA_KEY_NAME).exists()
    if have_cert and have_key:
        return _load_ca(keys, plant_name)
    if have_cert or have_key or (keys / P12_NAME).exists():
        raise SigningError(f"{keys} holds an older or partial demo identity (no {CA_KEY_NAME} beside {ROOT_CA_NAME}); "
                           "move the folder away and run again, rather than have a key overwritten")
    ca = new_demo_ca(plant_name, start, end)
    keys.mkdir(parents=True, exist_ok=True)
    _write_private(keys / CA_KEY_NAME, ca.key.private_bytes(serialization.Encoding.PEM,
                                                              serialization.PrivateFormat.PKCS8,
                                                              serialization.NoEncryption()), 0o600)
    _write_private(keys / ROOT_CA_NAME, ca.cert.public_bytes(serialization.Encoding.PEM), 0o644)
    return ca


def _fingerprint(p12: Path, passphrase: Path) -> str:
    from cryptography.hazmat.primitives.serialization import pkcs12

    loaded = pkcs12.load_key_and_certificates(p12.read_bytes(), passphrase.read_bytes().strip())
    if loaded[1] is None:
        raise SigningError(f"{p12} holds no certificate")
    return loaded[1].fingerprint(hashes.SHA256()).hex()


def create_demo_trust(keys: Path, plant_name: str, reviewers: tuple[DemoReviewer, ...] = DEMO_REVIEWERS,
                      *, now: dt.datetime | None = None) -> DemoTrust:
    """The demo trust set in ``keys`` (created where missing; nothing existing is replaced)."""
    keys = Path(keys)
    start = (now or dt.datetime.now(dt.UTC)).replace(microsecond=0)
    end = start + dt.timedelta(days=VALID_DAYS)
    ca = _ca(keys, plant_name, start, end)
    if not (keys / P12_NAME).exists():
        issue_demo_signer(ca, keys, system_common_name(plant_name), start, end, system=True)
    people = []
    for reviewer in reviewers:
        folder = keys / PEOPLE / reviewer.person
        if not (folder / P12_NAME).exists():
            issue_demo_signer(ca, folder, f"{reviewer.printed_name} (DEMO)", start, end)
        people.append((reviewer.person, folder / P12_NAME, folder / PASSPHRASE_NAME))
    register = keys / REGISTER_NAME
    if not register.exists():
        entries = [{"person": r.person, "printed_name": f"{r.printed_name} (DEMO)",
                    "certificate_sha256": _fingerprint(p12, passphrase), "roles": [role.value for role in r.roles],
                    "valid_from": start.date().isoformat(), "valid_to": end.date().isoformat()}
                   for r, (_, p12, passphrase) in zip(reviewers, people, strict=True)]
        text = ("# Register of authorised signers (DEMO): a controlled document. Who may sign what, with which\n"
                "# certificate, from when to when. A change is a new version, approved like any controlled file.\n"
                + yaml.safe_dump({"kind": "signer-register", "version": "1",
                                  "approved_by": "Head of Quality (DEMO)", "signers": entries},
                                 sort_keys=False, allow_unicode=True))
        _write_private(register, text.encode("utf-8"), 0o644)
    return DemoTrust(keys, keys / ROOT_CA_NAME, keys / P12_NAME, keys / PASSPHRASE_NAME, register, tuple(people))


def issue_person(keys: Path, folder: Path, plant_name: str, printed_name: str,
                 *, now: dt.datetime | None = None) -> tuple[Path, Path]:
    """One more demo person's identity in ``folder``, issued by the workspace's demo CA (created when missing)."""
    if (Path(folder) / P12_NAME).exists():
        raise SigningError(f"{folder} already holds an identity ({P12_NAME}); it is never overwritten")
    trust = create_demo_trust(keys, plant_name, now=now)
    ca = _load_ca(trust.keys, plant_name)
    start = (now or dt.datetime.now(dt.UTC)).replace(microsecond=0)
    p12, passphrase, _ = issue_demo_signer(ca, Path(folder), f"{printed_name} (DEMO)", start,
                                           start + dt.timedelta(days=VALID_DAYS))
    return p12, passphrase
