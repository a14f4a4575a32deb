"""Building blocks for the trust tests: a workspace with one lot ready for release, and an attacker's tools.

The workspace is made without running a night (fast): the demo trust set (root CA, system
identity, two reviewers, register), and one stored decision "ready for release" whose
certificate the system identity signed, exactly as the night writes it. The attacker's tools
make what the issue's attacks used: a self-made CA, signers expired or not yet valid, a signer
without signing key usage, a signature made with pyHanko directly (no lotgate check in the way),
and text painted over a certificate in an incremental update.
"""

from __future__ import annotations

import datetime as dt
import hashlib
from dataclasses import dataclass
from io import BytesIO
from pathlib import Path

from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.hazmat.primitives.serialization import pkcs12
from cryptography.x509.oid import NameOID
from pyhanko.pdf_utils import generic
from pyhanko.pdf_utils.incremental_writer import IncrementalPdfFileWriter
from pyhanko.sign import fields, signers

from pipeline.documents.certificate import render_certificate_with_slot
from pipeline.records import signing
from pipeline.records.demo_trust import DemoTrust, create_demo_trust
from pipeline.records.store import Store
from pipeline.records.stored import DecisionWrite  # noqa: F401 - used by the tests
from pipeline.records.workspace import Workspace, open_workspace, write_settings
from pipeline.release.records import CertificateFile, DecisionRecord
from pipeline.release.signature import signature_block, system_ready_meaning
from pipeline.vocabulary import Disposition
from tests.dossiers import example_dossier

PLANT = "Harrowgate Enzymes, Line 4 (test)"
LOT = "HGE-0001"
NIGHTLY = "lotgate (nightly job)"


@dataclass(frozen=True)
class ReadyWorkspace:
    ws: Workspace
    store: Store
    trust: DemoTrust

    def person(self, name: str) -> signing.SigningIdentity:
        p12, passphrase = self.trust.identity_of(name)
        return signing.load_identity(p12, passphrase_env="", passphrase_file=passphrase)

    def system(self) -> signing.SigningIdentity:
        return signing.load_identity(self.trust.system_p12, passphrase_env="",
                                     passphrase_file=self.trust.system_passphrase)

    def counts(self) -> tuple[int, int, tuple[str, ...]]:
        """Decisions, audit events and certificate files: what 'nothing written' compares."""
        files = tuple(sorted(p.name for p in self.ws.certificates.glob("*.pdf")))
        return len(self.store.decisions()), len(self.store.audit_events()), files


def ready_workspace(root: Path, lots: tuple[str, ...] = (LOT,), settings: dict | None = None) -> ReadyWorkspace:
    write_settings(root, {"plant_name": PLANT, "time_zone": "Europe/Berlin",
                          "trust": {"root_ca": "keys/root-ca.pem"}, "signer_register": "keys/signers.yaml",
                          **(settings or {})})
    trust = create_demo_trust(root / "keys", PLANT)
    ws = open_workspace(root)
    ws.make_folders()
    store = Store(ws.database_url)
    made = ReadyWorkspace(ws, store, trust)
    system = made.system()
    for lot in lots:
        store.add_decisions([DecisionWrite(prepared_record(ws, system, lot), NIGHTLY)])
    return made


def prepared_record(ws: Workspace, system: signing.SigningIdentity, lot: str) -> DecisionRecord:
    """What the night stores for a lot ready for release, with its system-signed certificate in place."""
    dossier = example_dossier()
    dossier["lot"]["lot_id"] = lot
    dossier["decision"].update(lot_id=lot, disposition=Disposition.READY_FOR_RELEASE,
                               label=Disposition.READY_FOR_RELEASE)
    now = dt.datetime.now(dt.UTC).replace(microsecond=0)
    meaning = system_ready_meaning(ws.plant_name, "LLC-200", "3.1")
    block = signature_block(system.signer_name, system.fingerprint_sha256, now, ws.time_zone, meaning, system=True)
    unsigned, slot = render_certificate_with_slot(dossier, block)
    pdf = signing.sign_pdf(unsigned, system, reason=meaning, location=ws.plant_name, signed_at=now, reserve=slot)
    name = f"{lot}_r1_certificate.pdf"
    (ws.certificates / name).write_bytes(pdf)
    decision = dossier["decision"]
    return DecisionRecord(
        lot_id=lot, product="LLC-200", disposition=Disposition.READY_FOR_RELEASE, hold_categories=(), reasons=(),
        spec_version="3.1", spec_sha256=decision["spec_sha256"], fingerprint=hashlib.sha256(lot.encode()).hexdigest(),
        label=Disposition.READY_FOR_RELEASE, decided_at_utc=now.isoformat(),
        certificate=CertificateFile(name, hashlib.sha256(pdf).hexdigest(), system.signer_name, now.isoformat(),
                                    meaning, system.fingerprint_sha256))


# --------------------------------------------------------------------------- the attacker's tools


def _ec_key() -> ec.EllipticCurvePrivateKey:
    return ec.generate_private_key(ec.SECP256R1())


def _usage(signer: bool, *, signing_bits: bool = True) -> x509.KeyUsage:
    return x509.KeyUsage(digital_signature=signer and signing_bits, content_commitment=signer and signing_bits,
                         key_encipherment=signer and not signing_bits, data_encipherment=False, key_agreement=False,
                         key_cert_sign=not signer, crl_sign=not signer, encipher_only=False, decipher_only=False)


def self_made_ca(name: str = "Harrowgate Enzymes Root CA") -> tuple[ec.EllipticCurvePrivateKey, x509.Certificate]:
    """A root CA anyone can make, with the plant's very name in it."""
    key = _ec_key()
    subject = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, name)])
    now = dt.datetime.now(dt.UTC)
    cert = (x509.CertificateBuilder().subject_name(subject).issuer_name(subject).public_key(key.public_key())
            .serial_number(x509.random_serial_number()).not_valid_before(now - dt.timedelta(days=1))
            .not_valid_after(now + dt.timedelta(days=365))
            .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
            .add_extension(_usage(False), critical=True).sign(key, hashes.SHA256()))
    return key, cert


def plant_ca(trust: DemoTrust) -> tuple[ec.EllipticCurvePrivateKey, x509.Certificate]:
    key = serialization.load_pem_private_key((trust.keys / "demo-root-ca.key").read_bytes(), password=None)
    assert isinstance(key, ec.EllipticCurvePrivateKey)
    return key, x509.load_pem_x509_certificate(trust.root_ca.read_bytes())


def issue(folder: Path, ca: tuple[ec.EllipticCurvePrivateKey, x509.Certificate], common_name: str, *,
          start: dt.datetime | None = None, end: dt.datetime | None = None, key_usage: bool = True,
          unit: str | None = None) -> Path:
    """A PKCS#12 (passphrase b'pw', mode 0600) for ``common_name`` issued by ``ca``; returns its path."""
    ca_key, ca_cert = ca
    key = _ec_key()
    now = dt.datetime.now(dt.UTC).replace(microsecond=0)
    attributes = [x509.NameAttribute(NameOID.COMMON_NAME, common_name)]
    if unit:
        attributes.append(x509.NameAttribute(NameOID.ORGANIZATIONAL_UNIT_NAME, unit))
    builder = (x509.CertificateBuilder().subject_name(x509.Name(attributes)).issuer_name(ca_cert.subject)
               .public_key(key.public_key()).serial_number(x509.random_serial_number())
               .not_valid_before(start or now - dt.timedelta(days=1))
               .not_valid_after(end or now + dt.timedelta(days=365)))
    if key_usage:
        builder = builder.add_extension(_usage(True), critical=True)
    else:  # a certificate for encryption only: no digitalSignature, no nonRepudiation
        builder = builder.add_extension(_usage(True, signing_bits=False), critical=True)
    cert = builder.sign(ca_key, hashes.SHA256())
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "signer.p12"
    path.write_bytes(pkcs12.serialize_key_and_certificates(
        common_name.encode(), key, cert, [ca_cert], serialization.BestAvailableEncryption(b"pw")))
    path.chmod(0o600)
    return path


def unlocked(p12: Path) -> signing.SigningIdentity:
    """An identity opened without lotgate's own validity check (an attacker's tool has none)."""
    return signing.load_identity(p12, passphrase=b"pw", check_validity=False)


def raw_sign(pdf: bytes, identity: signing.SigningIdentity, *, field: str, when: dt.datetime,
             reason: str = "Release of the lot") -> bytes:
    """Sign with pyHanko directly, whatever the certificate's validity: what a forger's own tool does."""
    meta = signers.PdfSignatureMetadata(field_name=field, reason=reason, name=identity.signer_name,
                                        subfilter=fields.SigSeedSubFilter.PADES, md_algorithm="sha256")
    out = BytesIO()
    signing._FixedTimePdfSigner(meta, identity.signer, when).sign_pdf(
        IncrementalPdfFileWriter(BytesIO(pdf)), bytes_reserved=signing.SIGNATURE_BYTES_RESERVED, output=out)
    return out.getvalue()


def painted(pdf: bytes, text: bytes = b"RELEASED - all results within limits") -> bytes:
    """``pdf`` with text painted over its first page in an incremental update (no signature)."""
    writer = IncrementalPdfFileWriter(BytesIO(pdf))
    font = generic.DictionaryObject({generic.NameObject("/Type"): generic.NameObject("/Font"),
                                     generic.NameObject("/Subtype"): generic.NameObject("/Type1"),
                                     generic.NameObject("/BaseFont"): generic.NameObject("/Helvetica")})
    stream = generic.StreamObject(stream_data=b"BT /FPaint 28 Tf 60 420 Td (" + text + b") Tj ET")
    resources = generic.DictionaryObject({generic.NameObject("/Font"): generic.DictionaryObject(
        {generic.NameObject("/FPaint"): writer.add_object(font)})})
    writer.add_stream_to_page(0, writer.add_object(stream), resources=resources)
    out = BytesIO()
    writer.write(out)
    return out.getvalue()
