"""Signing identities, PAdES signatures and their verification.

Outside references used here:
* poppler's ``pdfsig`` is an independent verifier (a different PDF and CMS implementation).
* pypdf is an independent PDF parser, used to read the signature dictionary.
* ISO 32000-1:2008, 12.8.1: /ByteRange is [0 a b c]; the signature covers the whole file when
  b + c equals the file length, and the gap a..b holds exactly the /Contents hex string.
* ETSI EN 319 142-1 (PAdES baseline signatures), 5.1: /SubFilter /ETSI.CAdES.detached.
* RFC 5280, 4.2.1.1 / 4.2.1.2 / 4.2.1.3 / 4.2.1.9: authority and subject key identifiers,
  key usage bits, basicConstraints cA.
"""

from __future__ import annotations

import os
import shutil
from datetime import UTC, datetime, timedelta
from io import BytesIO
from pathlib import Path

import pypdf
import pytest
from cryptography import x509
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.hazmat.primitives.serialization import pkcs12
from pyhanko.pdf_utils import generic
from pyhanko.pdf_utils.incremental_writer import IncrementalPdfFileWriter
from reportlab.pdfgen import canvas

from pipeline.errors import SigningError
from pipeline.records.demo_identity import DemoIdentity, create_demo_identity
from pipeline.records.pdf_verification import pdfsig_report, verify_pdf
from pipeline.records.signing import load_identity, sign_pdf

MARKER = b"LOT-MARKER-4711"
REASON = "Lot released: all results within specification"
LOCATION = "Riverside demo plant, QA"
SIGNED_AT = datetime.now(UTC).replace(microsecond=0) - timedelta(minutes=5)
PDFSIG_MISSING = "pdfsig (poppler-utils) is not installed on this machine"


def _one_page_pdf() -> bytes:
    buf = BytesIO()
    pdf = canvas.Canvas(buf, pageCompression=0)  # uncompressed, so the marker is findable
    pdf.drawString(72, 720, MARKER.decode())
    pdf.showPage()
    pdf.save()
    return buf.getvalue()


UNSIGNED = _one_page_pdf()


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> DemoIdentity:
    return create_demo_identity(
        tmp_path_factory.mktemp("identity"), "Riverside", "Jane Doe",
        now=datetime.now(UTC) - timedelta(days=1),
    )


@pytest.fixture(scope="module")
def signed(demo: DemoIdentity) -> bytes:
    identity = load_identity(demo.p12_path, passphrase_file=demo.passphrase_path)
    return sign_pdf(
        UNSIGNED, identity, reason=REASON, location=LOCATION, signed_at=SIGNED_AT
    )


def _tampered(signed: bytes) -> bytes:
    at = signed.index(MARKER)
    data = bytearray(signed)
    data[at] ^= 0x01  # 'L' -> 'M', inside the signed page content
    return bytes(data)


def _copy_identity(demo: DemoIdentity, to: Path) -> tuple[Path, Path]:
    p12 = to / "signer.p12"
    pw = to / "signer.passphrase"
    shutil.copy2(demo.p12_path, p12)
    shutil.copy2(demo.passphrase_path, pw)
    return p12, pw


# --------------------------------------------------------------------------- identity files


class TestDemoIdentity:
    def test_files_and_modes(self, demo: DemoIdentity) -> None:
        assert demo.signer_name == "Jane Doe (DEMO)"
        assert demo.p12_path.stat().st_mode & 0o777 == 0o600
        assert demo.passphrase_path.stat().st_mode & 0o777 == 0o600
        assert demo.root_ca_path.stat().st_mode & 0o777 == 0o644
        assert len(demo.passphrase_path.read_bytes()) >= 32

    def test_certificate_chain_extensions(self, demo: DemoIdentity) -> None:
        key, leaf, cas = pkcs12.load_key_and_certificates(
            demo.p12_path.read_bytes(), demo.passphrase_path.read_bytes()
        )
        root = x509.load_pem_x509_certificate(demo.root_ca_path.read_bytes())
        assert isinstance(key, ec.EllipticCurvePrivateKey) and key.curve.name == "secp256r1"
        assert [c.fingerprint(c.signature_hash_algorithm) for c in cas] == [
            root.fingerprint(root.signature_hash_algorithm)
        ]
        cn = leaf.subject.get_attributes_for_oid(x509.NameOID.COMMON_NAME)[0].value
        root_cn = root.subject.get_attributes_for_oid(x509.NameOID.COMMON_NAME)[0].value
        assert cn == "Jane Doe (DEMO)" and "DEMO" in root_cn
        assert leaf.issuer == root.subject
        leaf.verify_directly_issued_by(root)  # raises if the signature does not hold
        # RFC 5280 4.2.1.3: a signing key has digitalSignature and nonRepudiation only.
        ku = leaf.extensions.get_extension_for_class(x509.KeyUsage)
        assert ku.critical and ku.value.digital_signature and ku.value.content_commitment
        assert not ku.value.key_cert_sign
        # RFC 5280 4.2.1.9: cA false on the leaf, true on the root.
        assert leaf.extensions.get_extension_for_class(x509.BasicConstraints).value.ca is False
        assert root.extensions.get_extension_for_class(x509.BasicConstraints).value.ca is True
        # RFC 5280 4.2.1.1: the leaf's AKI equals the root's SKI.
        aki = leaf.extensions.get_extension_for_class(x509.AuthorityKeyIdentifier).value
        ski = root.extensions.get_extension_for_class(x509.SubjectKeyIdentifier).value
        assert aki.key_identifier == ski.digest

    def test_idempotent(self, demo: DemoIdentity) -> None:
        before = demo.p12_path.read_bytes()
        again = create_demo_identity(demo.p12_path.parent, "Riverside", "Someone Else")
        assert again == demo
        assert demo.p12_path.read_bytes() == before

    def test_partial_set_refused(self, tmp_path: Path) -> None:
        (tmp_path / "signer.p12").write_bytes(b"x")
        with pytest.raises(SigningError, match="only part of a signing identity"):
            create_demo_identity(tmp_path, "Riverside", "Jane Doe")


# --------------------------------------------------------------------------- loading


class TestLoadIdentity:
    def test_loads_from_file(self, demo: DemoIdentity) -> None:
        identity = load_identity(demo.p12_path, passphrase_file=demo.passphrase_path)
        leaf = pkcs12.load_key_and_certificates(
            demo.p12_path.read_bytes(), demo.passphrase_path.read_bytes()
        )[1]
        assert identity.signer_name == "Jane Doe (DEMO)"
        assert identity.fingerprint_sha256 == leaf.fingerprint(leaf.signature_hash_algorithm).hex()
        assert identity.not_before == leaf.not_valid_before_utc
        assert identity.not_after == leaf.not_valid_after_utc
        assert set(identity.to_dict()) == {
            "signer_name", "fingerprint_sha256", "not_before", "not_after"
        }

    def test_passphrase_from_env(self, demo: DemoIdentity, monkeypatch: pytest.MonkeyPatch) -> None:
        monkeypatch.setenv("LOTGATE_SIGNING_PASSPHRASE", demo.passphrase_path.read_text())
        assert load_identity(demo.p12_path).signer_name == "Jane Doe (DEMO)"

    def test_argument_beats_env(self, demo: DemoIdentity, monkeypatch: pytest.MonkeyPatch) -> None:
        monkeypatch.setenv("LOTGATE_SIGNING_PASSPHRASE", "wrong")
        good = demo.passphrase_path.read_bytes()
        assert load_identity(demo.p12_path, passphrase=good).signer_name == "Jane Doe (DEMO)"

    def test_no_passphrase_refused(
        self, demo: DemoIdentity, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        monkeypatch.delenv("LOTGATE_SIGNING_PASSPHRASE", raising=False)
        with pytest.raises(SigningError, match="no passphrase"):
            load_identity(demo.p12_path)

    def test_wrong_passphrase_refused(self, demo: DemoIdentity) -> None:
        with pytest.raises(SigningError, match="wrong passphrase"):
            load_identity(demo.p12_path, passphrase=b"not-the-passphrase")

    def test_str_passphrase_refused(self, demo: DemoIdentity) -> None:
        with pytest.raises(SigningError, match="must be bytes"):
            load_identity(demo.p12_path, passphrase="text")  # type: ignore[arg-type]

    @pytest.mark.parametrize("which", ["p12", "passphrase"])
    def test_shared_file_refused(self, demo: DemoIdentity, tmp_path: Path, which: str) -> None:
        p12, pw = _copy_identity(demo, tmp_path)
        os.chmod(p12 if which == "p12" else pw, 0o644)
        with pytest.raises(SigningError, match="mode 0644: it can be read by other users"):
            load_identity(p12, passphrase_file=pw)

    def test_missing_file_refused(self, tmp_path: Path) -> None:
        with pytest.raises(SigningError, match="does not exist"):
            load_identity(tmp_path / "absent.p12", passphrase=b"x")

    def test_expired_refused_with_dates(self, tmp_path: Path) -> None:
        old = create_demo_identity(
            tmp_path, "Riverside", "Old Signer", valid_days=30,
            now=datetime(2020, 3, 1, 8, 0, 0, tzinfo=UTC),
        )
        dates = r"expired.*2020-03-01 08:00:00.*2020-03-31 08:00:00"
        with pytest.raises(SigningError, match=dates):
            load_identity(old.p12_path, passphrase_file=old.passphrase_path)
        # At a time inside its validity the same file loads.
        inside = datetime(2020, 3, 15, tzinfo=UTC)
        assert load_identity(old.p12_path, passphrase_file=old.passphrase_path, now=inside)

    def test_not_yet_valid_refused_with_dates(self, tmp_path: Path) -> None:
        start = (datetime.now(UTC) + timedelta(days=400)).replace(microsecond=0)
        future = create_demo_identity(tmp_path, "Riverside", "New Signer", now=start)
        with pytest.raises(SigningError, match=f"not yet valid.*{start:%Y-%m-%d %H:%M:%S}"):
            load_identity(future.p12_path, passphrase_file=future.passphrase_path)


# --------------------------------------------------------------------------- signing


def _signature_dict(pdf: bytes) -> dict:
    reader = pypdf.PdfReader(BytesIO(pdf))
    field = next(f for f in reader.get_fields().values() if f.get("/FT") == "/Sig")
    return field["/V"].get_object()


class TestSignPdf:
    def test_dictionary_round_trip(self, signed: bytes) -> None:
        sig = _signature_dict(signed)
        assert sig["/Name"] == "Jane Doe (DEMO)"
        assert sig["/Reason"] == REASON
        assert sig["/Location"] == LOCATION
        assert sig["/SubFilter"] == "/ETSI.CAdES.detached"  # ETSI EN 319 142-1, 5.1
        # /M is a PDF date "D:YYYYMMDDHHmmSS..." (ISO 32000-1, 7.9.4) holding the signing time.
        assert sig["/M"].startswith(f"D:{SIGNED_AT:%Y%m%d%H%M%S}")

    def test_byte_range_covers_whole_file(self, signed: bytes) -> None:
        # ISO 32000-1 12.8.1: [0 a b c], gap a..b is the /Contents string, b + c = length.
        start, a, b, c = (int(x) for x in _signature_dict(signed)["/ByteRange"])
        assert start == 0 and b + c == len(signed)
        assert signed[a:a + 1] == b"<" and signed[b - 1:b] == b">"

    def test_original_bytes_kept(self, signed: bytes) -> None:
        # ISO 32000-1 7.5.6: an incremental update appends; the unsigned file stays a prefix.
        assert signed.startswith(UNSIGNED) and len(signed) > len(UNSIGNED)

    def test_sign_outside_validity_refused(self, demo: DemoIdentity) -> None:
        identity = load_identity(demo.p12_path, passphrase_file=demo.passphrase_path)
        with pytest.raises(SigningError, match="outside the validity"):
            sign_pdf(_one_page_pdf(), identity, reason=REASON, location=LOCATION,
                     signed_at=identity.not_after + timedelta(days=1))

    def test_naive_time_and_empty_reason_refused(self, demo: DemoIdentity) -> None:
        identity = load_identity(demo.p12_path, passphrase_file=demo.passphrase_path)
        with pytest.raises(SigningError, match="time zone"):
            sign_pdf(_one_page_pdf(), identity, reason=REASON, location=LOCATION,
                     signed_at=datetime(2025, 1, 1))
        with pytest.raises(SigningError, match="needs a reason"):
            sign_pdf(_one_page_pdf(), identity, reason=" ", location=LOCATION,
                     signed_at=SIGNED_AT)

    def test_not_a_pdf_refused(self, demo: DemoIdentity) -> None:
        identity = load_identity(demo.p12_path, passphrase_file=demo.passphrase_path)
        with pytest.raises(SigningError, match="could not sign"):
            sign_pdf(b"plain text", identity, reason=REASON, location=LOCATION,
                     signed_at=SIGNED_AT)


# --------------------------------------------------------------------------- verification


class TestVerifyPdf:
    def test_intact_and_trusted_with_root(self, demo: DemoIdentity, signed: bytes) -> None:
        result = verify_pdf(signed, [demo.root_ca_path])
        assert result.valid and result.trusted
        assert result.signer_name == "Jane Doe (DEMO)"
        assert result.reason == REASON
        assert result.signed_at == SIGNED_AT
        assert result.summary == (
            "signature intact, document unchanged since signing; signer Jane Doe (DEMO); "
            "issuer trusted"
        )

    def test_intact_and_untrusted_without_root(self, signed: bytes, tmp_path: Path) -> None:
        path = tmp_path / "coa.pdf"
        path.write_bytes(signed)
        result = verify_pdf(path)
        assert result.valid and not result.trusted
        assert result.summary.endswith("issuer not in trust store")

    def test_untrusted_with_another_root(self, signed: bytes, tmp_path: Path) -> None:
        other = create_demo_identity(tmp_path, "Hillside", "Other Person")
        result = verify_pdf(signed, [other.root_ca_path])
        assert result.valid and not result.trusted

    def test_flipped_byte_invalid(self, demo: DemoIdentity, signed: bytes) -> None:
        result = verify_pdf(_tampered(signed), [demo.root_ca_path])
        assert not result.valid and not result.trusted
        assert result.summary.startswith("signature broken")

    def test_change_after_signing_invalid(self, demo: DemoIdentity, signed: bytes) -> None:
        writer = IncrementalPdfFileWriter(BytesIO(signed))
        writer.root["/Lang"] = generic.TextStringObject("en")  # a later revision
        writer.update_root()
        out = BytesIO()
        writer.write(out)
        result = verify_pdf(out.getvalue(), [demo.root_ca_path])
        assert not result.valid
        assert "changed after signing" in result.summary

    @pytest.mark.parametrize(
        ("data", "reason"),
        [
            (b"", "not a readable PDF"),
            (b"%PDF-1.7\nthis is not really a PDF", "not a readable PDF"),
            (None, "no signature found"),
        ],
    )
    def test_unusable_input_invalid(self, data: bytes | None, reason: str) -> None:
        result = verify_pdf(_one_page_pdf() if data is None else data)
        assert not result.valid and not result.trusted and result.signature_count == 0
        assert reason in result.summary

    def test_truncated_signed_file_invalid(self, signed: bytes) -> None:
        result = verify_pdf(signed[: len(signed) // 2])
        assert not result.valid

    def test_missing_file_raises(self, tmp_path: Path) -> None:
        with pytest.raises(SigningError, match="does not exist"):
            verify_pdf(tmp_path / "absent.pdf")

    def test_to_dict(self, signed: bytes) -> None:
        d = verify_pdf(signed).to_dict()
        assert d["signed_at"] == SIGNED_AT.isoformat() and d["valid"] is True


# --------------------------------------------------------------------------- poppler


@pytest.mark.skipif(shutil.which("pdfsig") is None, reason=PDFSIG_MISSING)
class TestPdfsig:
    def test_signed_file_valid(self, signed: bytes, tmp_path: Path) -> None:
        path = tmp_path / "coa.pdf"
        path.write_bytes(signed)
        report = pdfsig_report(path)
        assert report is not None
        ok, text = report
        assert ok and "Signature is Valid." in text
        assert "Jane Doe (DEMO)" in text

    def test_flipped_byte_not_valid(self, signed: bytes, tmp_path: Path) -> None:
        path = tmp_path / "coa.pdf"
        path.write_bytes(_tampered(signed))
        ok, text = pdfsig_report(path)  # type: ignore[misc]
        assert not ok and "Signature is Valid." not in text

    def test_unsigned_file_not_valid(self, tmp_path: Path) -> None:
        path = tmp_path / "plain.pdf"
        path.write_bytes(_one_page_pdf())
        ok, _ = pdfsig_report(path)  # type: ignore[misc]
        assert not ok


def test_pdfsig_absent_gives_none(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    monkeypatch.setenv("PATH", str(tmp_path))  # an empty directory: no pdfsig on the path
    assert pdfsig_report(tmp_path / "any.pdf") is None
